"""``stepper explain``: one weight's slope taken apart into error signal, activation slope and input."""

from __future__ import annotations

import argparse
import sys
import textwrap
from typing import Any

import numpy as np

from stepper.commands.common import load, resumed_weights, sample_limit
from stepper.commands.parsers import DEFAULT_RATE
from stepper.commands.slice import weight_index
from stepper.commands.json_output import document_head, write_json
from stepper.core.breakdown import Breakdown, slope_breakdown
from stepper.core.health import layer_health, unit_health, unit_of
from stepper.core.layers import Conv
from stepper.core.network import Network
from stepper.errors import UsageError
from stepper.formats.model_file import Setup
from stepper.health_text import idle_lines, unit_document, unit_summary
from stepper.report import at_z_reason, factor_names, weight_place




def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    theta, rate, net = resumed_weights(setup, args.resume, None, DEFAULT_RATE)
    index = weight_index(setup, args.weight)
    X, Y = sample_limit(setup, args.samples)
    if args.sample_index is not None and not 0 <= args.sample_index < X.shape[0]:
        raise UsageError(f"--sample-index {args.sample_index}: the training set has samples 0 to {X.shape[0] - 1}")
    try:
        result = slope_breakdown(net, theta, X, Y, index, args.sample_index)
    except ValueError as exc:
        if not isinstance(net.layers[net.layout.layer_index[index]], Conv):
            raise UsageError(str(exc)) from None
        # A convolution's weight: no factors to show, but its output channel's health.
        return explain_channel(setup, net, theta, X, Y, index, str(exc), rate, args.json)
    name = setup.network.layout.names[index]
    if args.json:
        write_json(explain_document(setup, name, result, theta[index]))
    else:
        sys.stdout.write(report(setup, name, result, float(theta[index])))
    return 0


def describe(setup: Setup, b: Breakdown) -> str:
    """``weight from input 2 (weekday) to unit 3 of layer 1 (dense 4->6 tanh)``."""
    return weight_place(setup.network, setup.data.input_names, b)


def report(setup: Setup, name: str, b: Breakdown, value: float) -> str:
    """The text form: the factors averaged, for one sample, their sum against the slope, and flags."""
    e_name, f_name, a_name = factor_names(b)
    n = b.n_samples
    mean = b.means()
    one = b.at(b.sample)
    w = max(16, len(e_name), len(f_name), len(a_name))

    def row(label: str, values: tuple[float, float, float, float]) -> str:
        return f"{label:<22}" + "".join(f"{v: .{6}e}".rjust(w + 2) for v in values)

    lines = [
        f"{name} in {setup.name}: {describe(setup, b)}",
        f"value {value:.6g}, {n} samples",
        "",
        "slope = sum over samples of  error signal x activation slope x input",
        "",
        f"{'':<22}" + "".join(h.rjust(w + 2) for h in (e_name, f_name, a_name, "product")),
        row("mean over samples", mean),
        row(f"sample {b.sample}" + (" (largest)" if b.sample == _largest(b) else ""), one),
        "",
        f"sum of the {n} products   {b.total - b.penalty: .12e}",
        *([f"+ L2 term l2 x w         {b.penalty: .12e}", f"= sum                     {b.total: .12e}"]
          if b.penalty else []),
        f"analytic slope (table)    {b.analytic: .12e}",
        "",
    ]
    reason = at_z_reason(setup.network, b)
    if reason is not None:
        lines.append(f"The error signal is taken at the unit's input Z and the activation factor is 1: {reason}.")
    else:
        lines.append(f"The error signal is the cost's slope w.r.t. unit {b.unit}'s output (it carries the 1/n "
                     "of the average over samples).")
    if b.source is not None and b.layer == 0:
        lines.append("Inputs are as the network sees them (standardized when the model file says so).")
    lines.append("")
    if b.flags:
        lines.append("Why this slope may be small or large:")
        lines.extend(f"  - {flag.text}" for flag in b.flags)
    else:
        lines.append("No usual cause of a vanishing or exploding slope found (saturated or dead unit, "
                     "input near zero or large, error signal shrunk or grown, samples cancelling).")
    lines.append("")
    return "\n".join(lines)


def _largest(b: Breakdown) -> int:
    return int(np.argmax(np.abs(b.products)))


def explain_document(setup: Setup, name: str, b: Breakdown, value: float) -> dict[str, Any]:
    """The JSON form of a breakdown."""
    e, f, a, p = b.means()
    se, sf, sa, sp = b.at(b.sample)
    return {
        **document_head(setup),
        "weight": name,
        "description": describe(setup, b),
        "value": float(value),
        "samples": b.n_samples,
        "through_z": b.through_z,
        "mean": {"error": e, "activation_slope": f, "input": a, "product": p},
        "sample": {"index": b.sample, "error": se, "activation_slope": sf, "input": sa, "product": sp},
        "sum_of_products": b.total - b.penalty,
        "l2_term": b.penalty,
        "analytic": b.analytic,
        "flags": [{"code": flag.code, "text": flag.text} for flag in b.flags],
    }


def explain_channel(setup: Setup, net: Network, theta: np.ndarray, X: np.ndarray, Y: np.ndarray, index: int,
                    why: str, rate: float, as_json: bool) -> int:
    """A convolution's weight: why its slope has no factors, and the health of its output channel at ``rate``."""
    found = unit_of(net, index)
    assert found is not None
    layer, channel = found
    report = layer_health(net, theta, X, Y, rate)
    unit = unit_health(report, net, layer, channel)
    assert unit is not None
    name = net.layout.names[index]
    slope = net.cost_and_slopes(theta, X, Y)[1][index]
    if as_json:
        write_json({**document_head(setup), "weight": name, "value": float(theta[index]), "analytic": float(slope),
                    "samples": X.shape[0], "breakdown": None, "why_no_breakdown": why,
                    "channel": unit_document(unit)})
        return 0
    lines = [f"{name} in {setup.name}: a weight of channel {channel} of layer {layer + 1} ({net.layers[layer].label})",
             f"value {float(theta[index]):.6g}, analytic slope {float(slope):.6e}, {X.shape[0]} samples", "",
             *textwrap.wrap(f"No factors: {why}.", 100), "",
             f"Its output channel's health at rate {rate:g} (stepper check lists every channel):",
             *textwrap.wrap(unit_summary(unit), 100, initial_indent="  ", subsequent_indent="    ")]
    idle = [line for line in idle_lines(report) if line.startswith(f"L{layer + 1} ")]
    lines += ["", *idle] if idle else []
    sys.stdout.write("\n".join(lines) + "\n")
    return 0
