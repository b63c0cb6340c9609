"""``stepper run``: headless stepping for scripts and remote shells."""

from __future__ import annotations

import argparse
import signal
import sys
from pathlib import Path
from typing import Any

import numpy as np

from stepper.charts import spreads_text
from stepper.commands.common import StopFlag, check_plot_target, progress_bar, write_plot
from stepper.commands.session_options import open_session, settings_document
from stepper.commands.json_output import document_head, write_json
from stepper.core.metrics import metrics_document
from stepper.core.numeric import run_to_end
from stepper.errors import CustomLayerError, DivergenceError, RunawayError
from stepper.scenarios import resolve_model
from stepper.session import Session, SetMetrics
from stepper.training_report import metric_words, settings_words






def handle(args: argparse.Namespace) -> int:
    check_plot_target(args.plot, _plot_inputs(args, resolve_model(args.model)) + [args.save, args.journal])
    session = open_session(args, journal=args.journal, save=args.save)
    try:
        return _run(session, args)
    finally:
        session.close()
        if session.journal_problem is not None:
            print(f"stepper: warning: {session.journal_problem}", file=sys.stderr)


def _run(session: Session, args: argparse.Namespace) -> int:
    start_theta = session.theta.copy()
    start_cost = session.train_cost()
    start_val = session.val_cost()
    start_step = session.step_count
    start_metrics = session.metrics()

    stop = StopFlag()
    previous = signal.signal(signal.SIGINT, stop)
    refused: DivergenceError | None = None
    runaway: RunawayError | None = None
    failed: CustomLayerError | None = None
    try:
        if args.steps:
            with progress_bar("step", lines=True) as bar:
                run_to_end(session.iter_steps(args.steps), bar, lambda: stop.requested)
    except RunawayError as exc:
        runaway = exc
    except CustomLayerError as exc:
        # The steps before it are kept, and still saved: a custom layer that fails
        # (or hangs and is stopped with Ctrl-C) on new weights costs nothing made so far.
        failed = exc
    except DivergenceError as exc:
        refused = exc
    finally:
        signal.signal(signal.SIGINT, previous)

    saved = session.save_checkpoint(args.save) if args.save is not None else None
    end_metrics = session.metrics()
    moved = np.abs(session.theta - start_theta)
    top = np.argsort(-moved, kind="stable")[:5]
    steps_done = session.step_count - start_step
    if args.json:
        doc = {
            **document_head(session.setup),
            "steps_requested": args.steps,
            "steps_done": steps_done,
            "stopped_early": stop.requested,
            "refused": None if refused is None else refused.what,
            "runaway": None if runaway is None else runaway.what,
            "rate": session.rate,
            "rule": session.rule,
            "slope_source": session.slope_source,
            "batch_size": session.batch_size,
            "cost_before": start_cost,
            "cost_after": session.train_cost(),
            "validation_before": start_val,
            "validation_after": session.val_cost(),
            "l2_term_after": session.penalty(),
            "settings": settings_document(session),
            "rate_used_next": session.scheduled_rate(),
            "task": session.task,
            "metrics_before": _metrics_document(start_metrics),
            "metrics_after": _metrics_document(end_metrics),
            "moved_most": [{"name": session.names[i], "from": float(start_theta[i]),
                            "to": float(session.theta[i])} for i in top],
            "saved": None if saved is None else str(saved),
        }
        write_json(doc)
    else:
        out = sys.stdout
        note = (" (the cost ran away)" if runaway is not None else " (a step was refused)" if refused is not None
                else " (stopped early)" if stop.requested else "")
        out.write(f"{steps_done} of {args.steps} steps{note}: {session.rule}, rate {session.rate:g}, "
                  f"{session.slope_source} slopes, "
                  f"{'full batch' if session.batch_size is None else f'batches of {session.batch_size}'}"
                  f"{_epoch_note(session)}\n")
        settings = settings_words(session.l2, session.descent, session.rate, session.step_count)
        if settings:
            out.write(f"settings    {settings}\n")
        penalty = session.penalty()
        share = f"  (L2 term {penalty:.4g} of it)" if penalty else ""
        out.write(f"train cost  {start_cost:.10g} -> {session.train_cost():.10g}{share}\n")
        val = session.val_cost()
        if val is not None:
            out.write(f"validation  {start_val:.10g} -> {val:.10g}\n")
        out.write(f"train       {metric_words(start_metrics.train)} -> {metric_words(end_metrics.train)}\n")
        if end_metrics.validation is not None:
            out.write(f"validation  {metric_words(start_metrics.validation)} -> "
                      f"{metric_words(end_metrics.validation)}\n")
        out.write("moved most:\n")
        for i in top:
            out.write(f"  {session.names[i]:<16} {start_theta[i]: .6g} -> {session.theta[i]: .6g}\n")
        if saved is not None:
            out.write(f"saved {saved}\n")
    if args.plot is not None:
        inputs = _plot_inputs(args, session.setup.path) + [Path(session.setup.data.source), args.save, args.journal]
        write_plot(args.plot, spreads_text(session.spreads()), json_output=args.json, inputs=inputs)
    if runaway is not None:
        print(f"stepper: {runaway.what}; try a smaller --rate (the app's rate preview compares rates), "
              "or --run-on to let it run on", file=sys.stderr)
        return 1
    if refused is not None:
        print(f"stepper: {refused.what}; try a smaller --rate (the app's rate preview compares rates)",
              file=sys.stderr)
        return 1
    if failed is not None:
        print(f"stepper: {failed.message}", file=sys.stderr)
        return failed.exit_code
    return 0


def _plot_inputs(args: argparse.Namespace, model: Path) -> list[Path | None]:
    return [model, args.resume]


def _metrics_document(found: SetMetrics) -> dict[str, Any]:
    return {"train": metrics_document(found.train),
            "validation": None if found.validation is None else metrics_document(found.validation)}


def _epoch_note(session: Session) -> str:
    """``(epoch 3: 40 of 192 rows used)`` for mini-batches, else nothing."""
    if session.batch_size is None or session.epoch == 0:
        return ""
    return f" (epoch {session.epoch}: {session.batch_cursor} of {session.setup.data.n_train} rows used)"
