"""A plot widget that draws one of :mod:`stepper.charts`' drawings (histograms, the range test).

The drawing is a function of a plotext figure, given with a key that changes
when what it draws changes; the plot is built in ``render_line`` (on the app's
thread, as every plotext figure must be) and kept until the key or the size
changes. Marks are left in the widget's own style: the drawings use distinct
characters (``*``, ``o``, ``X``, ``^``, bars), so they read without colour.
"""

from __future__ import annotations

from typing import Any, Callable

from rich.segment import Segment
from rich.style import Style
from textual.strip import Strip

from stepper.plots import plotext_figure
from stepper.ui.plotwidget import PlotWidget

Drawing = Callable[[Any], None]


class ChartPlot(PlotWidget):
    """Shows ``draw(fig)`` for the figure sized to the widget; blank without a drawing."""

    DEFAULT_CSS = """
    ChartPlot {
        width: 1fr;
        height: 1fr;
    }
    """

    MIN_WIDTH = 20
    MIN_HEIGHT = 5

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self._draw: Drawing | None = None
        self._data_key: object = None

    def show(self, draw: Drawing | None, key: object) -> None:
        """Draw with ``draw`` from now on; ``key`` identifies what it draws (a new key rebuilds)."""
        if draw is None or key != self._data_key:
            self._draw = draw
            self._data_key = key
            self.replot()

    def has_data(self) -> bool:
        return self._draw is not None

    def key_extras(self) -> tuple[Any, ...]:
        return (self._data_key,)

    def build_strips(self, width: int, height: int, base: Style) -> list[Strip]:
        assert self._draw is not None
        fig = plotext_figure(width, height)
        self._draw(fig)
        text = str(fig.build().string(colorless=True))
        fig.clear()
        return [Strip([Segment(line, base)]).adjust_cell_length(width, base) for line in text.splitlines()[:height]]
