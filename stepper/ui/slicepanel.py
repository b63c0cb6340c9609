"""The slice panel: the cost along the selected weight, with every other weight held fixed.

Left, the plot of :func:`stepper.plots.slice_plot_text`: the swept cost
(``*``), the tangent whose slope is the analytic slope (``.``), the current
point (``O``) and where one plain step at the current rate lands (``X``);
right, the figures: slope, curvature,
``rate x curvature`` and what it means for the rate, the step, the span.

The numbers come from :func:`stepper.core.slice.cost_slice` through
:class:`stepper.ui.insight.Figures`. plotext draws into one module-wide figure,
so the plot is built only in ``render_line``, on the app's thread (as the cost
plot is), sized to the widget's content area each time that size changes.
"""

from __future__ import annotations

import re
import textwrap
from typing import ClassVar

from rich.segment import Segment
from rich.style import Style
from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.strip import Strip
from textual.widgets import Static

from stepper.plots import COST_MARK, NOW_MARK, STEP_MARK, TANGENT_MARK, slice_plot_text
from stepper.ui.insight import SliceFigures
from stepper.ui.plotwidget import PlotWidget

#: Where the verdict on ``rate x curvature`` comes from, short beside the verdict (the help
#: screen names it in full, as stepper.core.slice does).
SHORT_SOURCE = "LeCun et al. 1998"

#: One line per regime of :attr:`CostSlice.regime`: what ``rate x curvature`` says about one step.
MEANING = {
    "short": "below 1: one step stops short of the minimum",
    "at the minimum": "about 1: one step lands at the minimum",
    "overshoots": "over 1: one step overshoots; steps oscillate",
    "diverges": "over 2: steps along this weight diverge",
    "no minimum": "curvature <= 0: no minimum, no limit on the rate",
}


def slice_lines(figures: SliceFigures, width: int = 37) -> list[str]:
    """The figures beside the plot, one string per line, wrapped at ``width``.

    Nine lines at most at 37 columns, the room beside the plot at 80x24 (the cost
    at the current point is the status line's ``train``, so it is not repeated).
    """
    s = figures.result
    lines = [
        f"slope     {s.slope: .4e} (tangent)",
        f"curvature {s.curvature: .4e}",
        f"rate x curv. {s.rate_curvature:.3g}: {s.regime.upper()}",
        f"  {MEANING[s.regime]} ({SHORT_SOURCE})",
    ]
    if s.curvature > 0:
        lines.append(f"best rate 1/curv. {s.best_rate:.3g}, limit {2 * s.best_rate:.3g}")
    beyond = "" if s.points[0] <= s.landing <= s.points[-1] else " (beyond the span)"
    lines.append(f"one step {s.value:.4g} -> {s.landing:.4g}{beyond}")
    lines.append(f"  cost {s.landing_cost:.6g} (quadratic {s.model_cost:.4g})")
    lines.append(f"span +-{figures.span:.3g} {'automatic' if figures.automatic else 'set'}: < > T")
    return [piece for line in lines for piece in textwrap.wrap(line, width, subsequent_indent="  ")]


class SlicePlot(PlotWidget):
    """The plotext plot of one :class:`SliceFigures`; rebuilt when the figures or the size change."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {"sliceplot--cost", "sliceplot--tangent", "sliceplot--point"}

    DEFAULT_CSS = """
    SlicePlot {
        width: 1fr;
        height: 1fr;
    }
    SlicePlot > .sliceplot--cost { color: $primary; text-style: bold; }
    SlicePlot > .sliceplot--tangent { color: $warning; }
    SlicePlot > .sliceplot--point { color: $error; text-style: bold; }
    """

    MIN_WIDTH = 16
    MIN_HEIGHT = 5

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self.figures: SliceFigures | None = None

    def show(self, figures: SliceFigures | None) -> None:
        self.figures = figures
        self.replot()

    def has_data(self) -> bool:
        return self.figures is not None

    def build_strips(self, width: int, height: int, base: Style) -> list[Strip]:
        assert self.figures is not None
        text = slice_plot_text(self.figures.result, width, height)
        styles = {
            COST_MARK: base + self.get_component_rich_style("sliceplot--cost"),
            TANGENT_MARK: base + self.get_component_rich_style("sliceplot--tangent"),
            NOW_MARK: base + self.get_component_rich_style("sliceplot--point"),
            STEP_MARK: base + self.get_component_rich_style("sliceplot--point"),
        }
        strips = []
        for line in text.splitlines()[:height]:
            segments = [Segment(part, styles.get(part[0], base)) for part in _canvas_runs(line)]
            strips.append(Strip(segments).adjust_cell_length(width, base))
        return strips


#: Runs of one mark.
_MARKS = re.compile(r"\*+|\.+|O+|X+")


def _canvas_runs(line: str) -> list[str]:
    """``line`` cut into pieces, each mark run inside the plot's frame a piece of its own.

    Only the canvas, between the frame's left and right edges, holds marks: the
    tick labels outside it have digits and decimal points that are not marks.
    """
    left = min((i for i in (line.find("\u2524"), line.find("\u2502")) if i >= 0), default=-1)
    right = line.rfind("\u2502")
    if not 0 <= left < right:
        return [line] if line else []
    pieces = [line[: left + 1]]
    inside = line[left + 1 : right]
    at = 0
    for run in _MARKS.finditer(inside):
        if run.start() > at:
            pieces.append(inside[at : run.start()])
        pieces.append(run.group())
        at = run.end()
    if at < len(inside):
        pieces.append(inside[at:])
    pieces.append(line[right:])
    return pieces


class SlicePanel(Horizontal):
    """The plot and the figures of the cost along the selected weight; the app feeds it."""

    DEFAULT_CSS = """
    SlicePanel #slice-figures {
        width: 38;
        height: 1fr;
        padding: 0 0 0 1;
    }
    """

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self._figures: SliceFigures | None = None

    def compose(self) -> ComposeResult:
        yield SlicePlot(id="slice-plot")
        yield Static("", id="slice-figures")

    def on_resize(self) -> None:
        self._draw_figures()

    def _draw_figures(self) -> None:
        if self._figures is not None:
            box = self.query_one("#slice-figures", Static)
            lines = slice_lines(self._figures, box.content_size.width or 37)
            # The box has a fixed size: no layout pass (which would redraw the whole screen).
            box.update(Text("\n".join(lines), no_wrap=True, overflow="ellipsis"), layout=False)

    def show(self, figures: SliceFigures) -> None:
        """Draw ``figures``."""
        self.border_title = (f"cost along {figures.name} = {figures.result.value:.4g}  {COST_MARK} cost  "
                             f"{TANGENT_MARK} tangent  {NOW_MARK} now  {STEP_MARK} one step")
        self.query_one(SlicePlot).show(figures)
        self._figures = figures
        self._draw_figures()

    def show_note(self, title: str, note: str) -> None:
        """No plot: ``note`` says why (no weight selected, the layer's code raised, ...)."""
        self.border_title = title
        self._figures = None
        self.query_one(SlicePlot).show(None)
        self.query_one("#slice-figures", Static).update(Text(note), layout=False)

    @property
    def figures_text(self) -> str:
        """The figures as shown (for tests and the log)."""
        return str(self.query_one("#slice-figures", Static).content)
