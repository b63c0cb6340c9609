"""``stepper check``: compare every weight's analytic slope with its numeric slope."""

from __future__ import annotations

import argparse
import json
import sys
import textwrap
from pathlib import Path
from typing import Any

import numpy as np

from stepper.commands.common import (
    add_model_argument,
    add_resume_option,
    add_slope_options,
    fmt,
    positive_float,
    load,
    positive_int,
    progress_printer,
    resumed_weights,
    sample_limit,
)
from stepper.core.compare import VERDICTS
from stepper.core.diagnosis import Hint, diagnose
from stepper.core.gradcheck import CheckResult, iter_check
from stepper.core.health import RATIO_TYPICAL, HealthReport, layer_health
from stepper.core.input_slopes import DEFAULT_SAMPLES, InputSlopeCheck, check_input_slopes
from stepper.core.gemm import ScaledDense
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.numeric import run_to_end
from stepper.formats.model_file import Setup

#: Rate for the layer health when neither --rate nor a checkpoint gives one (common practice).
HEALTH_RATE = 0.1


def add_parser(subs: Any) -> None:
    p = subs.add_parser(
        "check",
        help="check every slope against finite differences (exit 1 if any disagrees)",
        description="Compute each weight's slope by backpropagation and by finite "
        "differences, and report where they disagree. Exit code: 0 all agree, "
        "1 some disagree, 2 bad input.",
    )
    add_model_argument(p)
    add_slope_options(p)
    add_resume_option(p, help="check the slopes at a checkpoint's weights instead of the model's start")
    p.add_argument("--rate", type=positive_float, default=None, metavar="R",
                   help=f"rate for the layer health's update-to-weight ratios (default {HEALTH_RATE}, "
                   "common practice, or the checkpoint's with --resume)")
    p.add_argument("--input-samples", type=positive_int, default=DEFAULT_SAMPLES, metavar="N",
                   help=f"samples on which custom layers' input slopes are checked (default {DEFAULT_SAMPLES})")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of a table")
    p.add_argument("--worst", type=positive_int, default=None, metavar="N",
                   help="list only the N weights with the largest relative error")
    p.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    X, Y = sample_limit(setup, args.samples)
    net = setup.network
    theta, rate = resumed_weights(setup, args.resume, args.rate, HEALTH_RATE)
    # Overflow and NaN show up in the report (a non-finite slope disagrees);
    # numpy's warnings about them would only add lines of noise on stderr.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
        result = run_to_end(
            iter_check(setup.network, theta, X, Y, args.method, args.delta),
            progress_printer("numeric slopes"),
        )
        assert result is not None
        health = layer_health(net, theta, X, Y, rate)
        inputs = [
            check_input_slopes(net, theta, X, Y, i, args.input_samples, args.method, args.delta)
            for i, layer in enumerate(net.layers) if not isinstance(layer, (Dense, ScaledDense))
        ]
    passed = result.passed and all(c.passed for c in inputs)
    hints = diagnose(net, result, X.shape[0], inputs)
    if args.json:
        doc = check_document(setup, result, X.shape[0], theta)
        doc["checkpoint"] = None if args.resume is None else str(args.resume)
        doc["passed"] = passed
        doc["input_slopes"] = [input_slopes_document(c) for c in inputs]
        doc["hints"] = [hint_document(h) for h in hints]
        doc["health"] = health_document(health)
        # JSON (RFC 8259) has no NaN or Infinity: non-finite numbers become null.
        json.dump(_json_safe(doc), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print_report(setup, result, X.shape[0], args.worst, inputs, theta, args.resume, hints)
        print_health(health)
    return 0 if passed else 1


def layer_summary(net: Network) -> list[dict[str, Any]]:
    """Per layer: inputs, units, activation (or custom class), bias."""
    out: list[dict[str, Any]] = []
    n_in = net.n_inputs
    for i, layer in enumerate(net.layers):
        entry: dict[str, Any] = {"index": i + 1, "inputs": n_in, "units": layer.n_out}
        if isinstance(layer, (Dense, ScaledDense)):
            entry.update(type="dense", activation=layer.activation.name, bias=layer.bias)
            if isinstance(layer, ScaledDense):
                entry.update(alpha=layer.alpha, beta=layer.beta)
        else:
            entry.update(type="custom", label=layer.label, bias=False)
        out.append(entry)
        n_in = layer.n_out
    return out


def check_document(setup: Setup, result: CheckResult, n_samples: int,
                   theta: np.ndarray[Any, Any] | None = None) -> dict[str, Any]:
    """The JSON form of a check at ``theta`` (``(n_params,)``; the model's initial values when None)."""
    if theta is None:
        theta = setup.theta0
    net = setup.network
    layout = net.layout
    sources = setup.origin.source_names(layout) if setup.origin is not None else (None,) * net.n_params
    weights = []
    for i, name in enumerate(layout.names):
        block = layout.block_of(i)
        weights.append({
            "name": name,
            "source": sources[i],
            "layer": block.layer + 1,
            "kind": block.kind,
            "indices": list(layout.indices(i)),
            "value": float(theta[i]),
            "analytic": float(result.analytic[i]),
            "numeric": _finite_or_none(result.numeric[i]),
            "relative_error": _finite_or_none(result.rel_error[i]),
            "verdict": str(result.verdict[i]),
        })
    return {
        "model": {
            "name": setup.name,
            "file": str(setup.path),
            "weights_from": None if setup.origin is None else {
                "file": str(setup.origin.file), "kind": setup.origin.kind, "layout": setup.origin.layout},
            "inputs": net.n_inputs,
            "layers": layer_summary(net),
            "loss": net.loss,
            "parameters": net.n_params,
        },
        "cost": result.cost,
        "samples": n_samples,
        "settings": {"method": result.method, "h": result.h},
        "counts": result.counts,
        "passed": result.passed,
        "worst": layout.names[result.worst()],
        "weights": weights,
    }


def hint_document(hint: Hint) -> dict[str, Any]:
    """The JSON form of one likely cause; layers count from 1."""
    return {
        "code": hint.code,
        "text": hint.text,
        "layer": None if hint.layer is None else hint.layer + 1,
        "arrays": list(hint.arrays),
        "ratio": hint.ratio,
    }


def _finite_or_none(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def _json_safe(value: Any) -> Any:
    """``value`` with every float that is not finite replaced by None, at any depth."""
    if isinstance(value, float):
        return value if np.isfinite(value) else None
    if isinstance(value, dict):
        return {key: _json_safe(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(item) for item in value]
    return value


def print_report(setup: Setup, result: CheckResult, n_samples: int, worst: int | None,
                 inputs: list[InputSlopeCheck] | None = None, theta: np.ndarray[Any, Any] | None = None,
                 checkpoint: Path | None = None, hints: list[Hint] | None = None) -> None:
    """The table, then a summary; ``theta`` ``(n_params,)`` is where the slopes were taken.

    Where slopes disagree the summary gives the likely causes (``hints``) instead of the worst weight.
    """
    if theta is None:
        theta = setup.theta0
    net = setup.network
    names = net.layout.names
    order = np.arange(net.n_params)
    if worst is not None:
        rel = np.where(np.isnan(result.rel_error), -1.0, result.rel_error)
        order = np.argsort(-rel, kind="stable")[:worst]
    width = max(12, max(len(names[i]) for i in order))
    out = sys.stdout
    out.write(f"{setup.name}: {net.n_params} parameters, {n_samples} samples, loss {net.loss}, "
              f"{result.method} differences, h = {result.h:.3g}\n")
    if checkpoint is not None:
        out.write(f"weights from {checkpoint}\n")
    out.write("\n")
    header = (f"{'weight'.ljust(width)}  {'value':>12}  {'analytic':>12}  {'numeric':>12}  "
              f"{'rel. error':>10}  verdict")
    sources = setup.origin.source_names(net.layout) if setup.origin is not None else None
    if sources is not None:
        header += f"        in {setup.origin.file.name}" if setup.origin is not None else ""
    out.write(header + "\n")
    out.write("-" * len(header) + "\n")
    for i in order:
        rel = result.rel_error[i]
        rel_text = "-" if rel != rel else f"{rel:.2e}"
        source = "" if sources is None or sources[i] is None else f"  {sources[i]}"
        out.write(
            f"{names[i].ljust(width)}  {fmt(theta[i])}  {fmt(result.analytic[i])}  "
            f"{fmt(result.numeric[i])}  {rel_text:>10}  {_mark(str(result.verdict[i])):<13}{source}".rstrip()
            + "\n"
        )
    counts = result.counts
    w = result.worst()
    inputs = inputs or []
    if inputs:
        print_input_slopes(inputs)
    out.write("\n")
    out.write(f"cost        {result.cost:.10g}"
              + ("" if np.isfinite(result.cost) else "  (not a finite number: no slope can be checked here)")
              + "\n")
    out.write("verdicts    " + ", ".join(f"{counts[v]} {v}" for v in VERDICTS) + "\n")
    if hints:
        for hint in hints:
            out.write(textwrap.fill(hint.text, 79, initial_indent="why         ", subsequent_indent=" " * 12,
                                    break_long_words=False, break_on_hyphens=False) + "\n")
    else:
        out.write(f"worst       {names[w]} (relative error {result.rel_error[w]:.2e}, {result.verdict[w]})\n")
    bad_inputs = [f"L{c.layer + 1}" for c in inputs if not c.passed]
    if not result.passed:
        verdict = "FAIL: some slopes disagree"
    elif bad_inputs:
        verdict = f"FAIL: the input slopes (dX) of custom layer {', '.join(bad_inputs)} disagree"
    else:
        verdict = "PASS: every slope agrees"
    out.write(f"result      {verdict}\n")


_MARKS = {"agree": "ok  agree", "doubtful": "?   doubtful", "disagree": "XX  disagree", "kink": "~   kink"}


def _mark(verdict: str) -> str:
    return _MARKS.get(verdict, verdict)


# -- custom layers' input slopes and layer health ------------------------------------------------


def print_input_slopes(checks: list[InputSlopeCheck]) -> None:
    """One line per custom layer: how its backward's dX compares with numeric input slopes."""
    out = sys.stdout
    first = checks[0]
    out.write(f"\ninput slopes of custom layers ({first.samples.size} samples each, {first.method} "
              f"differences, h = {first.h:.3g})\n")
    for c in checks:
        counts = c.counts
        sample, entry = c.worst()
        out.write(
            f"L{c.layer + 1}  {c.label}: {c.analytic.size} entries of dX: "
            + ", ".join(f"{counts[v]} {v}" for v in VERDICTS)
            + f"; worst relative error {c.worst_error:.2e} (sample {sample}, input {entry})  "
            + ("ok" if c.passed else "XX  backward's dX disagrees")
            + "\n"
        )


def input_slopes_document(c: InputSlopeCheck) -> dict[str, Any]:
    """The JSON form of one custom layer's input-slope check."""
    sample, entry = c.worst()
    return {
        "layer": c.layer + 1,
        "label": c.label,
        "samples": c.samples.tolist(),
        "counts": c.counts,
        "passed": c.passed,
        "worst": {"sample": sample, "input": entry, "relative_error": _finite_or_none(c.worst_error)},
        "analytic": c.analytic.tolist(),
        "numeric": c.numeric.tolist(),
    }


def print_health(health: HealthReport) -> None:
    """Layer health as a table, then how slopes change on the way back."""
    out = sys.stdout
    width = max(len(entry.label) for entry in health.layers)
    out.write(f"\nlayer health at rate {health.rate:g} (an update/weight ratio near {RATIO_TYPICAL:.0e} per "
              "step is common practice)\n")
    header = (f"{'layer':<6} {'type'.ljust(width)}  {'|weights|':>10}  {'|slopes|':>10}  "
              f"{'update/weight':>21}  {'saturated':>9}  {'dead ReLU':>9}  {'error rms':>9}  {'vs next':>8}")
    out.write(header + "\n" + "-" * len(header) + "\n")
    for e in health.layers:
        ratio = "-" if e.ratio_verdict == "" else f"{e.update_ratio:.1e} {e.ratio_verdict}"
        saturated = "-" if e.saturation is None else f"{e.saturated_units.size}/{e.saturation.size}"
        dead = "-" if e.active is None else f"{e.dead_units.size}/{e.active.size}"
        change = "-" if e.signal_change != e.signal_change else f"{e.signal_change:.3g}"
        out.write(f"{'L' + str(e.index + 1):<6} {e.label.ljust(width)}  {e.weight_norm:>10.3e}  "
                  f"{e.slope_norm:>10.3e}  {ratio:>21}  {saturated:>9}  {dead:>9}  {e.signal_rms:>9.2e}  "
                  f"{change:>8}\n")
    if health.trend in ("single layer", "no signal"):
        out.write(f"slopes on the way back: {health.trend}\n")
    else:
        out.write(f"slopes on the way back: {health.trend} (first layer's error signal is "
                  f"{health.travel:.3g} x the last layer's)\n")


def health_document(health: HealthReport) -> dict[str, Any]:
    """The JSON form of the layer health."""
    layers = []
    for e in health.layers:
        layers.append({
            "layer": e.index + 1,
            "label": e.label,
            "weight_norm": e.weight_norm,
            "slope_norm": e.slope_norm,
            "update_ratio": _finite_or_none(e.update_ratio),
            "ratio_verdict": e.ratio_verdict or None,
            "saturated_fraction": _finite_or_none(e.saturated_fraction),
            "saturated_units": e.saturated_units.tolist(),
            "dead_fraction": _finite_or_none(e.dead_fraction),
            "dead_units": e.dead_units.tolist(),
            "signal_rms": e.signal_rms,
            "signal_change": _finite_or_none(e.signal_change),
        })
    return {
        "rate": health.rate,
        "ratio_rule_of_thumb": RATIO_TYPICAL,
        "trend": health.trend,
        "travel": _finite_or_none(health.travel),
        "layers": layers,
    }
