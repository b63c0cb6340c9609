"""The cost plot: training and validation cost per step, drawn by plotext inside a widget.

plotext draws into one module-wide figure, cleared and sized to the widget's
content area on every build (see :mod:`stepper.ui.plotwidget`); builds happen
only on the app's thread (in ``render_line``). A built plot is kept until the
data, the size or the scale change, so repaints cost nothing.

Training cost is drawn with ``*`` and validation cost with ``o``, so the two
read apart without colour (the marks get colours from the stylesheet, which
Textual drops under NO_COLOR); a vertical line marks the current step.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from numpy.typing import NDArray
from rich.segment import Segment
from rich.style import Style
from textual.reactive import reactive
from textual.strip import Strip

from stepper.ui.plotwidget import PlotWidget, plotext_figure
from stepper.ui.snapshot import Snapshot

Array = NDArray[np.float64]

TRAIN_MARK = "*"
VAL_MARK = "o"
#: At most this many points per curve and column of plot; longer histories are thinned.
POINTS_PER_COLUMN = 2


@dataclass(frozen=True)
class Curves:
    """What one plot shows.

    Attributes:
        steps: step numbers ``(n,)``.
        train: training cost ``(n,)``.
        val: validation cost ``(n,)``, NaN where there is none.
        current: the step to mark.
    """

    steps: NDArray[np.int64]
    train: Array
    val: Array
    current: int


def thin(n: int, limit: int) -> NDArray[np.int64]:
    """Indices of at most ``limit`` points out of ``n``, evenly spread, always keeping the last."""
    if n <= limit:
        return np.arange(n, dtype=np.int64)
    return np.unique(np.linspace(0, n - 1, max(limit, 2)).round().astype(np.int64))


def cost_range(curves: Curves) -> tuple[float, float]:
    """Smallest and largest finite cost shown (0, 0 when there is none)."""
    values = np.concatenate([curves.train, curves.val])
    values = values[np.isfinite(values)]
    if values.size == 0:
        return 0.0, 0.0
    return float(values.min()), float(values.max())


def log_possible(curves: Curves) -> bool:
    """A log axis needs positive costs that are not all equal."""
    lo, hi = cost_range(curves)
    return lo > 0.0 and hi > lo * (1.0 + 1e-9)


def build_plot(curves: Curves, width: int, height: int, log: bool) -> str:
    """The plot as plain text, ``width`` x ``height`` cells.

    ``log`` asks for a logarithmic y axis; it is used only where
    :func:`log_possible` allows it.
    """
    fig = plotext_figure(width, height)
    keep = thin(curves.steps.size, max(2, POINTS_PER_COLUMN * width))
    x = curves.steps[keep].astype(np.float64)
    series = [(curves.train[keep], TRAIN_MARK), (curves.val[keep], VAL_MARK)]
    lo, hi = cost_range(curves)
    use_log = log and log_possible(curves)
    for y, mark in series:
        ok = np.isfinite(y)
        if not ok.any():
            continue
        signal = fig.signal(x[ok].tolist(), y[ok].tolist(), marker=mark)
        signal.lines()
        fig.draw(signal)
    fig.line(float(curves.current), orientation="v")
    if use_log:
        fig.ruler("y").scale("log")
    else:
        pad = 0.05 * (hi - lo) if hi > lo else max(abs(hi) * 0.1, 1e-12)
        # Costs are never negative here; keep the axis from showing negative values for them.
        bottom = max(lo - pad, 0.0) if lo >= 0.0 else lo - pad
        fig.ruler("y").lim(bottom, hi + pad)
    first = int(min(curves.steps[0], curves.current)) if curves.steps.size else 0
    last = int(max(curves.steps[-1], curves.current)) if curves.steps.size else 0
    if last == first:
        last = first + 1
    fig.ruler("x").lim(first, last)
    spacing = max(1, math.ceil((last - first) / max(1, min(5, width // 10))))
    ticks = np.arange(first, last + 1, spacing)
    fig.ruler("x").ticks([float(t) for t in ticks], [str(int(t)) for t in ticks])
    return str(fig.build().string(colorless=True))


class CostPlot(PlotWidget):
    """Training and validation cost per step; the app feeds it snapshots.

    A line-API widget: plotext builds plain text once per change of data, size or
    scale, and each line becomes a strip whose curve marks get their own style.
    """

    COMPONENT_CLASSES: ClassVar[set[str]] = {"costplot--train", "costplot--val"}

    DEFAULT_CSS = """
    CostPlot {
        height: 1fr;
        min-height: 6;
    }
    CostPlot > .costplot--train { color: $primary; text-style: bold; }
    CostPlot > .costplot--val { color: $warning; }
    """

    MIN_WIDTH = 12
    MIN_HEIGHT = 4

    log_scale: reactive[bool] = reactive(False)

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self.curves: Curves | None = None

    def show(self, snap: Snapshot) -> None:
        """Plot the cost history of ``snap``."""
        self.curves = Curves(snap.steps, snap.train, snap.val, snap.step_count)
        self._set_title()
        self.replot()

    @property
    def is_log(self) -> bool:
        """The y axis is drawn logarithmic."""
        return self.log_scale and self.curves is not None and log_possible(self.curves)

    def watch_log_scale(self, value: bool) -> None:
        self._set_title()
        self.replot()

    def has_data(self) -> bool:
        return self.curves is not None

    def key_extras(self) -> tuple[Any, ...]:
        return (self.log_scale,)

    def build_strips(self, width: int, height: int, base: Style) -> list[Strip]:
        assert self.curves is not None
        text = build_plot(self.curves, width, height, self.log_scale)
        marks = {
            TRAIN_MARK: base + self.get_component_rich_style("costplot--train"),
            VAL_MARK: base + self.get_component_rich_style("costplot--val"),
        }
        strips = []
        for line in text.splitlines()[:height]:
            segments = []
            at = 0
            for run in _MARK_RUNS.finditer(line):
                if run.start() > at:
                    segments.append(Segment(line[at : run.start()], base))
                segments.append(Segment(run.group(), marks[run.group()[0]]))
                at = run.end()
            if at < len(line):
                segments.append(Segment(line[at:], base))
            strips.append(Strip(segments).adjust_cell_length(width, base))
        return strips

    def _set_title(self) -> None:
        scale = "log" if self.is_log else "linear"
        if self.log_scale and not self.is_log:
            scale = "linear (log needs positive, varying costs)"
        step = "" if self.curves is None else f" | step {self.curves.current}"
        self.border_title = f"cost  {TRAIN_MARK} train  {VAL_MARK} validation{step} | {scale}"


#: Runs of one curve mark inside a plot line.
_MARK_RUNS = re.compile(rf"{re.escape(TRAIN_MARK)}+|{re.escape(VAL_MARK)}+")
