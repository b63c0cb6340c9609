"""``stepper slice``: the cost along one weight, its tangent, curvature and what they say about the rate."""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Any


from stepper.commands.common import load, resumed_weights, sample_limit, write_plot
from stepper.commands.parsers import DEFAULT_RATE, PLOT_SIZE
from stepper.commands.json_output import document_head, write_json
from stepper.core.nearest import unknown_name
from stepper.core.slice import CostSlice, cost_slice
from stepper.errors import UsageError
from stepper.formats.model_file import Setup
from stepper.formats.outputs import check_output


SOURCE = ('LeCun, Bottou, Orr & Mueller, "Efficient BackProp" (1998), section 5.1 on the optimal '
          "learning rate (recalled from memory)")

_MEANING = {
    "short": "below 1: one step lands short of this weight's minimum (quadratic model)",
    "at the minimum": "1 within the curvature's accuracy: one step lands at this weight's minimum "
                      "(quadratic model); the rate is 1 / curvature, the best along this weight",
    "overshoots": "between 1 and 2: one step lands past this weight's minimum; repeated steps "
                  "oscillate around it, closing in only while rate x curvature stays below 2",
    "diverges": "above 2: one step lands farther from this weight's minimum than it started; "
                "repeated steps along this weight diverge",
    "no minimum": "the curvature is not positive: the cost curves down or is flat here, so the "
                  "quadratic model sets no limit on the rate along this weight",
}




def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    if args.plot not in (None, "-"):
        inputs = setup.input_files() + ([("the checkpoint", args.resume)] if args.resume else [])
        check_output(Path(args.plot), inputs, "text", "--plot")
    theta, rate, net = resumed_weights(setup, args.resume, args.rate, DEFAULT_RATE)
    index = weight_index(setup, args.weight)
    X, Y = sample_limit(setup, args.samples)
    result = cost_slice(net, theta, X, Y, index, rate, args.span, args.points)
    name = setup.network.layout.names[index]
    plot = render_plot(result, name, *args.size) if args.plot is not None else None
    if args.json:
        write_json(slice_document(setup, name, result, X.shape[0]))
    else:
        sys.stdout.write(report(setup, name, result, X.shape[0]))
    if plot is not None:
        inputs = [setup.path, Path(setup.data.source), args.resume]
        write_plot(args.plot, plot, json_output=args.json, inputs=inputs)
    return 0


# -- shared with stepper explain ---------------------------------------------------------------


def weight_index(setup: Setup, text: str) -> int:
    """Flat index of the weight called ``text``; UsageError naming what exists if there is none."""
    layout = setup.network.layout
    try:
        return layout.lookup(text)
    except KeyError:
        raise UsageError(f"no weight named {text!r} in {setup.path} ({unknown_name(layout, text)})") from None


# -- output ------------------------------------------------------------------------------------


def report(setup: Setup, name: str, s: CostSlice, n_samples: int) -> str:
    """The text report: the same figures as the JSON document."""
    low_w, low_c = s.lowest
    lines = [
        f"{name} in {setup.name}: every other weight held fixed, {n_samples} samples",
        "",
        f"value             {s.value:.6g}",
        f"cost              {s.cost:.10g}",
        f"analytic slope    {s.slope:.6e}   (the tangent's slope)",
        f"curvature         {s.curvature:.6e}   (numeric second derivative, step {s.curvature_step:.2g})",
        f"rate              {s.rate:g}",
        f"rate x curvature  {s.rate_curvature:.4g}   {_MEANING[s.regime]}",
    ]
    if s.curvature > 0:
        lines.append(f"best rate         {s.best_rate:.4g} (= 1 / curvature); above {2 * s.best_rate:.4g} "
                     "(= 2 / curvature) steps along this weight diverge")
    lines += [
        f"one step          {s.value:.6g} -> {s.landing:.6g}: cost {s.cost:.10g} -> {s.landing_cost:.10g} "
        f"(the quadratic model predicts {s.model_cost:.10g})",
        f"sweep             {s.points.size} points over [{s.points[0]:.6g}, {s.points[-1]:.6g}]; "
        f"lowest cost {low_c:.10g} at {low_w:.6g}",
        "",
        f"source: {SOURCE}",
        "",
    ]
    return "\n".join(lines)


def slice_document(setup: Setup, name: str, s: CostSlice, n_samples: int) -> dict[str, Any]:
    """The JSON form of a slice."""
    low_w, low_c = s.lowest
    return {
        **document_head(setup),
        "weight": name,
        "samples": n_samples,
        "value": s.value,
        "cost": s.cost,
        "slope": s.slope,
        "curvature": s.curvature,
        "curvature_step": s.curvature_step,
        "rate": s.rate,
        "rate_x_curvature": s.rate_curvature,
        "regime": s.regime,
        "best_rate": s.best_rate if math.isfinite(s.best_rate) else None,
        "step": {"to": s.landing, "cost": s.landing_cost, "model_cost": s.model_cost},
        "lowest": {"value": low_w, "cost": low_c},
        "sweep": {"values": s.points.tolist(), "costs": s.costs.tolist()},
        "source": SOURCE,
    }


def render_plot(s: CostSlice, name: str, width: int = PLOT_SIZE[0], height: int = PLOT_SIZE[1]) -> str:
    """The slice as plain text, ``width`` x ``height`` cells: a title, the plot and a line saying its glyphs.

    The plot is the app's slice plot (:func:`stepper.plots.slice_plot_text`):
    the cost curve ``*``, the tangent ``.``, the current point ``O`` and the
    step's landing ``X``, each with a glyph of its own.
    """
    from stepper.plots import slice_legend, slice_plot_text

    plot = slice_plot_text(s, width, height - 2).splitlines()
    lines = [f"cost along {name}".center(width), *plot, slice_legend(s.rate)[:width]]
    return "\n".join(line.ljust(width) for line in lines).rstrip()



