"""A scrolling list with a cursor row: the keys and clicks that move it, shared by the app's line-API lists."""

from __future__ import annotations

from textual import events
from textual.scroll_view import ScrollView


class CursorView(ScrollView):
    """A line-API list whose first line is a header and whose rows have a cursor.

    Subclasses keep ``cursor`` (the row position) and ``rows`` (what is listed)
    and put the cursor on a row with :meth:`move_to`, which keeps it in view;
    this class moves it by rows, by screens and to the ends, as the keys of
    :mod:`stepper.ui.keys` ask, and to the row clicked.
    """

    cursor: int

    def move_to(self, row: int) -> None:
        """Put the cursor on ``row`` and keep it in view."""
        raise NotImplementedError

    @property
    def row_count(self) -> int:
        """How many rows are listed."""
        raise NotImplementedError

    @property
    def page_rows(self) -> int:
        return max(1, self.scrollable_content_region.height - 1)

    def action_cursor(self, delta: int) -> None:
        self.move_to(self.cursor + delta)

    def action_page(self, delta: int) -> None:
        self.move_to(self.cursor + delta * self.page_rows)

    def action_first(self) -> None:
        self.move_to(0)

    def action_last(self) -> None:
        self.move_to(self.row_count - 1)

    def on_click(self, event: events.Click) -> None:
        if event.y >= 1:
            self.move_to(round(self.scroll_y) + event.y - 1)
