"""What the weight table shows, apart from drawing it: the columns, the cells' text, row order and filters.

Pure functions of a :class:`~stepper.ui.snapshot.Snapshot` (no widget, no
Textual), so :mod:`stepper.ui.weights` draws and :mod:`tests.test_ui_table`
checks them directly.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.ui.snapshot import VERDICT_TEXT, Snapshot

IntArray = NDArray[np.int64]


@dataclass(frozen=True)
class Column:
    """One table column.

    Attributes:
        key: identifier, also the sort key name.
        title: header text.
        width: cells.
        descending: the natural sort direction (largest first for numbers).
    """

    key: str
    title: str
    width: int
    descending: bool


#: Significant digits of the value and slope columns: 4 at the least, up to 10 when the table is wide.
MIN_DIGITS, MAX_DIGITS = 4, 10
NUMBER_WIDTH = MIN_DIGITS + 7  # sign, point, "e+00"
COLUMNS: tuple[Column, ...] = (
    Column("name", "weight", 8, False),
    Column("value", "value", NUMBER_WIDTH, True),
    Column("analytic", "analytic", NUMBER_WIDTH, True),
    Column("numeric", "numeric", NUMBER_WIDTH, True),
    Column("rel_error", "rel.err", 7, True),
    Column("verdict", "verdict", 8, True),
    Column("frozen", "frozen", 6, True),
)
COLUMN_KEYS = tuple(c.key for c in COLUMNS)
GAP = 2
#: Cells before the name: the cursor mark and a space.
LEAD = 2


def wildcard(pattern: str) -> re.Pattern[str]:
    """A name pattern as a regular expression.

    Only ``*`` (any run of characters) and ``?`` (one character) are wildcards;
    everything else is literal, so ``L2.W[0,1]`` means exactly that name. A
    pattern without wildcards matches any name containing it.
    """
    parts = []
    for ch in pattern:
        parts.append(".*" if ch == "*" else "." if ch == "?" else re.escape(ch))
    body = "".join(parts)
    if "*" not in pattern and "?" not in pattern:
        return re.compile(body)
    return re.compile(f"^{body}$")


def sort_order(snap: Snapshot, key: str, descending: bool, rows: IntArray) -> IntArray:
    """``rows`` (flat indices) ordered by column ``key``.

    Numbers sort by size (absolute value); rows without a number (NaN) go last in
    either direction; ties keep flat order.
    """
    if key == "name":
        # Rows come in flat order: nothing to sort (a lexsort of a million rows took ~20 ms a frame).
        return rows[::-1] if descending else rows
    if key == "value":
        keys = np.abs(snap.value[rows])
    elif key == "analytic":
        keys = np.abs(snap.analytic[rows])
    elif key == "numeric":
        keys = np.abs(snap.numeric[rows])
    elif key == "rel_error":
        keys = snap.rel_error[rows].copy()
    elif key == "verdict":
        # Severity first, then relative error inside one verdict.
        rel = np.nan_to_num(snap.rel_error[rows], nan=0.0)
        keys = snap.verdict[rows].astype(np.float64) + np.clip(rel, 0.0, 0.999)
        keys[snap.verdict[rows] == 0] = np.nan
    elif key == "frozen":
        keys = snap.frozen[rows].astype(np.float64)
    else:
        raise KeyError(key)
    missing = np.isnan(keys)
    keys = np.where(missing, 0.0, keys)
    signed = -keys if descending else keys
    # lexsort: the last key is the primary one; NaN rows last, then by value, then flat order.
    order = np.lexsort((rows, signed, missing))
    return rows[order]


def verdict_text(snap: Snapshot, index: int) -> str:
    """The verdict cell; ``skipped`` for a weight the last numeric pass left out (C computes it)."""
    code = int(snap.verdict[index])
    if code == 0 and snap.has_check and snap.n_checked < snap.n_params:
        return "skipped"
    return VERDICT_TEXT[code]


def number_text(value: float, width: int, digits: int = MIN_DIGITS) -> str:
    """``value`` in sign-aligned scientific notation with ``digits`` significant digits, ``-`` when NaN."""
    if value != value:
        return "-".rjust(width)
    return f"{value: .{digits - 1}e}".rjust(width)
