"""The health panel: per layer, sizes of weights and slopes, the step's relative size, idle units.

One row per layer, from :func:`stepper.core.health.layer_health` at the
current weights and rate: the norms of the weights and of their slopes, the
update-to-weight ratio one plain step would make (the common-practice range
1e-4 to 1e-2 is named, and drawn on a log scale where the panel is wide enough), the
saturated or dead units, and how the error signal changes from each layer to
the next on the way back. Below: the unit (or convolution channel) the selected
weight feeds, with its own figures; the dead and saturated units by number; the trend over the whole network and, for
custom layers, how their backward pass's input slopes compared with numeric
ones at the last numeric pass (``#``). Text only, so it reads without colour.
"""

from __future__ import annotations

import math
import textwrap

from stepper.core.health import RATIO_HIGH, RATIO_LOW, RATIO_TYPICAL, LayerHealth
from stepper.health_text import idle_lines, unit_summary
from stepper.ui.insight import HealthFigures
from stepper.ui.panels import FiguresPanel

#: The gauge spans 1e-6 to 1 in two cells per decade.
GAUGE_FROM, GAUGE_DECADES, GAUGE_CELLS = -6, 6, 2


def gauge(ratio: float) -> str:
    """The ratio on a log scale from 1e-6 to 1: ``[`` and ``]`` mark 1e-4 and 1e-2, ``*`` the ratio.

    ``<`` or ``>`` at an end when the ratio is off the scale; blank when it is not defined.
    """
    size = GAUGE_DECADES * GAUGE_CELLS + 1
    cells = ["."] * size
    cells[round((math.log10(RATIO_LOW) - GAUGE_FROM) * GAUGE_CELLS)] = "["
    cells[round((math.log10(RATIO_HIGH) - GAUGE_FROM) * GAUGE_CELLS)] = "]"
    if not (math.isfinite(ratio) and ratio > 0):
        return " " * size
    at = round((math.log10(ratio) - GAUGE_FROM) * GAUGE_CELLS)
    if at < 0:
        cells[0] = "<"
    elif at >= size:
        cells[-1] = ">"
    else:
        cells[at] = "*"
    return "".join(cells)


def _units(e: LayerHealth) -> str:
    if e.saturation is not None:
        return f"{e.saturated_units.size}/{e.saturation.size} sat"
    if e.active is not None:
        return f"{e.dead_units.size}/{e.active.size} dead"
    return "-"


def _exp(value: float) -> str:
    """``1e-4`` rather than ``1e-04``."""
    mantissa, exponent = f"{value:.0e}".split("e")
    return f"{mantissa}e{int(exponent)}"


def health_table(f: HealthFigures, wide: bool, rms: bool | None = None) -> list[str]:
    """The header and one row per layer; ``wide`` adds the ratio gauge, ``rms`` (as ``wide`` unless
    given) the error signal's size."""
    rms = wide if rms is None else rms
    type_width = max(8, *(len(k) for k in f.kinds))
    head = f"{'':<4}{'layer':<{type_width}} {'|weights|':>10} {'|slopes|':>10}  {'update/weight':<16}"
    if wide:
        head += f"{'[ ] ' + _exp(RATIO_LOW) + '..' + _exp(RATIO_HIGH):<15}"
    head += f"{'units':<10}{'vs next':>8}"
    if rms:
        head += f"{'error rms':>10}"
    lines = [head.rstrip()]
    for e, kind in zip(f.report.layers, f.kinds):
        ratio = "-" if not e.ratio_verdict else f"{e.update_ratio:.1e} {e.ratio_verdict}"
        back = "-" if e.signal_change != e.signal_change else f"{e.signal_change:.2g}x"
        row = (f"{'L' + str(e.index + 1):<4}{kind:<{type_width}} {e.weight_norm:>10.3e} {e.slope_norm:>10.3e}  "
               f"{ratio:<16}")
        if wide:
            row += f"{gauge(e.update_ratio):<15}"
        row += f"{_units(e):<10}{back:>8}"
        if rms:
            row += f"{e.signal_rms:>10.2e}"
        lines.append(row.rstrip())
    return lines


def health_lines(f: HealthFigures, width: int) -> list[str]:
    """The panel's text for a content ``width``: the gauge and the error rms when they fit."""
    for wide, rms in ((True, True), (True, False), (False, False)):
        lines = health_table(f, wide, rms)
        if max(len(line) for line in lines) <= width:
            break
    r = f.report
    wrap = max(width, 40)
    if f.focus is not None:
        name, unit = f.focus
        lines += textwrap.wrap(f"{name} feeds L{unit.layer + 1} {unit_summary(unit)}", wrap, subsequent_indent="  ")
    for line in idle_lines(r):
        lines += textwrap.wrap(line, wrap, subsequent_indent="  ")
    if r.trend in ("single layer", "no signal"):
        trend = f"slopes on the way back: {r.trend}"
    else:
        trend = (f"slopes on the way back: {r.trend} (layer 1's error signal is {r.travel:.2g}x "
                 f"layer {len(r.layers)}'s; vs next: each layer's error signal over the next one's)")
    lines += textwrap.wrap(trend, wrap, subsequent_indent="  ")
    lines += textwrap.wrap(f"update/weight: one plain step at rate {r.rate:g}; {_exp(RATIO_LOW)} to "
                           f"{_exp(RATIO_HIGH)} (around {_exp(RATIO_TYPICAL)}) is common practice, no published "
                           "source; sat: saturated on 90% of the samples", wrap, subsequent_indent="  ")
    for line in _input_lines(f):
        lines += textwrap.wrap(line, wrap, subsequent_indent="  ")
    return lines


def _input_lines(f: HealthFigures) -> list[str]:
    if not f.custom:
        return []
    if f.inputs is None:
        return [f"custom layer{'s' if len(f.custom) > 1 else ''} "
                f"{', '.join('L' + str(i + 1) for i in f.custom)}: input slopes (dX) not checked yet (# checks)"]
    stale = " (weights changed since; # again)" if f.inputs_stale else ""
    out = []
    for c in f.inputs:
        counts = c.counts
        verdict = "agree" if c.passed else "disagree"
        out.append(f"L{c.layer + 1} {f.kinds[c.layer]} input slopes (dX): {verdict}: {counts['agree']} agree "
                   f"{counts['doubtful']} doubtful {counts['disagree']} disagree {counts['kink']} kink on "
                   f"{c.samples.size} samples, worst {c.worst_error:.1e}{stale}")
    return out


class HealthPanel(FiguresPanel[HealthFigures]):
    """Layer health; the app feeds it after every change of the weights or the rate."""

    def figures_title(self, figures: HealthFigures) -> str:
        return f"layer health at rate {figures.report.rate:g}"

    def figures_lines(self, figures: HealthFigures, width: int) -> list[str]:
        return health_lines(figures, width)
