"""``stepper rates``: a rate range test, k steps at each of several rates from one state, nothing committed."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from stepper.charts import range_text
from stepper.commands.common import check_plot_target, progress_bar, write_plot
from stepper.commands.session_options import open_session, settings_document
from stepper.commands.json_output import document_head, write_json
from stepper.core.numeric import run_to_end
from stepper.core.ratetest import RangeResult, log_rates
from stepper.errors import UsageError
from stepper.session import Session
from stepper.scenarios import resolve_model
from stepper.session.rates import MAX_RATES
from stepper.training_report import finite_or_none, range_lines




def handle(args: argparse.Namespace) -> int:
    check_plot_target(args.plot, [resolve_model(args.model), args.resume])
    session = open_session(args)
    try:
        low, high, count = session.default_range()
        low = args.low if args.low is not None else low
        high = args.high if args.high is not None else high
        count = args.count if args.count is not None else count
        if count > MAX_RATES:
            raise UsageError(f"--count {count}: at most {MAX_RATES} rates")
        try:
            rates = log_rates(low, high, count)
        except ValueError as exc:
            raise UsageError(f"--low/--high: {exc}") from None
        with progress_bar("rates") as bar:
            result = run_to_end(session.iter_range_test(rates.tolist(), args.steps), bar)
        assert result is not None
        if args.json:
            write_json(document(session, result))
        else:
            sys.stdout.write(report(session, result))
        if args.plot is not None:
            inputs = [session.setup.path, Path(session.setup.data.source)] + ([args.resume] if args.resume else [])
            write_plot(args.plot, range_text(result), json_output=args.json, inputs=inputs)
    finally:
        session.close()
    return 0


def report(session: Session, result: RangeResult) -> str:
    lines = [f"{session.setup.name}: rate range test from step {session.step_count}, {session.rule}, "
             f"{'full batch' if session.batch_size is None else f'batches of {session.batch_size}'}"]
    lines += range_lines(result)
    best = result.best
    if best is not None:
        lines.append(f"lowest cost at rate {result.rates[best]:.4g}; to train with it: --rate {result.rates[best]:.4g}")
    lines.append("")
    return "\n".join(lines)


def document(session: Session, result: RangeResult) -> dict[str, Any]:
    setup = session.setup
    best = result.best
    return {
        **document_head(setup),
        "from_step": session.step_count,
        "rule": session.rule,
        "batch_size": session.batch_size,
        "settings": settings_document(session),
        "steps_per_rate": result.steps,
        "start_cost": result.start_cost,
        "rates": [
            {"rate": float(rate), "train_cost": finite_or_none(float(result.train[k])),
             "validation_cost": None if result.val is None else finite_or_none(float(result.val[k])),
             "diverged_at_step": result.diverged_at[k]}
            for k, rate in enumerate(result.rates)
        ],
        "best_rate": None if best is None else float(result.rates[best]),
    }
