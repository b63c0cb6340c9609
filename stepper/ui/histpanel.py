"""The histogram panel: how one layer's weights, slopes, last updates or activations are spread.

The layer is the selected weight's; ``;`` cycles what is counted. The counts
come from :func:`stepper.core.histograms.layer_spreads` through the session
(:meth:`~stepper.session.Session.spreads`), the bars from
:func:`stepper.charts.draw_histogram`; a line under the plot gives the mean,
the spread and how many values are exactly zero or not finite.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Static

from stepper.charts import draw_histogram
from stepper.core.histograms import QUANTITIES, Histogram
from stepper.ui.chartplot import ChartPlot

#: What each quantity counts, in the panel's words.
MEANING = {
    "weights": "the layer's weights (not its biases)",
    "slopes": "the slopes of those weights (L2 term included)",
    "updates": "the change the last step made to them",
    "activations": "the layer's outputs over the training rows",
}


@dataclass(frozen=True)
class HistFigures:
    """One histogram to show.

    Attributes:
        layer: 0-based layer index; label: the layer's label.
        quantity: one of :data:`QUANTITIES`.
        hist: the counts.
        version: the weights' version it was counted at (with the quantity and layer, the plot's key).
    """

    layer: int
    label: str
    quantity: str
    hist: Histogram
    version: int


def summary(f: HistFigures) -> str:
    """The line under the plot."""
    h = f.hist
    if h.n == 0:
        if f.quantity == "updates":
            return "no last update: no step since the start, a load, or an undo or redo of the weights"
        return "nothing to count"
    extra = f", {h.nonfinite} not finite" if h.nonfinite else ""
    return (f"{h.n} values from {h.edges[0]:.3g} to {h.edges[-1]:.3g}: mean {h.mean:.3g}, spread (std) "
            f"{h.std:.3g}, exactly 0: {h.zeros}{extra}")


class HistogramPanel(Vertical):
    """The plot and its summary line; the app feeds it."""

    DEFAULT_CSS = """
    HistogramPanel #hist-summary {
        height: 1;
        padding: 0 1;
        text-wrap: nowrap;
        text-overflow: ellipsis;
    }
    """

    def compose(self) -> ComposeResult:
        yield ChartPlot(id="hist-plot")
        yield Static("", id="hist-summary")

    def show(self, f: HistFigures) -> None:
        others = " ".join(q if q != f.quantity else q.upper() for q in QUANTITIES)
        self.border_title = f"L{f.layer + 1} {f.label}: {others} | ; next"

        def draw(fig: Any) -> None:
            draw_histogram(fig, f.hist, MEANING[f.quantity])

        self.query_one(ChartPlot).show(draw, (f.version, f.layer, f.quantity, f.hist.n, f.hist.nonfinite))
        self.query_one("#hist-summary", Static).update(Text(summary(f), no_wrap=True, overflow="ellipsis"),
                                                       layout=False)

    def show_note(self, title: str, note: str) -> None:
        self.border_title = title
        self.query_one(ChartPlot).show(None, None)
        self.query_one("#hist-summary", Static).update(Text(note, no_wrap=True, overflow="ellipsis"), layout=False)

    @property
    def summary_text(self) -> str:
        return str(self.query_one("#hist-summary", Static).content)
