"""The cost plot: training and validation cost per step, drawn by plotext inside a widget.

plotext draws into one module-wide figure, cleared and sized to the widget's
content area on every build (see :mod:`stepper.ui.plotwidget`); builds happen
only on the app's thread (in ``render_line``). A built plot is kept until the
data, the size or the scale change, so repaints cost nothing.

Training cost is drawn with ``*`` and validation cost with ``o``, so the two
read apart without colour (the marks get colours from the stylesheet, which
are dropped under NO_COLOR), joined by dotted lines; a vertical line marks the
current step. Axis labels are short, on a log axis too.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from numpy.typing import NDArray
from rich.segment import Segment
from rich.style import Style
from textual.reactive import reactive
from textual.strip import Strip

from stepper.plots import even_ticks, plotext_figure, tick_labels, whole_ticks
from stepper.ui.panels import fit_title
from stepper.ui.plotwidget import PlotWidget
from stepper.ui.snapshot import Snapshot

Array = NDArray[np.float64]

TRAIN_MARK = "*"
VAL_MARK = "o"
#: The dotted line between two marks of a curve.
LINE_MARK = "\u00b7"
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

    Each cost is a mark at its step (train ``*`` drawn over validation ``o``),
    joined to the next by a dotted line, so two steps draw two marks. ``log``
    asks for a logarithmic y axis (plotted as log10 of the cost, labelled with
    the cost itself); it is used only where :func:`log_possible` allows it.
    """
    fig = plotext_figure(width, height)
    keep = thin(curves.steps.size, max(2, POINTS_PER_COLUMN * width))
    x = curves.steps[keep].astype(np.float64)
    use_log = log and log_possible(curves)
    series = [(curves.val[keep], VAL_MARK), (curves.train[keep], TRAIN_MARK)]
    if use_log:
        with np.errstate(divide="ignore", invalid="ignore"):
            series = [(np.log10(y), mark) for y, mark in series]
    shown = [(y, np.isfinite(y), mark) for y, mark in series]
    # Dots between marks only where marks stand apart: a dense curve is a line of marks already.
    sparse = x.size < width // 2
    for y, ok, _ in shown:
        if sparse and np.count_nonzero(ok) >= 2:
            line = fig.signal(x[ok].tolist(), y[ok].tolist(), marker=LINE_MARK)
            line.lines()
            fig.draw(line)
    for y, ok, mark in shown:
        if ok.any():
            fig.draw(fig.signal(x[ok].tolist(), y[ok].tolist(), marker=mark))
    fig.line(float(curves.current), orientation="v")
    values = np.concatenate([y[ok] for y, ok, _ in shown])
    lo, hi = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
    pad = 0.05 * (hi - lo) if hi > lo else max(abs(hi) * 0.1, 1e-12)
    # Costs are never negative: keep a linear axis from showing negative values for them.
    bottom = lo - pad if use_log or lo < 0.0 else max(lo - pad, 0.0)
    top = hi + pad
    fig.ruler("y").lim(bottom, top)
    ticks = even_ticks(bottom, top, 3 if height < 10 else 5)
    labels = tick_labels([10.0**t for t in ticks] if use_log else ticks)
    fig.ruler("y").ticks(ticks, labels)
    first = int(min(curves.steps[0], curves.current)) if curves.steps.size else 0
    last = int(max(curves.steps[-1], curves.current)) if curves.steps.size else 0
    if last == first:
        last = first + 1
    fig.ruler("x").lim(first, last)
    x_ticks = whole_ticks(first, last, max(2, min(6, width // 10)))
    fig.ruler("x").ticks([float(t) for t in x_ticks], [str(t) for t in x_ticks])
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

    def on_resize(self) -> None:
        self._set_title()

    def _set_title(self) -> None:
        """The title, as full as the width allows: what the marks mean, the step, the scale."""
        scale = "log" if self.is_log else "linear"
        refused = self.log_scale and not self.is_log
        step = "" if self.curves is None else f" | step {self.curves.current}"
        variants = [
            f"cost  {TRAIN_MARK} train  {VAL_MARK} validation{step} | {scale}"
            + (" (log needs positive, varying costs)" if refused else ""),
            f"cost  {TRAIN_MARK} train  {VAL_MARK} validation{step} | {scale}",
            f"{TRAIN_MARK} train {VAL_MARK} val.{step} | {scale}",
            f"{TRAIN_MARK} train {VAL_MARK} val.{step}",
            step.removeprefix(" | ") or "cost",
        ]
        self.border_title = fit_title(variants, self.size.width or 80)


#: Runs of one curve mark inside a plot line.
_MARK_RUNS = re.compile(rf"{re.escape(TRAIN_MARK)}+|{re.escape(VAL_MARK)}+")
