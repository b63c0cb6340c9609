"""The weight table: one row per parameter, drawn with Textual's line API.

Why not the stock ``DataTable``: it keeps a styled cell object per cell and
re-measures columns on updates, which for 10,000 rows costs about a second to
fill and a tenth of a second to refresh one column (tests/benchmarks/bench_ui.py
measures both on the same rows). This widget keeps no cells at all: the rows
shown are an index array into the current :class:`~stepper.ui.snapshot.Snapshot`,
and :meth:`WeightTable.render_line` formats only the rows on screen, so a new
snapshot costs one ``argsort`` and a screenful of string formatting.

The table owns view settings only (row order, filters, cursor); the numbers
come from the snapshot the app hands it.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from numpy.typing import NDArray
from rich.segment import Segment
from rich.style import Style
from textual.binding import BindingType
from textual.geometry import Size
from textual.message import Message
from textual.strip import Strip

from stepper.ui.cursorview import CursorView
from stepper.ui.keys import bindings
from stepper.ui.rows import (  # noqa: F401  (COLUMN_KEYS, sort_order, wildcard: the table's names for them)
    COLUMN_KEYS,
    COLUMNS,
    GAP,
    LEAD,
    MAX_DIGITS,
    MIN_DIGITS,
    NUMBER_WIDTH,
    IntArray,
    number_text,
    sort_order,
    verdict_text,
    wildcard,
)
from stepper.ui.snapshot import STALE_TEXT, VERDICT_CODE, Snapshot


class WeightTable(CursorView, can_focus=True):
    """Every weight of the network, one per row, with a cursor.

    | Key | Does |
    | --- | --- |
    | up / down | move the cursor one row |
    | pgup / pgdn | one screen |
    | home / end | first / last row |
    """

    BINDINGS: ClassVar[list[BindingType]] = bindings("table")  # type: ignore[assignment]

    COMPONENT_CLASSES: ClassVar[set[str]] = {
        "weights--header",
        "weights--sorted",
        "weights--cursor",
        "weights--frozen",
        "weights--disagree",
        "weights--doubtful",
        "weights--stale",
    }

    DEFAULT_CSS = """
    WeightTable {
        background: $surface;
    }
    WeightTable > .weights--header { text-style: bold; background: $panel; }
    WeightTable > .weights--sorted { text-style: bold underline; background: $panel; }
    WeightTable > .weights--cursor { background: $accent 40%; text-style: bold; }
    WeightTable:focus > .weights--cursor { background: $accent; color: $text; }
    WeightTable > .weights--frozen { color: $text-muted; text-style: italic; }
    WeightTable > .weights--disagree { color: $error; text-style: bold; }
    WeightTable > .weights--doubtful { color: $warning; }
    WeightTable > .weights--stale { color: $text-muted; text-style: dim; }
    WeightTable:nocolor { scrollbar-size-vertical: 0; }
    WeightTable:nocolor > .weights--cursor { text-style: reverse bold; }
    WeightTable:nocolor > .weights--sorted { text-style: bold underline; }
    """

    class Selected(Message):
        """The cursor moved to another weight (``index`` is flat, None when no row is shown)."""

        def __init__(self, table: WeightTable, index: int | None) -> None:
            super().__init__()
            self.table = table
            self.index = index

        @property
        def control(self) -> WeightTable:
            return self.table

    class ViewChanged(Message):
        """The order or the filters changed; ``description`` says how rows are chosen and ordered."""

        def __init__(self, table: WeightTable, description: str) -> None:
            super().__init__()
            self.table = table
            self.description = description

        @property
        def control(self) -> WeightTable:
            return self.table

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        self._style_cache: dict[tuple[str, ...], Style] = {}
        super().__init__(name=name, id=id, classes=classes)
        self.snapshot: Snapshot | None = None
        #: Each weight's tensor in the file it came from (``fc1.weight[0,3]``), and that file's name.
        self.sources: tuple[str | None, ...] | None = None
        self.source_file = ""
        self.sort_key = "name"
        self.descending = False
        self.layer_filter: int | None = None
        self.pattern = ""
        self.rows: IntArray = np.zeros(0, dtype=np.int64)
        self.cursor = 0
        self._selected: int | None = None
        self._mask: NDArray[np.bool_] | None = None
        self._rows_of: NDArray[np.bool_] | None = None
        self._mask_rows: IntArray = np.zeros(0, dtype=np.int64)
        self._name_width = COLUMNS[0].width
        #: Significant digits of the number columns, as many as the width holds (see MAX_DIGITS).
        self.digits = MIN_DIGITS

    # -- what is shown ---------------------------------------------------------------------

    @property
    def selected(self) -> int | None:
        """Flat index of the weight under the cursor."""
        return self._selected

    def show(self, snap: Snapshot) -> None:
        """Draw ``snap`` from now on, keeping the order, filters and selected weight."""
        names_changed = self.snapshot is None or self.snapshot.names is not snap.names
        self.snapshot = snap
        if names_changed:
            self._mask = None
            self._name_width = max(COLUMNS[0].width, snap.names.widest())
            self._fit_digits()
        self._rebuild()

    def set_order(self, key: str, descending: bool | None = None) -> None:
        """Order rows by column ``key`` (its natural direction unless ``descending`` is given)."""
        column = COLUMNS[COLUMN_KEYS.index(key)]
        self.sort_key = key
        self.descending = column.descending if descending is None else descending
        self._rebuild(view_changed=True)

    def next_order(self) -> None:
        i = COLUMN_KEYS.index(self.sort_key)
        self.set_order(COLUMN_KEYS[(i + 1) % len(COLUMN_KEYS)])

    def flip_order(self) -> None:
        self.set_order(self.sort_key, not self.descending)

    def set_layer(self, layer: int | None) -> None:
        """Show only layer ``layer`` (0-based), or every layer."""
        self.layer_filter = layer
        self._mask = None
        self._rebuild(view_changed=True)

    def step_layer(self, delta: int) -> None:
        """Cycle the layer filter: all, layer 1, ..., layer n, all."""
        if self.snapshot is None:
            return
        n = self.snapshot.n_layers
        current = -1 if self.layer_filter is None else self.layer_filter
        nxt = (current + 1 + delta) % (n + 1) - 1
        self.set_layer(None if nxt < 0 else nxt)

    def set_pattern(self, pattern: str) -> None:
        """Show only names matching ``pattern`` (see :func:`wildcard`); empty shows all."""
        self.pattern = pattern.strip()
        self._mask = None
        self._rebuild(view_changed=True)

    def select(self, index: int) -> None:
        """Put the cursor on flat index ``index``, clearing filters that hide it."""
        if self.snapshot is None:
            return
        hits = np.flatnonzero(self.rows == index)
        if hits.size == 0:
            self.layer_filter = None
            self.pattern = ""
            self._mask = None
            self._rebuild(view_changed=True)
            hits = np.flatnonzero(self.rows == index)
        if hits.size:
            self.move_to(int(hits[0]))

    def describe(self) -> str:
        """How rows are chosen and ordered, and which are on screen, for the table's title."""
        snap = self.snapshot
        total = 0 if snap is None else snap.n_params
        shown = int(self.rows.size)
        top = round(self.scroll_y)
        rows = f"{min(top + 1, shown)}-{min(top + self.page_rows, shown)}"
        chosen = []
        if self.layer_filter is not None:
            chosen.append(f"layer {self.layer_filter + 1}")
        if self.pattern:
            chosen.append(f"'{self.pattern}'")
        parts = [f"weights {rows} of {shown}" + (f" ({', '.join(chosen)}; {total} in all)" if chosen else "")]
        title = COLUMNS[COLUMN_KEYS.index(self.sort_key)].title
        if self.sort_key == "name":
            parts.append("in network order" if not self.descending else "in reverse network order")
        else:
            stale = " (stale)" if self.sorted_by_stale() else ""
            parts.append(f"by {title}{stale}, {'largest' if self.descending else 'smallest'} first")
        if snap is not None and snap.has_check and snap.stale:
            parts.append("numeric slopes stale")
        if self.sources is not None and self._selected is not None and self.sources[self._selected]:
            parts.append(f"{snap.names[self._selected] if snap else ''} is "
                         f"{self.sources[self._selected]} of {self.source_file}")
        return " | ".join(parts)

    def sorted_by_stale(self) -> bool:
        """The rows are ordered by numeric slopes that are out of date."""
        snap = self.snapshot
        return (snap is not None and snap.has_check and snap.stale
                and self.sort_key in ("numeric", "rel_error", "verdict"))

    def watch_scroll_y(self, old_value: float, new_value: float) -> None:
        super().watch_scroll_y(old_value, new_value)
        if round(old_value) != round(new_value):
            self.border_title = self.describe()

    def on_resize(self) -> None:
        self._fit_digits()
        self.border_title = self.describe()
        # A smaller table (a panel opened below it) still shows the selected row.
        self.call_after_refresh(self._cursor_in_view)

    def _cursor_in_view(self) -> None:
        top = round(self.scroll_y)
        if not top <= self.cursor < top + self.page_rows:
            self.scroll_to(y=max(self.cursor - self.page_rows + 1, 0), animate=False, immediate=True)

    def natural_width(self) -> int:
        """Cells the table needs at its most digits (frame and scroll bar included); beside the plot
        on a wide screen it takes no more, leaving the rest to the plot column."""
        digits, self.digits = self.digits, MAX_DIGITS
        try:
            return self.line_width() + self.styles.scrollbar_size_vertical + self.styles.gutter.width
        finally:
            self.digits = digits

    def _fit_digits(self) -> None:
        """As many digits in the number columns as the width holds (each digit costs three cells)."""
        self.digits = MIN_DIGITS
        # The vertical scroll bar counted as there, so that the digits it leaves room for never bring
        # a horizontal one.
        room = self.content_region.width - self.styles.scrollbar_size_vertical - self.line_width()
        self.digits = MIN_DIGITS + min(max(room // 3, 0), MAX_DIGITS - MIN_DIGITS)
        self.virtual_size = Size(self.line_width(), self.rows.size + 1)
        self.refresh()

    def _filtered_rows(self, snap: Snapshot) -> IntArray:
        """Flat indices the filters let through, in flat order (kept until a filter changes)."""
        mask = self._filter_mask(snap)
        if self._rows_of is not mask:
            self._rows_of = mask
            self._mask_rows = np.flatnonzero(mask).astype(np.int64)
        return self._mask_rows

    def _filter_mask(self, snap: Snapshot) -> NDArray[np.bool_]:
        if self._mask is None:
            mask = np.ones(snap.n_params, dtype=bool)
            if self.layer_filter is not None:
                mask &= snap.layer == self.layer_filter
            if self.pattern:
                rx = wildcard(self.pattern)
                mask &= np.fromiter((rx.search(n) is not None for n in snap.names), dtype=bool,
                                    count=snap.n_params)
            self._mask = mask
        return self._mask

    def _rebuild(self, view_changed: bool = False) -> None:
        snap = self.snapshot
        if snap is None:
            return
        keep = self._selected
        rows = self._filtered_rows(snap)
        self.rows = sort_order(snap, self.sort_key, self.descending, rows)
        self.virtual_size = Size(self.line_width(), self.rows.size + 1)
        # A new order or filter starts at the top (worst first, say); new numbers keep the selection.
        row = 0
        if keep is not None and not view_changed:
            hits = np.flatnonzero(self.rows == keep)
            row = int(hits[0]) if hits.size else min(self.cursor, max(self.rows.size - 1, 0))
        self.move_to(row, force=True)
        self.border_title = self.describe()
        if view_changed:
            self.post_message(self.ViewChanged(self, self.describe()))
        self.refresh()

    # -- cursor ----------------------------------------------------------------------------

    @property
    def row_count(self) -> int:
        return int(self.rows.size)

    def move_to(self, row: int, force: bool = False) -> None:
        """Put the cursor on ``row`` (a position in the shown order) and keep it in view."""
        n = int(self.rows.size)
        row = min(max(row, 0), max(n - 1, 0))
        old_selected = self._selected
        self.cursor = row
        self._selected = int(self.rows[row]) if n else None
        top = round(self.scroll_y)
        if row < top:
            self.scroll_to(y=row, animate=False, immediate=True)
        elif row >= top + self.page_rows:
            self.scroll_to(y=row - self.page_rows + 1, animate=False, immediate=True)
        self.refresh()
        if force or old_selected != self._selected:
            if self.sources is not None:
                self.border_title = self.describe()
            self.post_message(self.Selected(self, self._selected))

    # -- drawing ---------------------------------------------------------------------------

    def widths(self) -> list[int]:
        number = NUMBER_WIDTH + self.digits - MIN_DIGITS
        return [self._name_width] + [number if c.width == NUMBER_WIDTH else c.width for c in COLUMNS[1:]]

    def line_width(self) -> int:
        return LEAD + sum(self.widths()) + GAP * (len(COLUMNS) - 1)

    def header_text(self) -> list[tuple[str, bool]]:
        """Header cells, each with whether it is the sort column."""
        out = []
        snap = self.snapshot
        stale = snap is not None and snap.has_check and snap.stale
        for column, width in zip(COLUMNS, self.widths()):
            title = column.title
            if column.key in ("numeric", "rel_error") and stale:
                title += "*"
            text = title.ljust(width) if column.key in ("name", "verdict", "frozen") else title.rjust(width)
            out.append((text, column.key == self.sort_key))
        return out

    def row_cells(self, index: int) -> list[str]:
        """The text of each cell of flat index ``index``, padded to the column widths."""
        snap = self.snapshot
        assert snap is not None
        widths = self.widths()
        rel = snap.rel_error[index]
        # A numeric slope older than the weights is no verdict: the column says so in a word.
        verdict = STALE_TEXT if snap.stale and snap.has_check else verdict_text(snap, index)
        digits = self.digits
        return [
            snap.names[index].ljust(widths[0]),
            number_text(snap.value[index], widths[1], digits),
            number_text(snap.analytic[index], widths[2], digits),
            number_text(snap.numeric[index], widths[3], digits),
            ("-" if rel != rel else f"{rel:.1e}").rjust(widths[4]),
            verdict.ljust(widths[5]),
            ("yes" if snap.frozen[index] else "").ljust(widths[6]),
        ]

    def notify_style_update(self) -> None:
        super().notify_style_update()
        self._style_cache.clear()

    def _style(self, *components: str) -> Style:
        """The widget's style plus the given component styles, cached until the styles change."""
        style = self._style_cache.get(components)
        if style is None:
            style = self.rich_style
            for name in components:
                style = style + self.get_component_rich_style(name)
            self._style_cache[components] = style
        return style

    def render_line(self, y: int) -> Strip:
        scroll_x, scroll_y = self.scroll_offset
        width = self.scrollable_content_region.width
        base = self._style()
        if self.snapshot is None:
            return Strip.blank(width, base)
        if y == 0:
            strip = self._header_strip()
        else:
            row = scroll_y + y - 1
            if row >= self.rows.size:
                return Strip.blank(width, base)
            strip = self._row_strip(row)
        return strip.crop_extend(scroll_x, scroll_x + width, base)

    def _header_strip(self) -> Strip:
        header = self._style("weights--header")
        sorted_style = self._style("weights--header", "weights--sorted")
        segments = [Segment(" " * LEAD, header)]
        for i, (text, is_sorted) in enumerate(self.header_text()):
            if i:
                segments.append(Segment(" " * GAP, header))
            segments.append(Segment(text, sorted_style if is_sorted else header))
        return Strip(segments, self.line_width())

    def _row_strip(self, row: int) -> Strip:
        snap = self.snapshot
        assert snap is not None
        index = int(self.rows[row])
        cells = self.row_cells(index)
        row_parts: tuple[str, ...] = ()
        if snap.frozen[index]:
            row_parts += ("weights--frozen",)
        is_cursor = row == self.cursor
        if is_cursor:
            row_parts += ("weights--cursor",)
        style = self._style(*row_parts)
        code = int(snap.verdict[index])
        stale = snap.stale and snap.has_check
        if stale:
            verdict_style = numeric_style = self._style(*row_parts, "weights--stale")
        else:
            numeric_style = style
            if code == VERDICT_CODE["disagree"]:
                verdict_style = self._style(*row_parts, "weights--disagree")
            elif code in (VERDICT_CODE["doubtful"], VERDICT_CODE["unresolved"]):
                verdict_style = self._style(*row_parts, "weights--doubtful")
            else:
                verdict_style = style
        gap = Segment(" " * GAP, style)
        segments = [Segment(">" if is_cursor else " ", style), Segment(" ", style)]
        for i, text in enumerate(cells):
            if i:
                segments.append(gap)
            if i in (4, 5):
                segments.append(Segment(text, verdict_style))
            elif i == 3:
                segments.append(Segment(text, numeric_style))
            else:
                segments.append(Segment(text, style))
        return Strip(segments, self.line_width())
