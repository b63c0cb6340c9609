"""``stepper check``: compare every weight's analytic slope with its numeric slope."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

import numpy as np

from stepper.commands.common import (
    add_model_argument,
    add_slope_options,
    fmt,
    load,
    positive_int,
    progress_printer,
    sample_limit,
)
from stepper.core.compare import VERDICTS
from stepper.core.gradcheck import CheckResult, iter_check
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.numeric import run_to_end
from stepper.formats.model_file import Setup


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
    p.add_argument("--json", action="store_true", help="print one JSON document instead of a table")
    p.add_argument("--worst", type=positive_int, default=None, metavar="N",
                   help="list only the N weights with the largest relative error")
    p.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    X, Y = sample_limit(setup, args.samples)
    result = run_to_end(
        iter_check(setup.network, setup.theta0, X, Y, args.method, args.step),
        progress_printer("numeric slopes"),
    )
    assert result is not None
    if args.json:
        json.dump(check_document(setup, result, X.shape[0]), sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print_report(setup, result, X.shape[0], args.worst)
    return 0 if result.passed else 1


def layer_summary(net: Network) -> list[dict[str, Any]]:
    """Per layer: inputs, units, activation (or custom class), bias."""
    out: list[dict[str, Any]] = []
    n_in = net.n_inputs
    for i, layer in enumerate(net.layers):
        entry: dict[str, Any] = {"index": i + 1, "inputs": n_in, "units": layer.n_out}
        if isinstance(layer, Dense):
            entry.update(type="dense", activation=layer.activation.name, bias=layer.bias)
        else:
            entry.update(type="custom", label=layer.label, bias=False)
        out.append(entry)
        n_in = layer.n_out
    return out


def check_document(setup: Setup, result: CheckResult, n_samples: int) -> dict[str, Any]:
    """The JSON form of a check."""
    net = setup.network
    layout = net.layout
    weights = []
    for i, name in enumerate(layout.names):
        block = layout.block_of(i)
        weights.append({
            "name": name,
            "layer": block.layer + 1,
            "kind": block.kind,
            "indices": list(layout.indices(i)),
            "value": float(setup.theta0[i]),
            "analytic": float(result.analytic[i]),
            "numeric": _finite_or_none(result.numeric[i]),
            "relative_error": _finite_or_none(result.rel_error[i]),
            "verdict": str(result.verdict[i]),
        })
    return {
        "model": {
            "name": setup.name,
            "file": str(setup.path),
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


def _finite_or_none(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def print_report(setup: Setup, result: CheckResult, n_samples: int, worst: int | None) -> None:
    net = setup.network
    names = net.layout.names
    order = np.arange(net.n_params)
    if worst is not None:
        rel = np.where(np.isnan(result.rel_error), -1.0, result.rel_error)
        order = np.argsort(-rel, kind="stable")[:worst]
    width = max(12, max(len(names[i]) for i in order))
    out = sys.stdout
    out.write(f"{setup.name}: {net.n_params} parameters, {n_samples} samples, loss {net.loss}, "
              f"{result.method} differences, h = {result.h:.3g}\n\n")
    header = (f"{'weight'.ljust(width)}  {'value':>12}  {'analytic':>12}  {'numeric':>12}  "
              f"{'rel. error':>10}  verdict")
    out.write(header + "\n")
    out.write("-" * len(header) + "\n")
    for i in order:
        rel = result.rel_error[i]
        rel_text = "-" if rel != rel else f"{rel:.2e}"
        out.write(
            f"{names[i].ljust(width)}  {fmt(setup.theta0[i])}  {fmt(result.analytic[i])}  "
            f"{fmt(result.numeric[i])}  {rel_text:>10}  {_mark(str(result.verdict[i]))}\n"
        )
    counts = result.counts
    w = result.worst()
    out.write("\n")
    out.write(f"cost        {result.cost:.10g}\n")
    out.write("verdicts    " + ", ".join(f"{counts[v]} {v}" for v in VERDICTS) + "\n")
    out.write(f"worst       {names[w]} (relative error {result.rel_error[w]:.2e}, {result.verdict[w]})\n")
    out.write(f"result      {'PASS: every slope agrees' if result.passed else 'FAIL: some slopes disagree'}"
              "\n")


_MARKS = {"agree": "ok  agree", "doubtful": "?   doubtful", "disagree": "XX  disagree", "kink": "~   kink"}


def _mark(verdict: str) -> str:
    return _MARKS.get(verdict, verdict)
