"""The rows of `stepper check`, as a text table or JSON, formatted a chunk of rows at a time.

A model of a million weights has a million rows. Formatting them one Python
call per cell took longer than checking them, and building the whole JSON
document in memory took over a gigabyte; here each chunk of
:data:`CHUNK` rows is formatted by one string-formatting call over flat lists
of its cells and written out before the next, so memory stays bounded by a
chunk whatever the model's size, and the JSON document is streamed: the
``weights`` list is written row by row into the document around it.
"""

from __future__ import annotations

import json
import re
from typing import IO, Any, Iterator

import numpy as np
from numpy.typing import NDArray

from stepper.core.gradcheck import CheckResult
from stepper.core.names import block_ids, names_at
from stepper.core.network import ParamLayout
from stepper.formats.weight_sources import WeightOrigin

IntArray = NDArray[np.int64]

#: Rows formatted and written at a time.
CHUNK = 16384

_MARKS = {"agree": "ok  agree", "doubtful": "?   doubtful", "disagree": "XX  disagree", "kink": "~   kink",
          "unresolved": "??  unresolved"}


def mark(verdict: str) -> str:
    """A verdict as the table shows it: a sign that reads without colour, then the word."""
    return _MARKS.get(verdict, verdict)


def name_width(layout: ParamLayout, rows: IntArray) -> int:
    """The widest name among ``rows``: that of the last entry of each array they touch."""
    blocks = {int(b) for b in np.unique(block_ids(layout, rows))} if rows.size else set()
    lasts = [layout.blocks[b].stop - 1 for b in sorted(blocks)]
    return max((len(name) for name in names_at(layout, lasts)), default=0)


def _interleave(columns: list[list[Any]]) -> tuple[Any, ...]:
    """Cells row by row from columns of equal length."""
    flat: list[Any] = [None] * (len(columns) * len(columns[0]))
    for i, column in enumerate(columns):
        flat[i :: len(columns)] = column
    return tuple(flat)


def _lookup(words: NDArray[np.str_], table: dict[str, str]) -> list[str]:
    """``table[w]`` (or ``w`` itself) for each entry of ``words``, one look-up per distinct word."""
    distinct, inverse = np.unique(words, return_inverse=True)
    mapped = np.array([table.get(str(w), str(w)) for w in distinct], dtype=object)
    out: list[str] = mapped[inverse.ravel()].tolist()
    return out


def source_names_at(origin: WeightOrigin, layout: ParamLayout, indices: IntArray) -> list[str | None]:
    """The names in the file the weights came from (``fc1.weight[0,3]``) of flat ``indices``.

    None for an entry whose array has no source. Built a block at a time, like
    :func:`stepper.core.names.names_at`, for the entries asked about only.
    """
    out = np.full(indices.size, None, dtype=object)
    ids = block_ids(layout, indices)
    for b in np.unique(ids):
        block = layout.blocks[int(b)]
        source = origin.tensors.get(block.prefix)
        if source is None:
            continue
        where = np.flatnonzero(ids == b)
        # Position in the file's tensor of each entry of Stepper's array, in Stepper's flat order.
        position = source.from_file(np.arange(block.size).reshape(source.shape), block.shape).ravel()
        file_index = np.unravel_index(position[indices[where] - block.start], source.shape)
        template = source.tensor.replace("%", "%%") + "[" + ",".join(["%d"] * len(source.shape)) + "]"
        k = where.size
        out[where] = ("\n".join([template] * k) % _interleave([np.asarray(p).tolist() for p in file_index])
                      ).split("\n")
    names: list[str | None] = out.tolist()
    return names


def write_table_rows(out: IO[str], layout: ParamLayout, theta: NDArray[np.float64], result: CheckResult,
                     rows: IntArray, width: int, origin: WeightOrigin | None = None) -> None:
    """The table's lines for flat indices ``rows``, in that order.

    Columns as ``stepper check`` prints them: name (``width`` wide), value,
    analytic and numeric slope (sign-aligned, four decimals), relative error
    and the verdict; ``-`` where a number is missing. With an ``origin`` (weights
    read from another program's file) each row ends with the weight's name there.
    """
    line = f"%-{width}s  % 12.4e  % 12.4e  % 12.4e  %10.2e  %s"
    for lo in range(0, rows.size, CHUNK):
        idx = rows[lo : lo + CHUNK]
        marks = _lookup(result.verdict[idx], _MARKS)
        if origin is not None:
            sources = source_names_at(origin, layout, idx)
            marks = [m if src is None else f"{m:<13}  {src}" for m, src in zip(marks, sources)]
        cells = _interleave([
            names_at(layout, idx),
            theta[idx].tolist(),
            result.analytic[idx].tolist(),
            result.numeric[idx].tolist(),
            result.rel_error[idx].tolist(),
            marks,
        ])
        text = "\n".join([line] * idx.size) % cells
        # A missing number (NaN) shows as "-" in its column's width. The relative
        # error's 10 columns and the two spaces before them read the same either way.
        out.write(text.replace("         nan", "           -") + "\n")


class WeightRows:
    """The ``weights`` list of a check's JSON document, written a chunk at a time.

    Each row is ``{"name", "source", "layer", "kind", "indices", "value",
    "analytic", "numeric", "relative_error", "verdict"}`` for one flat index of
    ``rows`` (flat order), as the whole document was built before; ``source`` is
    the weight's name in the file it came from (``origin``), or null. Numbers are written
    as Python's ``repr`` writes them (the shortest text that reads back the
    same float, as the ``json`` module does), ``null`` where not finite.
    """

    def __init__(self, layout: ParamLayout, theta: NDArray[np.float64], result: CheckResult | None,
                 rows: IntArray, origin: WeightOrigin | None = None) -> None:
        self.layout = layout
        self.theta = theta
        self.result = result
        self.rows = rows
        self.origin = origin

    def chunks(self) -> Iterator[str]:
        """The list's JSON text, ``[`` to ``]``, in pieces."""
        yield "["
        first = True
        result = self.result
        if result is not None and self.rows.size:
            ids = block_ids(self.layout, self.rows)
            for lo in range(0, self.rows.size, CHUNK):
                idx, blocks = self.rows[lo : lo + CHUNK], ids[lo : lo + CHUNK]
                for b in np.unique(blocks):
                    part = idx[blocks == b]
                    yield ("\n " if first else ",\n ") + self._block_rows(int(b), part, result)
                    first = False
        yield "\n]" if not first else "]"

    def _block_rows(self, b: int, idx: IntArray, result: CheckResult) -> str:
        block = self.layout.blocks[b]
        positions = np.unravel_index(idx - block.start, block.shape)
        names = names_at(self.layout, idx)
        if not _PLAIN.match(block.prefix):
            names = [json.dumps(name)[1:-1] for name in names]
        sources = (source_names_at(self.origin, self.layout, idx) if self.origin is not None
                   else [None] * idx.size)
        numbers = [self.theta[idx], result.analytic[idx], result.numeric[idx], result.rel_error[idx]]
        head = (f'{{"name": "%s", "source": %s, "layer": {block.layer + 1}, "kind": {json.dumps(block.kind)}, '
                '"indices": [' + ", ".join(["%d"] * len(block.shape)) + "], ")
        row = head + '"value": %r, "analytic": %r, "numeric": %r, "relative_error": %r, "verdict": %s}'
        cells = _interleave([names, [json.dumps(src) for src in sources],
                             *[np.asarray(p).tolist() for p in positions],
                             *[column.tolist() for column in numbers],
                             _lookup(result.verdict[idx], _JSON_VERDICTS)])
        text = ",\n ".join([row] * idx.size) % cells
        if not all(bool(np.all(np.isfinite(column))) for column in numbers):
            # JSON (RFC 8259) has no NaN or Infinity; every number follows ": ".
            text = text.replace(": nan", ": null").replace(": inf", ": null").replace(": -inf", ": null")
        return text


_PLAIN = re.compile(r"^[A-Za-z0-9_.]+\Z")
_JSON_VERDICTS = {v: json.dumps(v) for v in ("agree", "doubtful", "disagree", "kink", "")}


#: Stands for the streamed list inside the document until it is written.
_PLACE = "\u0000stepper-weights\u0000"


def dump_document(doc: dict[str, Any], out: IO[str]) -> None:
    """Write ``doc`` as JSON (RFC 8259: no NaN); a :class:`WeightRows` value is streamed in its place."""
    streamed: list[WeightRows] = []

    def place(value: Any) -> Any:
        if isinstance(value, WeightRows):
            streamed.append(value)
            return _PLACE
        if isinstance(value, dict):
            return {key: place(item) for key, item in value.items()}
        if isinstance(value, (list, tuple)):
            return [place(item) for item in value]
        return value

    text = json.dumps(place(doc), indent=1, allow_nan=False)
    pieces = text.split(json.dumps(_PLACE))
    out.write(pieces[0])
    for rows, rest in zip(streamed, pieces[1:]):
        for chunk in rows.chunks():
            out.write(chunk)
        out.write(rest)
    out.write("\n")
