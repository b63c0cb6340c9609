"""Datasets: CSV files with a header row, read into float64 arrays.

The model file names which columns are inputs and which are targets. Every
cell of those columns must be a finite number. Error messages name the file,
the line (1-based, counting the header as line 1) and the column.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
from numpy.typing import NDArray

from stepper.errors import DataFileError
from stepper.formats.reading import DATA_FILE_LIMIT, read_limited

Array = NDArray[np.float64]


@dataclass(frozen=True)
class Table:
    """A CSV file's numeric columns.

    Attributes:
        header: column names in file order.
        values: ``(n_rows, n_columns)`` of the requested columns, float64.
        columns: the requested column names, in the order of ``values``.
        lines: the file line of each row (the header is line 1), ``(n_rows,)``; None when not read from a file.
    """

    header: tuple[str, ...]
    values: Array
    columns: tuple[str, ...]
    lines: NDArray[np.int64] | None = None


def read_columns(path: Path, wanted: list[str], label: str | None = None) -> Table:
    """Read the columns named in ``wanted`` from CSV file ``path``.

    Raises DataFileError naming the file (as ``label`` if given), the line and
    the column for a missing file, a missing column, an empty file, a row of
    the wrong length, or a cell that is not a finite number.
    """
    name = label or str(path)
    raw = read_limited(path, DATA_FILE_LIMIT, DataFileError, name, "data file")
    try:
        rows = list(csv.reader(io.StringIO(raw.decode("utf-8-sig"), newline="")))
    except (UnicodeDecodeError, csv.Error) as exc:
        raise DataFileError(f"{name}: cannot be read as CSV ({exc})") from None
    while rows and not any(cell.strip() for cell in rows[-1]):
        rows.pop()
    if not rows:
        raise DataFileError(f"{name}: the file is empty (expected a header row, then data rows)")
    header = tuple(cell.strip() for cell in rows[0])
    seen: set[str] = set()
    for cell in header:
        if cell in seen:
            raise DataFileError(f"{name}: line 1: column {_shown(cell)} appears twice in the header")
        seen.add(cell)
    missing = [col for col in wanted if col not in header]
    if missing:
        raise DataFileError(
            f"{name}: line 1: no column named {', '.join(repr(m) for m in missing)} "
            f"(the header has: {', '.join(_shown(cell, quote=False) for cell in header)})"
        )
    body = rows[1:]
    if not body:
        raise DataFileError(f"{name}: no data rows after the header")
    width = len(header)
    for offset, row in enumerate(body):
        if len(row) != width and any(cell.strip() for cell in row):
            raise DataFileError(
                f"{name}: line {offset + 2}: {len(row)} cells, but the header has {width}"
            )
    lines = np.array([offset + 2 for offset, row in enumerate(body) if len(row) == width], dtype=np.int64)
    body = [row for row in body if len(row) == width]
    positions = [header.index(col) for col in wanted]
    cells = np.array([[row[p] for p in positions] for row in body], dtype=str).reshape(len(body), len(wanted))
    try:
        values = np.char.strip(cells).astype(np.float64)
    except ValueError:
        values = None
    if values is None or not np.all(np.isfinite(values)):
        line, column, text = _first_bad_cell(cells, wanted)
        raise DataFileError(
            f"{name}: line {line + 2}, column '{column}': {text!r} is not a finite number"
        )
    return Table(header, values, tuple(wanted), lines)


def _shown(cell: str, quote: bool = True) -> str:
    """A header cell for a one-line message: quoted, with line breaks and other controls escaped."""
    if cell.isprintable():
        return f"'{cell}'" if quote else cell
    return repr(cell)


def _first_bad_cell(cells: NDArray[np.str_], wanted: list[str]) -> tuple[int, str, str]:
    """Row, column name and text of the first cell that is not a finite number (error path only)."""
    for r in range(cells.shape[0]):
        for c in range(cells.shape[1]):
            text = str(cells[r, c]).strip()
            try:
                number = float(text)
            except ValueError:
                return r, wanted[c], text
            if not math.isfinite(number):
                return r, wanted[c], text
    raise AssertionError("no bad cell found")


@dataclass(frozen=True)
class Dataset:
    """Training and validation data ready for the network.

    Attributes:
        X: training inputs ``(n_train, n_inputs)``.
        Y: training targets ``(n_train, n_outputs)``.
        X_val: validation inputs ``(n_val, n_inputs)``; ``n_val`` may be 0.
        Y_val: validation targets ``(n_val, n_outputs)``.
        input_names: input column names.
        target_names: target column names.
        mean, scale: standardization applied to inputs, ``(n_inputs,)``
            (zeros and ones when inputs are not standardized).
        source: path of the CSV file.
        train_lines, val_lines: the file line of each training and validation row
            (the header is line 1), ``(n_train,)`` and ``(n_val,)``.
    """

    X: Array
    Y: Array
    X_val: Array
    Y_val: Array
    input_names: tuple[str, ...]
    target_names: tuple[str, ...]
    mean: Array
    scale: Array
    source: str
    train_lines: NDArray[np.int64] = field(default_factory=lambda: np.empty(0, dtype=np.int64))
    val_lines: NDArray[np.int64] = field(default_factory=lambda: np.empty(0, dtype=np.int64))

    @property
    def n_train(self) -> int:
        return int(self.X.shape[0])

    @property
    def n_val(self) -> int:
        return int(self.X_val.shape[0])


def build_dataset(
    table: Table,
    inputs: list[str],
    targets: list[str],
    standardize: bool,
    validation_fraction: float,
    seed: int,
    source: str,
    holdout: NDArray[np.bool_] | None = None,
    raw: Sequence[str] = (),
) -> Dataset:
    """Split a table into inputs and targets, hold out a validation part, standardize.

    The validation rows are the rows where ``holdout`` (``(n_rows,)``) is True,
    or else a seeded random choice of ``round(fraction * n)`` rows;
    standardization statistics come from the training rows only. Input
    columns named in ``raw`` (category numbers) are never standardized.
    """
    order = {name: i for i, name in enumerate(table.columns)}
    lines = table.lines if table.lines is not None else np.arange(table.values.shape[0], dtype=np.int64) + 2
    X_all = table.values[:, [order[c] for c in inputs]]
    Y_all = table.values[:, [order[c] for c in targets]]
    n = X_all.shape[0]
    n_val = int(round(validation_fraction * n))
    if validation_fraction > 0 and n - n_val < 1:
        raise DataFileError(f"{source}: {n} rows leave no training rows after the validation split")
    if holdout is not None:
        val_rows, train_rows = np.flatnonzero(holdout), np.flatnonzero(~holdout)
    elif n_val > 0:
        perm = np.random.default_rng(seed).permutation(n)
        val_rows, train_rows = np.sort(perm[:n_val]), np.sort(perm[n_val:])
    else:
        val_rows, train_rows = np.arange(0), np.arange(n)
    X, Y = X_all[train_rows], Y_all[train_rows]
    X_val, Y_val = X_all[val_rows], Y_all[val_rows]
    if standardize:
        with np.errstate(over="ignore", invalid="ignore"):
            mean = X.mean(axis=0)
            scale = X.std(axis=0)
            scale[scale == 0.0] = 1.0
            keep = [inputs.index(c) for c in raw]
            mean[keep], scale[keep] = 0.0, 1.0
            X_std, X_val_std = (X - mean) / scale, (X_val - mean) / scale
        fine = np.isfinite(mean) & np.isfinite(scale) & np.all(np.isfinite(X_std), axis=0) \
            & np.all(np.isfinite(X_val_std), axis=0)
        if not np.all(fine):
            column = inputs[int(np.flatnonzero(~fine)[0])]
            raise DataFileError(
                f"{source}: column '{column}' cannot be standardized: its values are too large for its "
                "mean and spread to be finite numbers (scale the column, or set standardize = false)"
            )
    else:
        mean = np.zeros(X.shape[1])
        scale = np.ones(X.shape[1])
        X_std, X_val_std = X, X_val
    return Dataset(
        X_std,
        Y,
        X_val_std,
        Y_val,
        tuple(inputs),
        tuple(targets),
        mean,
        scale,
        source,
        lines[train_rows],
        lines[val_rows],
    )
