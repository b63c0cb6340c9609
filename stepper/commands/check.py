"""``stepper check``: compare every weight's analytic slope with its numeric slope."""

from __future__ import annotations

import argparse
import sys
import textwrap
from pathlib import Path
from typing import Any

import numpy as np

from stepper.commands.common import load, progress_bar, resumed_weights, sample_limit
from stepper.commands.parsers import HEALTH_RATE
from stepper.commands.check_rows import WeightRows, dump_document, mark, name_width, write_table_rows
from stepper.commands.json_output import document_head, json_safe
from stepper.core.compare import AGREE_BELOW, DISAGREE_ABOVE, VERDICTS
from stepper.core.diagnosis import Hint, diagnose
from stepper.core.directional import DirectionalCheck, iter_directional_check
from stepper.core.gradcheck import CheckResult, iter_check
from stepper.core.health import RATIO_TYPICAL, HealthReport, layer_health, unit_health
from stepper.core.input_slopes import InputSlopeCheck, check_input_slopes
from stepper.core.gemm import ScaledDense
from stepper.core.layers import Builtin, Dense, is_builtin
from stepper.core.names import name_at
from stepper.core.network import Network
from stepper.core.numeric import run_to_end
from stepper.core.selection import WeightChoice, choose, every_weight
from stepper.errors import UsageError
from stepper.formats.model_file import Setup
from stepper.health_text import channel_table, idle_lines, unit_document





def weight_choice(args: argparse.Namespace, net: Network) -> WeightChoice | None:
    """The weights to check one by one: ``--weights``, or all, or none when only ``--directions`` is asked."""
    if args.seed < 0:
        raise UsageError(f"--seed {args.seed}: a seed is a whole number, 0 or more")
    if args.weights is None:
        return None if args.directions is not None else every_weight(net.layout)
    try:
        return choose(net.layout, args.weights, args.seed)
    except ValueError as exc:
        raise UsageError(f"--weights {args.weights}: {exc}") from None


def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    X, Y = sample_limit(setup, args.samples)
    theta, rate, net = resumed_weights(setup, args.resume, args.rate, HEALTH_RATE)
    choice = weight_choice(args, net)
    result: CheckResult | None = None
    directions: DirectionalCheck | None = None
    # Overflow and NaN show up in the report (a non-finite slope disagrees);
    # numpy's warnings about them would only add lines of noise on stderr.
    with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
        if choice is not None:
            with progress_bar("numeric slopes") as bar:
                result = run_to_end(iter_check(net, theta, X, Y, args.method, args.delta, which=choice.indices), bar)
            assert result is not None
        if args.directions is not None:
            with progress_bar("directions") as bar:
                directions = run_to_end(
                    iter_directional_check(net, theta, X, Y, args.directions, args.seed, args.method,
                                           args.delta, None if result is None else result.analytic),
                    bar,
                )
            assert directions is not None
        health = layer_health(net, theta, X, Y, rate)
        inputs = [
            check_input_slopes(net, theta, X, Y, i, args.input_samples, args.method, args.delta)
            for i, layer in enumerate(net.layers) if not is_builtin(layer)
        ]
    passed = ((result is None or result.passed) and (directions is None or directions.passed)
              and all(c.passed for c in inputs) and doubtful_count(result, directions, inputs) == 0)
    rows = listed_rows(result, choice, args.worst if not args.json else None, args.problems_only)
    hints = diagnose(net, result, X.shape[0], inputs) if result is not None else []
    if args.json:
        doc = check_document(setup, result, X.shape[0], choice, rows, theta)
        doc["checkpoint"] = None if args.resume is None else str(args.resume)
        doc["passed"] = passed
        doc["directions"] = None if directions is None else directions_document(directions)
        doc["input_slopes"] = [input_slopes_document(c) for c in inputs]
        doc["hints"] = [hint_document(h) for h in hints]
        doc["health"] = health_document(health, net)
        # JSON (RFC 8259) has no NaN or Infinity: non-finite numbers become null.
        dump_document(json_safe(doc), sys.stdout)
    else:
        print_report(setup, result, X.shape[0], rows, choice, inputs, directions, theta, args.resume, hints)
        print_health(health, net)
    return 0 if passed else 1


def listed_rows(result: CheckResult | None, choice: WeightChoice | None, worst: int | None,
                problems_only: bool) -> np.ndarray[Any, np.dtype[np.int64]]:
    """Flat indices of the weights to list: the checked ones in flat order, or the ``worst`` first.

    With ``problems_only`` only those whose verdict is not ``agree``.
    """
    if result is None or choice is None:
        return np.empty(0, dtype=np.int64)
    rows = choice.indices
    if problems_only:
        rows = rows[result.verdict[rows] != "agree"]
    if worst is not None:
        rel = np.where(np.isnan(result.rel_error[rows]), -1.0, result.rel_error[rows])
        rows = rows[np.argsort(-rel, kind="stable")[:worst]]
    return rows


def layer_summary(net: Network) -> list[dict[str, Any]]:
    """Per layer: inputs, units, type (dense with its activation and bias, a built-in layer's shapes, or custom)."""
    out: list[dict[str, Any]] = []
    n_in = net.n_inputs
    for i, layer in enumerate(net.layers):
        entry: dict[str, Any] = {"index": i + 1, "inputs": n_in, "units": layer.n_out}
        if isinstance(layer, (Dense, ScaledDense)):
            entry.update(type="dense", activation=layer.activation.name, bias=layer.bias)
            if isinstance(layer, ScaledDense):
                entry.update(alpha=layer.alpha, beta=layer.beta)
        elif isinstance(layer, Builtin):
            entry.update(type=layer.type_name, label=layer.label, input_shape=list(layer.in_shape),
                         output_shape=list(layer.out_shape), bias=any(s.kind == "bias" for s in layer.param_specs()))
        else:
            entry.update(type="custom", label=layer.label, bias=False)
        out.append(entry)
        n_in = layer.n_out
    return out


def check_document(setup: Setup, result: CheckResult | None, n_samples: int, choice: WeightChoice | None,
                   rows: np.ndarray[Any, np.dtype[np.int64]], theta: np.ndarray[Any, Any] | None = None
                   ) -> dict[str, Any]:
    """The JSON form of a check at ``theta`` (``(n_params,)``; the model's initial values when None).

    Its ``weights`` (the rows listed) are streamed when the document is written.
    """
    if theta is None:
        theta = setup.theta0
    net = setup.network
    layout = net.layout
    none = {"count": 0, "of": net.n_params, "chosen": "none", "spec": None, "seed": None}
    return {
        **document_head(setup),
        "network": {
            "weights_from": None if setup.origin is None else {
                "file": str(setup.origin.file), "kind": setup.origin.kind, "layout": setup.origin.layout},
            "inputs": net.n_inputs,
            "layers": layer_summary(net),
            "loss": net.loss,
            "parameters": net.n_params,
        },
        "cost": result.cost if result is not None else None,
        "samples": n_samples,
        "differences": {"method": result.method if result is not None else None,
                        "h": result.h if result is not None else None},
        "checked": choice.as_dict() if choice is not None else none,
        "counts": result.counts if result is not None else {v: 0 for v in VERDICTS},
        "passed": result.passed if result is not None else True,
        "worst": name_at(layout, result.worst()) if result is not None and choice is not None else None,
        "weights": WeightRows(layout, theta, result, rows, setup.origin),
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


def print_report(setup: Setup, result: CheckResult | None, n_samples: int,
                 rows: np.ndarray[Any, np.dtype[np.int64]], choice: WeightChoice | None,
                 inputs: list[InputSlopeCheck] | None = None, directions: DirectionalCheck | None = None,
                 theta: np.ndarray[Any, Any] | None = None, checkpoint: Path | None = None,
                 hints: list[Hint] | None = None) -> None:
    """The tables, then a summary; ``theta`` ``(n_params,)`` is where the slopes were taken.

    Where slopes disagree the summary gives the likely causes (``hints``) instead of the worst weight.
    """
    if theta is None:
        theta = setup.theta0
    net = setup.network
    layout = net.layout
    out = sys.stdout
    method, h = (result.method, result.h) if result is not None else (
        (directions.method, directions.h) if directions is not None else ("central", float("nan")))
    out.write(f"{setup.name}: {net.n_params} parameters, {n_samples} samples, loss {net.loss}, "
              f"{method} differences, h = {h:.3g}\n")
    if checkpoint is not None:
        out.write(f"weights from {checkpoint}\n")
    if choice is not None and not choice.is_all:
        out.write(f"checked {choice.describe()}\n")
    if result is not None and choice is not None:
        width = max(12, name_width(layout, rows))
        header = (f"{'weight'.ljust(width)}  {'value':>12}  {'analytic':>12}  {'numeric':>12}  "
                  f"{'rel.err':>10}  verdict")
        if setup.origin is not None:
            header += f"        in {setup.origin.file.name}"
        out.write("\n" + header + "\n")
        out.write("-" * len(header) + "\n")
        write_table_rows(out, layout, theta, result, rows, width, setup.origin)
    if directions is not None:
        print_directions(directions)
    inputs = inputs or []
    if inputs:
        print_input_slopes(inputs)
    out.write("\n")
    cost = result.cost if result is not None else (directions.cost if directions is not None else float("nan"))
    out.write(f"cost        {cost:.10g}"
              + ("" if np.isfinite(cost) else "  (not a finite number: no slope can be checked here)")
              + "\n")
    failures = []
    unresolved = ""
    if result is not None and choice is not None:
        counts = result.counts
        w = result.worst()
        out.write("verdicts    " + ", ".join(f"{counts[v]} {v}" for v in VERDICTS)
                  + ("" if choice.is_all else f" (of the {choice.count:,} checked)") + "\n")
        for hint in hints or []:
            out.write(textwrap.fill(hint.text, 79, initial_indent="why         ", subsequent_indent=" " * 12,
                                    break_long_words=False, break_on_hyphens=False) + "\n")
        if not hints:
            out.write(f"worst       {name_at(layout, w)} (relative error {result.rel_error[w]:.2e}, "
                      f"{result.verdict[w]})\n")
        if counts["disagree"]:
            failures.append(f"{counts['disagree']} slopes disagree")
        if counts["unresolved"]:
            step = result.suggested_step()
            advice = f"; a step size h of about {step:.2g} would resolve them" if step is not None else ""
            unresolved = (f"{counts['unresolved']} slope(s) are smaller than the numeric slopes' rounding "
                          f"allowance ({result.noise:.2g} = 16 u |cost| / h), so this check cannot tell right "
                          f"from wrong there{advice}")
    if directions is not None:
        counts = directions.counts
        out.write(f"directions  {len(directions.arrays)} arrays: "
                  + ", ".join(f"{counts[v]} {v}" for v in VERDICTS) + "\n")
        if not directions.passed:
            bad = [a.block.prefix for a in directions.arrays if a.verdict == "disagree"]
            failures.append(f"the slopes of {', '.join(bad)} disagree along random directions")
    bad_inputs = [f"L{c.layer + 1}" for c in inputs if not c.passed]
    if bad_inputs:
        failures.append(f"the input slopes (dX) of custom layer {', '.join(bad_inputs)} disagree")
    doubtful = doubtful_count(result, directions, inputs)
    kinks = 0 if result is None else result.counts["kink"]
    if failures:
        verdict = "FAIL: " + "; ".join(failures + ([unresolved] if unresolved else []))
    elif unresolved:
        verdict = "NOT RESOLVED: " + unresolved
    elif doubtful:
        # Exit 1 too: a doubtful slope is not confirmed (README, "Checking slopes from a script").
        verdict = (f"FAIL: {doubtful} slopes are doubtful (relative error between {_power(AGREE_BELOW)} and "
                   f"{_power(DISAGREE_ABOVE)}), none disagrees: not confirmed; central differences or "
                   "another step may settle them")
    else:
        verdict = "PASS: every slope agrees"
        if kinks:
            verdict += f", except {kinks} at a kink, where finite differences cannot judge"
        if choice is not None and not choice.is_all:
            verdict += f" (of the {choice.count:,} weights checked)"
    out.write(f"result      {verdict}\n")


def doubtful_count(result: CheckResult | None, directions: DirectionalCheck | None,
                   inputs: list[InputSlopeCheck]) -> int:
    """Slopes (and directions, and input-slope entries) whose verdict is only ``doubtful``."""
    count = sum(c.counts["doubtful"] for c in inputs)
    if result is not None:
        count += result.counts["doubtful"]
    if directions is not None:
        count += directions.counts.get("doubtful", 0)
    return count


def _power(x: float) -> str:
    """``1e-05`` written as ``1e-5``."""
    return f"{x:.0e}".replace("e-0", "e-").replace("e+0", "e")


def print_directions(check: DirectionalCheck) -> None:
    """One line per array: its directions' worst relative error and its verdict."""
    out = sys.stdout
    out.write(f"\ndirectional check: each array along {check.k} random unit directions (seed {check.seed}), "
              f"{check.method} differences, h = {check.h:.3g}\n")
    width = max(8, max(len(a.block.prefix) for a in check.arrays))
    header = (f"{'array'.ljust(width)}  {'entries':>9}  {'|analytic| max':>14}  {'worst rel.err':>16}  "
              f"verdict")
    out.write(header + "\n" + "-" * len(header) + "\n")
    for a in check.arrays:
        largest = float(np.max(np.abs(a.analytic)))
        out.write(f"{a.block.prefix.ljust(width)}  {a.block.size:>9}  {largest:>14.4e}  "
                  f"{a.worst_error:>16.2e}  {mark(a.verdict)}\n")


def directions_document(check: DirectionalCheck) -> dict[str, Any]:
    """The JSON form of a directional check."""
    return {
        "k": check.k,
        "seed": check.seed,
        "method": check.method,
        "h": check.h,
        "counts": check.counts,
        "passed": check.passed,
        "arrays": [{
            "array": a.block.prefix,
            "layer": a.block.layer + 1,
            "kind": a.block.kind,
            "entries": a.block.size,
            "verdict": a.verdict,
            "worst_relative_error": _finite_or_none(a.worst_error),
            "analytic": a.analytic.tolist(),
            "numeric": a.numeric.tolist(),
            "relative_error": a.rel_error.tolist(),
            "verdicts": [str(v) for v in a.verdicts],
        } for a in check.arrays],
    }


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


def print_health(health: HealthReport, net: Network) -> None:
    """Layer health as a table, how slopes change on the way back, the dead and saturated units by
    number, and a table of each convolution's channels."""
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
    for line in idle_lines(health):
        out.write(line + "\n")
    for e in health.layers:
        if e.per == "channel":
            out.write("\n" + "\n".join(channel_table(health, net, e.index)) + "\n")


def health_document(health: HealthReport, net: Network) -> dict[str, Any]:
    """The JSON form of the layer health (with each unit's, or a convolution's channel's, figures)."""
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
            "units": None if e.unit_weights is None else
            [unit_document(u) for u in (unit_health(health, net, e.index, j) for j in range(e.unit_weights.size))
             if u is not None],
        })
    return {
        "rate": health.rate,
        "ratio_rule_of_thumb": RATIO_TYPICAL,
        "trend": health.trend,
        "travel": _finite_or_none(health.travel),
        "layers": layers,
    }
