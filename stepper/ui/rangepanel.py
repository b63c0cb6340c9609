"""The range-test panel: the cost each rate reached after k steps, on a log axis, the lowest marked.

The test itself runs as a job (``E``, with progress and ``x`` to cancel) on the
session (:meth:`~stepper.session.Session.iter_range_test`), which changes
nothing; ``B`` adopts the lowest rate. The plot is :func:`stepper.charts.draw_range`;
below it, one line names the lowest rate and its costs, and whether the state
has moved since the test.
"""

from __future__ import annotations

from typing import Any

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Static

from stepper.charts import draw_range
from stepper.core.ratetest import RangeResult
from stepper.training_report import number
from stepper.ui.chartplot import ChartPlot


def range_summary(result: RangeResult, stale: bool) -> str:
    """The lowest rate and its costs, what B does, and a note when the state moved since."""
    best = result.best
    diverged = sum(d is not None for d in result.diverged_at)
    tail = f"; {diverged} diverged" if diverged else ""
    if best is None:
        line = f"every rate diverged{tail}: E again with lower rates"
    else:
        val = "" if result.val is None else f", validation {number(float(result.val[best]), 5)}"
        line = (f"lowest: rate {result.rates[best]:.3g} -> train {number(float(result.train[best]), 5)}{val} "
                f"(from {number(result.start_cost, 5)}){tail} | B adopts it")
        if result.rates.size > 1 and best in (0, result.rates.size - 1):
            edge = "highest" if best == result.rates.size - 1 else "lowest"
            line += f" | it is the {edge} rate tried: E again with the range moved past it"
    if stale:
        line += " | the state changed since this test (E again)"
    return line


class RangePanel(Vertical):
    """The plot and its summary line; the app feeds it."""

    DEFAULT_CSS = """
    RangePanel #range-summary {
        height: 2;
        padding: 0 1;
    }
    """

    def compose(self) -> ComposeResult:
        yield ChartPlot(id="range-plot")
        yield Static("", id="range-summary")

    def show(self, result: RangeResult, stale: bool) -> None:
        self.border_title = (f"rate range test: {result.steps} steps at each of {result.rates.size} rates, "
                             "nothing kept | B adopt, E again")

        def draw(fig: Any) -> None:
            draw_range(fig, result)

        self.query_one(ChartPlot).show(draw, id(result))
        self.query_one("#range-summary", Static).update(Text(range_summary(result, stale)), layout=False)

    def show_note(self, title: str, note: str) -> None:
        self.border_title = title
        self.query_one(ChartPlot).show(None, None)
        self.query_one("#range-summary", Static).update(Text(note), layout=False)

    @property
    def summary_text(self) -> str:
        return str(self.query_one("#range-summary", Static).content)
