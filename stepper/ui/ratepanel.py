"""The rate preview: the cost after one step at each candidate rate, searched until the best is inside.

The session previews a ladder of rates around the current one (x1/16 to x16, in
factors of 2). When the lowest cost falls on the ladder's smallest or largest
rung, the best rate may lie beyond it: :func:`search_rates` widens the ladder
that way, two rungs at a time, up to WIDENINGS times, and says so when the best
is still on the edge. The panel always shows the best row (and the current
rate's when there is room), whatever its height.
"""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass
from typing import Callable, Sequence

from rich.text import Text
from textual.widgets import Static

from stepper.ui.panels import cost_text, fit_title

#: How many times the ladder is widened by two more rungs (factors of 2) on the side of the best.
WIDENINGS = 6

Preview = Callable[[Sequence[float] | None], list[tuple[float, float]]]


@dataclass(frozen=True)
class RateSearch:
    """A preview of rates, from smallest to largest.

    Attributes:
        rows: ``(rate, cost after one step)``; ``inf`` where the step would be non-finite.
        best: the rate with the lowest cost, or None when every step would be non-finite.
        edge: ``smallest`` or ``largest`` when the best is still the ladder's end after widening, else None.
        widened: rungs added beyond the session's ladder.
    """

    rows: tuple[tuple[float, float], ...]
    best: float | None
    edge: str | None
    widened: int

    def note(self) -> str | None:
        """One sentence when the search says something beyond the rows, else None."""
        if self.best is None:
            return "every rate tried makes the cost non-finite: the weights may already have blown up (z undoes)"
        if self.edge == "smallest":
            return f"the best is the smallest rate tried, {self.best:.3g}: smaller ones may do better (r types one)"
        if self.edge == "largest":
            return f"the best is the largest rate tried, {self.best:.3g}: larger ones may do better (r types one)"
        if self.widened:
            return f"widened by {self.widened} rates to find the best"
        return None


def search_rates(preview: Preview) -> RateSearch:
    """The session's preview (``preview(None)``), widened while its best is at one end.

    ``preview(rates)`` returns ``(rate, cost)`` for the given rates (None: the
    session's own ladder); ties go to the smaller rate.
    """
    rows = sorted(preview(None))
    widened = 0
    for _ in range(WIDENINGS):
        i = _best_index(rows)
        if i is None or 0 < i < len(rows) - 1:
            break
        if i == 0:
            rows = sorted(preview([rows[0][0] / 4, rows[0][0] / 2])) + rows
        else:
            rows = rows + sorted(preview([rows[-1][0] * 2, rows[-1][0] * 4]))
        widened += 2
    i = _best_index(rows)
    edge = None if i is None else "smallest" if i == 0 else "largest" if i == len(rows) - 1 else None
    return RateSearch(tuple(rows), None if i is None else rows[i][0], edge, widened)


def _best_index(rows: Sequence[tuple[float, float]]) -> int | None:
    finite = [i for i, (_, cost) in enumerate(rows) if math.isfinite(cost)]
    if not finite:
        return None
    return min(finite, key=lambda i: (rows[i][1], i))


def preview_lines(search: RateSearch, current: float, height: int = 99, width: int = 32) -> list[str]:
    """At most ``height`` lines: rows around the best (marked ``>``), then the search's note.

    The best row is always among them; the current rate's too when the window reaches it.
    """
    rows: list[str] = []
    best_row = None
    for rate, cost in search.rows:
        marks = []
        if search.best is not None and rate == search.best:
            marks.append("best")
            best_row = len(rows)
        if math.isclose(rate, current, rel_tol=1e-12):
            marks.append("now")
        lead = ">" if "best" in marks else " "
        rows.append(f"{lead}{rate:<10.4g} {cost_text(cost):>10} {' '.join(marks)}".rstrip())
    note = search.note()
    tail = textwrap.wrap(note, max(width, 20)) if note else []
    room = max(height - len(tail), 1)
    if len(rows) > room:
        centre = best_row if best_row is not None else 0
        top = min(max(centre - room // 2, 0), len(rows) - room)
        rows = rows[top : top + room]
    return rows + tail[: max(height - len(rows), 0)]


class RatePanel(Static):
    """The cost after one step at each candidate rate; the app hands it a :class:`RateSearch`."""

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__("", name=name, id=id, classes=classes)
        self._shown: tuple[RateSearch, float] | None = None
        self._lines = 0

    def on_mount(self) -> None:
        self._set_title()

    def _set_title(self) -> None:
        self.border_title = fit_title(["cost after 1 step | V adopts best", "after 1 step | V: best",
                                       "V: best"], self.size.width or 34)

    def show(self, search: RateSearch, current: float) -> None:
        self._shown = (search, current)
        self._draw()

    def on_resize(self) -> None:
        self.call_after_refresh(self._draw)

    def _draw(self) -> None:
        self._set_title()
        if self._shown is None:
            return
        size = self.content_size
        lines = preview_lines(*self._shown, height=size.height or 99, width=size.width or 32)
        self.update(Text("\n".join(lines), no_wrap=True), layout=len(lines) != self._lines)
        self._lines = len(lines)

    @property
    def text(self) -> str:
        """The panel as plain text."""
        return str(self.content)
