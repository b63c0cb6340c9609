"""``stepper slice``: the cost along one weight, its tangent, curvature and what they say about the rate."""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np

from stepper.commands.common import (
    add_model_argument,
    add_resume_option,
    add_samples_option,
    load,
    positive_float,
    positive_int,
    resumed_weights,
    sample_limit,
    write_plot,
)
from stepper.core.nearest import unknown_name
from stepper.core.slice import DEFAULT_POINTS, CostSlice, cost_slice
from stepper.errors import UsageError
from stepper.formats.model_file import Setup
from stepper.formats.outputs import check_output

#: Rate used when neither --rate nor a checkpoint gives one (common practice, no published source).
DEFAULT_RATE = 0.1
PLOT_SIZE = (76, 24)
#: Largest plot drawn: far wider than any terminal, and a few seconds at most
#: (plotext took 86 s and 15 GB for 5000x5000 and aborted at 100000x100000).
MAX_PLOT_SIZE = (1000, 400)

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


def add_parser(subs: Any) -> None:
    p = subs.add_parser(
        "slice",
        help="sweep one weight with the others fixed: cost, tangent, curvature, and the rate it allows",
        description="Hold every other weight fixed and sweep one weight around its value. Prints the "
        "cost, the analytic slope (the tangent), the curvature (a numeric second derivative) and what "
        "rate x curvature implies for plain gradient descent; --plot writes the picture as text.",
    )
    add_model_argument(p)
    p.add_argument("weight", help="the weight's name, e.g. L1.W[0,2] or L2.b[0]")
    p.add_argument("--rate", type=positive_float, default=None, metavar="R",
                   help=f"descent rate for the step and the verdict (default {DEFAULT_RATE}, "
                   "or the checkpoint's)")
    p.add_argument("--span", type=positive_float, default=None, metavar="S",
                   help="sweep the weight over value +- S (default: max(1, |value|, 1.5 |rate x slope|))")
    p.add_argument("--points", type=_at_least_two, default=DEFAULT_POINTS, metavar="N",
                   help=f"number of sweep points (default {DEFAULT_POINTS})")
    add_samples_option(p)
    add_resume_option(p, help="take the weights (and rate) from a checkpoint instead of the model's start")
    p.add_argument("--plot", default=None, metavar="FILE",
                   help="write the plot as plain text to FILE ('-' for standard output)")
    p.add_argument("--size", type=_size, default=PLOT_SIZE, metavar="WxH",
                   help=f"plot size in characters (default {PLOT_SIZE[0]}x{PLOT_SIZE[1]})")
    p.add_argument("--json", action="store_true", help="print one JSON document instead of text")
    p.set_defaults(handler=handle)


def handle(args: argparse.Namespace) -> int:
    setup = load(args)
    if args.plot not in (None, "-"):
        inputs = setup.input_files() + ([("the checkpoint", args.resume)] if args.resume else [])
        check_output(Path(args.plot), inputs, "text", "--plot")
    theta, rate = resumed_weights(setup, args.resume, args.rate, DEFAULT_RATE)
    index = weight_index(setup, args.weight)
    X, Y = sample_limit(setup, args.samples)
    result = cost_slice(setup.network, theta, X, Y, index, rate, args.span, args.points)
    name = setup.network.layout.names[index]
    plot = render_plot(result, name, *args.size) if args.plot is not None else None
    if args.json:
        json.dump(slice_document(setup, name, result, X.shape[0]), sys.stdout, indent=1)
        sys.stdout.write("\n")
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
        "model": {"name": setup.name, "file": str(setup.path)},
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


def _at_least_two(text: str) -> int:
    value = positive_int(text)
    if value < 2:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 2")
    return value


def _size(text: str) -> tuple[int, int]:
    parts = text.lower().split("x")
    try:
        width, height = (int(p) for p in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a size like 76x24") from None
    if width < 30 or height < 10:
        raise argparse.ArgumentTypeError(f"{text!r} is too small (at least 30x10)")
    if width > MAX_PLOT_SIZE[0] or height > MAX_PLOT_SIZE[1]:
        raise argparse.ArgumentTypeError(
            f"{text!r} is too large (at most {MAX_PLOT_SIZE[0]}x{MAX_PLOT_SIZE[1]} characters)")
    return width, height
