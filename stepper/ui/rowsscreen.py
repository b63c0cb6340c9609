"""The samples screen: every data row with its loss, prediction and target, and the task's metrics.

Rows come from :meth:`~stepper.session.Session.row_table` (training rows and
validation rows) at the weights the screen was opened at; the metrics above
them are the snapshot's. The list is drawn with Textual's line API, like the
weight table: only the rows on screen are formatted, so 100,000 rows cost one
``argsort`` per change of order. Enter on a training row closes the screen with
that row, and the app shows its slope factors (``i``'s panel) for it.
"""

from __future__ import annotations

from typing import ClassVar, Sequence

import numpy as np
from numpy.typing import NDArray
from rich.segment import Segment
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import BindingType
from textual.containers import Vertical
from textual.geometry import Size
from textual.screen import ModalScreen
from textual.strip import Strip
from textual.widgets import Label, Static

from stepper.session import RowTable, SetMetrics
from stepper.training_report import confusion_lines, metric_words, number, row_words
from stepper.ui.cursorview import CursorView
from stepper.ui.keys import bindings

#: Orders of the list: key, words for the title.
ORDERS = (("loss", "largest loss first"), ("line", "in file order"), ("error", "largest error first"))
#: Which rows are listed: both sets, or one.
SPLITS = ("both", "train", "validation")
HEAD = f"  {'set':<6}{'line':>6}{'sample':>7}{'loss':>12}  {'prediction':<22}target"


def order_rows(table: RowTable, key: str, reverse: bool, split: str) -> NDArray[np.int64]:
    """Positions in ``table`` of the rows of ``split``, ordered by ``key`` (ties by file line).

    ``loss`` and ``error`` (the largest absolute difference of output and
    target) put the largest first, ``line`` the file's order; ``reverse`` flips.
    A NaN loss counts as the largest.
    """
    keep = np.ones(table.n, dtype=bool) if split == "both" else table.validation == (split == "validation")
    rows = np.flatnonzero(keep).astype(np.int64)
    if key == "line":
        primary = table.line[rows].astype(np.float64)
    else:
        values = table.loss[rows] if key == "loss" else np.max(np.abs(table.output[rows] - table.target[rows]),
                                                                axis=1, initial=0.0)
        primary = -np.where(np.isnan(values), np.inf, values)
    order = np.lexsort((table.line[rows], primary))
    out = rows[order]
    return out[::-1].copy() if reverse else out


class RowList(CursorView, can_focus=True):
    """The rows, one per line, with a cursor; the screen sets what is listed."""

    BINDINGS: ClassVar[list[BindingType]] = bindings("rows")  # type: ignore[assignment]

    COMPONENT_CLASSES: ClassVar[set[str]] = {"rowlist--header", "rowlist--cursor"}

    DEFAULT_CSS = """
    RowList {
        height: 1fr;
        background: $surface;
    }
    RowList > .rowlist--header { text-style: bold; background: $panel; }
    RowList > .rowlist--cursor { background: $accent; color: $text; text-style: bold; }
    RowList:nocolor > .rowlist--cursor { text-style: reverse bold; }
    """

    def __init__(self, table: RowTable, task: str, outputs: Sequence[str], *, id: str | None = None) -> None:
        super().__init__(id=id)
        self.table = table
        self.kind = task
        self.outputs = tuple(outputs)
        self.rows: NDArray[np.int64] = np.zeros(0, dtype=np.int64)
        self.cursor = 0

    def set_rows(self, rows: NDArray[np.int64]) -> None:
        self.rows = rows
        widest = max((len(self.row_text(int(i))) + 2 for i in rows[:50]), default=len(HEAD))
        self.virtual_size = Size(max(len(HEAD), widest), rows.size + 1)
        self.move_to(0)

    @property
    def current(self) -> int | None:
        """Position in the table of the row under the cursor, or None when no row is listed."""
        return int(self.rows[self.cursor]) if self.rows.size else None

    @property
    def row_count(self) -> int:
        return int(self.rows.size)

    def move_to(self, row: int) -> None:
        self.cursor = min(max(row, 0), max(int(self.rows.size) - 1, 0))
        top = round(self.scroll_y)
        if self.cursor < top:
            self.scroll_to(y=self.cursor, animate=False, immediate=True)
        elif self.cursor >= top + self.page_rows:
            self.scroll_to(y=self.cursor - self.page_rows + 1, animate=False, immediate=True)
        self.refresh()

    def row_text(self, position: int) -> str:
        """The text of row ``position`` of the table (without the cursor mark)."""
        t = self.table
        pred, target = row_words(self.kind, self.outputs, t.output[position], t.target[position])
        split = "val" if t.validation[position] else "train"
        return (f"{split:<6}{int(t.line[position]):>6}{int(t.index[position]):>7}"
                f"{number(float(t.loss[position]), 5):>12}  {pred:<22}{target}")

    def render_line(self, y: int) -> Strip:
        scroll_x, scroll_y = self.scroll_offset
        width = self.scrollable_content_region.width
        base = self.rich_style
        if y == 0:
            style = base + self.get_component_rich_style("rowlist--header")
            strip = Strip([Segment(HEAD, style)])
        else:
            row = scroll_y + y - 1
            if row >= self.rows.size:
                return Strip.blank(width, base)
            is_cursor = row == self.cursor
            style = base + self.get_component_rich_style("rowlist--cursor") if is_cursor else base
            strip = Strip([Segment(("> " if is_cursor else "  ") + self.row_text(int(self.rows[row])), style)])
        return strip.crop_extend(scroll_x, scroll_x + width, base)


def metrics_text(task: str, metrics: SetMetrics | None, outputs: Sequence[str], wide: bool, loss: str) -> list[str]:
    """The metrics above the list: one line per set, and the confusion matrices when ``wide``."""
    if metrics is None:
        return ["metrics: cannot be computed at these weights"]
    lines = [f"loss per row: {loss} (the cost is the training rows' mean, without the L2 term)"]
    for label, m in (("train", metrics.train), ("validation", metrics.validation)):
        if m is None:
            continue
        lines.append(f"{label:<11}{metric_words(m)}")
        if wide:
            lines += ["  " + row for row in confusion_lines(m, outputs)]
    if task == "binary":
        lines.append(f"an output at or above {metrics.train.threshold:g} says yes (+)")
    return lines


class RowsScreen(ModalScreen[tuple[bool, int] | None]):
    """The rows and the metrics; the answer is ``(is_validation, sample)`` of the chosen row, or None.

    | Key | Does |
    | --- | --- |
    | up / down, pgup / pgdn, home / end | move |
    | o / O | next order / reverse it |
    | tab | training rows, validation rows, both |
    | enter | show this training row's slope factors |
    | escape, d | close |
    """

    BINDINGS: ClassVar[list[BindingType]] = bindings("rows-screen")  # type: ignore[assignment]

    DEFAULT_CSS = """
    RowsScreen {
        align: center middle;
    }
    RowsScreen > Vertical {
        width: 100%;
        height: 100%;
        border: thick $accent;
        background: $surface;
    }
    RowsScreen #rows-metrics {
        height: auto;
        max-height: 40%;
        padding: 0 1;
    }
    RowsScreen .dialog-hint {
        padding: 0 1;
    }
    """

    def __init__(self, table: RowTable, task: str, outputs: Sequence[str], metrics: SetMetrics | None,
                 loss: str) -> None:
        super().__init__()
        self.table = table
        self.kind = task
        self.outputs = tuple(outputs)
        self.metrics = metrics
        self.loss = loss
        self.order = 0
        self.reverse = False
        self.split = "both"

    def compose(self) -> ComposeResult:
        with Vertical():
            yield Label("", id="rows-title", classes="dialog-title")
            yield Static("", id="rows-metrics")
            yield RowList(self.table, self.kind, self.outputs, id="rows-list")
            yield Label("enter: slope factors of this training row | o/O order | tab: which rows | esc closes",
                        classes="dialog-hint")

    def on_mount(self) -> None:
        self._relist()
        self.query_one(RowList).focus()

    def on_resize(self) -> None:
        wide = self.size.height >= 30
        lines = metrics_text(self.kind, self.metrics, self.outputs, wide, self.loss)
        self.query_one("#rows-metrics", Static).update(Text("\n".join(lines), no_wrap=True, overflow="ellipsis"))

    @property
    def listing(self) -> RowList:
        return self.query_one(RowList)

    def _relist(self) -> None:
        key, words = ORDERS[self.order]
        rows = order_rows(self.table, key, self.reverse, self.split)
        self.listing.set_rows(rows)
        which = {"both": "training and validation rows", "train": "training rows",
                 "validation": "validation rows"}[self.split]
        order = f"{words}{' (reversed)' if self.reverse else ''}"
        self.query_one("#rows-title", Label).update(f"{rows.size} {which}, {order}")

    def action_next_order(self) -> None:
        self.order = (self.order + 1) % len(ORDERS)
        self.reverse = False
        self._relist()

    def action_flip_order(self) -> None:
        self.reverse = not self.reverse
        self._relist()

    def action_next_split(self) -> None:
        self.split = SPLITS[(SPLITS.index(self.split) + 1) % len(SPLITS)]
        self._relist()

    def action_choose(self) -> None:
        position = self.listing.current
        if position is None:
            return
        self.dismiss((bool(self.table.validation[position]), int(self.table.index[position])))

    def action_close(self) -> None:
        self.dismiss(None)
