"""Plots as plain text, drawn by plotext: shared by the app's panels and ``stepper slice --plot``.

Every plot is built on :func:`plotext_figure` (:func:`stepper.charts.figure`),
which clears plotext's one module-wide figure and sizes it to the cells asked
for (not to the terminal it finds on stdout). plotext is not thread-safe: build on one thread only (the app
builds in ``render_line``, on its own thread).

Axis labels are short (:func:`short_number`: ``1.34e60``, never fifty digits),
and each curve has a glyph of its own, so a plot reads without colour.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from stepper.charts import figure
from stepper.core.slice import CostSlice

#: Glyphs of the slice: the swept cost, its tangent, the current point, where one step lands.
COST_MARK = "*"
TANGENT_MARK = "."
NOW_MARK = "O"
STEP_MARK = "X"


def plotext_figure(width: int, height: int) -> Any:
    """plotext's figure (:func:`stepper.charts.figure`), without legend: the glyphs say it in titles."""
    fig: Any = figure(width, height)
    fig.legend(False)
    return fig


def short_number(value: float, digits: int = 3) -> str:
    """``value`` in at most ``digits`` significant digits, exponents without ``+`` or leading zeros.

    ``1.342e+60`` -> ``1.34e60``, ``1e-05`` -> ``1e-5``, ``0.25`` -> ``0.25``.
    """
    text = f"{value:.{digits}g}"
    if "e" in text:
        mantissa, exponent = text.split("e")
        text = f"{mantissa}e{int(exponent)}"
    return text


def tick_labels(ticks: Sequence[float], least: int = 3) -> list[str]:
    """Labels with the fewest significant digits (``least`` or more) that tell every tick apart."""
    labels = [short_number(t, least) for t in ticks]
    for digits in range(least, 16):
        labels = [short_number(t, digits) for t in ticks]
        if len(set(labels)) == len(labels):
            break
    return labels


def even_ticks(low: float, high: float, n: int) -> list[float]:
    """``n`` ticks from ``low`` to ``high``, both ends included."""
    return [float(t) for t in np.linspace(low, high, max(n, 2))]


def whole_ticks(first: int, last: int, most: int) -> list[int]:
    """At most ``most`` whole-number ticks from ``first`` to ``last``, evenly spaced, the last always shown."""
    span = last - first
    if span <= 0:
        return [first]
    spacing = max(1, math.ceil(span / max(most - 1, 1)))
    ticks = list(range(first, last + 1, spacing))
    if ticks[-1] != last:
        if last - ticks[-1] < spacing / 2 and len(ticks) > 1:
            ticks[-1] = last  # too close to the one before: the last takes its place
        else:
            ticks.append(last)
    return ticks


def slice_plot_text(result: CostSlice, width: int, height: int) -> str:
    """The slice as plain text, ``width`` x ``height`` cells: cost ``*``, tangent ``.``, now ``O``, step ``X``.

    The tangent is drawn only where it stays inside the cost curve's range, so a
    steep tangent does not flatten the curve. The axes always reach where one
    step lands, so its ``X`` is always on the plot; a step too small to leave the
    current point's cell puts its ``X`` in the next cell the step's way, so both
    marks show.
    """
    fig = plotext_figure(width, height)
    costs = result.costs
    finite = np.isfinite(costs)
    lo = float(np.min(costs[finite])) if finite.any() else 0.0
    hi = float(np.max(costs[finite])) if finite.any() else 1.0
    pad = 0.05 * (hi - lo) if hi > lo else max(abs(hi), 1.0) * 1e-3
    # The tangent first: where it runs along the curve the curve shows, where it parts the tangent does.
    keep = np.isfinite(result.tangent) & (result.tangent >= lo - pad) & (result.tangent <= hi + pad)
    if np.count_nonzero(keep) >= 2:
        tangent = fig.signal(result.points[keep].tolist(), result.tangent[keep].tolist(), marker=TANGENT_MARK)
        tangent.lines()
        fig.draw(tangent)
    if np.count_nonzero(finite) >= 2:
        curve = fig.signal(result.points[finite].tolist(), costs[finite].tolist(), marker=COST_MARK)
        curve.lines()
        fig.draw(curve)
    first, last = float(result.points[0]), float(result.points[-1])
    bottom, top = lo - pad, hi + pad
    landing = math.isfinite(result.landing) and math.isfinite(result.landing_cost)
    if landing:
        first, last = min(first, result.landing), max(last, result.landing)
        bottom, top = min(bottom, result.landing_cost), max(top, result.landing_cost)
        fig.draw(fig.signal([result.landing], [result.landing_cost], marker=STEP_MARK))
    fig.draw(fig.signal([result.value], [result.cost], marker=NOW_MARK))
    if top <= bottom:
        top = bottom + 1.0
    fig.ruler("y").lim(bottom, top)
    y_ticks = even_ticks(bottom, top, 3 if height < 12 else 5)
    fig.ruler("y").ticks(y_ticks, tick_labels(y_ticks))
    fig.ruler("x").lim(first, last)
    x_ticks = even_ticks(first, last, 3 if width < 50 else 5)
    fig.ruler("x").ticks(x_ticks, tick_labels(x_ticks))
    text = str(fig.build().string(colorless=True))
    if landing and STEP_MARK not in text:
        text = _beside(text, NOW_MARK, STEP_MARK, -1 if result.landing < result.value else 1)
    return text


#: Characters of a plot's frame and axes, which a mark never replaces.
_FRAME = set("\u2502\u2524\u251c\u2500\u250c\u2510\u2514\u2518\u252c\u2534\u253c")


def _beside(text: str, anchor: str, mark: str, direction: int) -> str:
    """``text`` with ``mark`` in the cell next to ``anchor``, ``direction`` (-1 left, 1 right) first."""
    lines = text.split("\n")
    for row, line in enumerate(lines):
        col = line.find(anchor)
        if col < 0:
            continue
        for at in (col + direction, col - direction):
            if 0 <= at < len(line) and line[at] not in _FRAME:
                lines[row] = line[:at] + mark + line[at + 1 :]
                return "\n".join(lines)
    return text


def slice_legend(rate: float) -> str:
    """What the slice's glyphs mean."""
    return (f"{COST_MARK} cost   {TANGENT_MARK} tangent (analytic slope)   {NOW_MARK} now   "
            f"{STEP_MARK} one step at rate {rate:g}")
