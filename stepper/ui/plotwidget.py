"""A base for widgets that show a plotext plot.

plotext draws into one module-wide figure (see :mod:`stepper.plots`): build on
the app's thread only, which :class:`PlotWidget` does by building in
``render_line``. A built plot is kept as strips until the size, the style or
what the subclass adds to the key change, so repaints cost nothing.
"""

from __future__ import annotations

from typing import Any, ClassVar

from rich.style import Style
from textual.strip import Strip
from textual.widget import Widget


class PlotWidget(Widget):
    """A line-API widget whose lines are strips built from a plot, kept until their key changes.

    Subclasses give the smallest content size worth a plot (smaller, or nothing
    to plot: blank lines), say whether there is something to plot
    (:meth:`has_data`), add what else the plot depends on to the key
    (:meth:`key_extras`; the key always holds the content size) and build the
    strips (:meth:`build_strips`). :meth:`replot` drops the strips after a change
    of data. ``builds`` counts the builds.
    """

    MIN_WIDTH: ClassVar[int]
    MIN_HEIGHT: ClassVar[int]

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self.builds = 0
        self._key: tuple[Any, ...] | None = None
        self._strips: list[Strip] = []

    def has_data(self) -> bool:
        """There is something to plot."""
        raise NotImplementedError

    def key_extras(self) -> tuple[Any, ...]:
        """What the plot depends on besides the data and the content size."""
        return ()

    def build_strips(self, width: int, height: int, base: Style) -> list[Strip]:
        """At most ``height`` strips of ``width`` cells drawing the plot; called only when :meth:`has_data`."""
        raise NotImplementedError

    def replot(self) -> None:
        """Build again at the next paint (the data changed)."""
        self._key = None
        self.refresh()

    def notify_style_update(self) -> None:
        super().notify_style_update()
        self._key = None

    def plot_lines(self) -> list[str]:
        """The plot as plain text lines, as last drawn."""
        return [strip.text for strip in self._strips]

    def render_line(self, y: int) -> Strip:
        width, height = self.content_size.width, self.content_size.height
        key = (width, height, *self.key_extras())
        if self._key != key:
            base = self.rich_style
            if not self.has_data() or width < self.MIN_WIDTH or height < self.MIN_HEIGHT:
                self._strips = [Strip.blank(width, base)] * height
            else:
                self._strips = self.build_strips(width, height, base)
                self.builds += 1
                self._strips += [Strip.blank(width, base)] * (height - len(self._strips))
            self._key = key
        return self._strips[y] if y < len(self._strips) else Strip.blank(width)
