"""Journals: every operation of a session, one JSON object per line.

The first line is a header::

    {"journal": "stepper", "version": 1, "model": "/abs/path/model.toml", "digest": "<sha256>",
     "start": {"rate": 0.1, "rule": "gd", "seed": 0, "slope_source": "analytic", "batch_size": null}}

``start`` holds the settings the session began with (its seed decides the
mini-batch draws), so a replay begins where the session began; a key that an
older journal lacks takes its default.

Each further line is one operation with its arguments, e.g.
``{"op": "step", "n": 10}`` or ``{"op": "perturb", "scale": 0.01, "seed": 42,
"names": null}``. Lines are flushed to disk as they are written, so after a
crash the journal holds every operation up to the last whole line; a line cut
off mid-way is ignored on replay. A loaded checkpoint is recorded with the
SHA-256 of its bytes (``{"op": "load", "path": ..., "sha256": ...}``): a replay
refuses it if the file has been overwritten since, e.g. by a later save to the
same path, because the state rebuilt from it would silently differ.

A session that opens a journal which already holds one starts a new part of it
with a header line of its own (it starts again from the model file), and a
replay rebuilds the latest part. A line cut off by a crash just before such a
header is ignored like a cut-off last line.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import IO, Any

from stepper.errors import CheckpointError

VERSION = 1


class JournalWriter:
    """Appends operations to a journal file, flushing each line to disk."""

    def __init__(self, path: Path, model: Path, digest: str, start: dict[str, Any] | None = None) -> None:
        self.path = Path(path)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            cut = _ends_mid_line(self.path)
            # Mode as for every file Stepper writes (see .atomic): 0666 less the umask when new;
            # appending keeps the mode an existing journal has.
            self._handle: IO[str] = open(self.path, "a", encoding="utf-8")
        except OSError as exc:
            raise CheckpointError(f"{path}: cannot write the journal ({exc.strerror})") from None
        if cut:
            # Close the line a crash left unfinished, so the header starts a line of its own.
            self._handle.write("\n")
        self.append({"journal": "stepper", "version": VERSION, "model": str(Path(model).resolve()),
                     "digest": digest, "start": dict(start or {})})

    def append(self, entry: dict[str, Any]) -> None:
        """Write one entry as a line and flush it to disk.

        After :meth:`close` an entry is still appended (the file is opened for
        that line alone): a job that finishes its last step while the session
        is closing must not lose that step from the journal.
        """
        line = json.dumps(entry, separators=(",", ":")) + "\n"
        if self._handle.closed:
            with open(self.path, "a", encoding="utf-8") as handle:
                handle.write(line)
                handle.flush()
                os.fsync(handle.fileno())
            return
        self._handle.write(line)
        self._handle.flush()
        os.fsync(self._handle.fileno())

    def close(self) -> None:
        self._handle.close()


def _ends_mid_line(path: Path) -> bool:
    """True when ``path`` exists, is not empty and its last byte is not a newline."""
    if not path.exists() or path.stat().st_size == 0:
        return False
    with open(path, "rb") as handle:
        handle.seek(-1, os.SEEK_END)
        return handle.read(1) != b"\n"


def _is_header(entry: dict[str, Any] | None) -> bool:
    return entry is not None and "journal" in entry


def read_journal(path: Path) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The header and the whole operation lines of the latest part of a journal."""
    header, numbered = read_numbered_journal(path)
    return header, [entry for _, entry in numbered]


def read_numbered_journal(path: Path) -> tuple[dict[str, Any], list[tuple[int, dict[str, Any]]]]:
    """Like :func:`read_journal`, each operation with its line number (from 1).

    A last line without its newline (a write cut off by a crash) is dropped, and
    so is a broken line just before a header; any other line that is not a JSON
    object is an error naming the line.
    """
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise CheckpointError(f"{path}: no such journal") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise CheckpointError(f"{path}: cannot be read ({exc})") from None
    lines = text.split("\n")
    complete = lines[:-1]  # whatever follows the last newline was not finished
    if not complete:
        raise CheckpointError(f"{path}: empty journal (no header line)")
    parsed: list[tuple[int, dict[str, Any] | None]] = []
    for number, line in enumerate(complete, start=1):
        if not line.strip():
            continue
        try:
            entry = json.loads(line)
        except json.JSONDecodeError:
            entry = None
        parsed.append((number, entry if isinstance(entry, dict) else None))
    if not parsed:
        raise CheckpointError(f"{path}: empty journal (no header line)")
    first_number, first = parsed[0]
    if first is not None and not _is_header(first):
        raise CheckpointError(f"{path}: line {first_number}: not a Stepper journal header")
    start = 0
    for position, (number, entry) in enumerate(parsed):
        if entry is None:
            if position + 1 < len(parsed) and _is_header(parsed[position + 1][1]):
                continue  # cut off by a crash; the next session started after it
            raise CheckpointError(f"{path}: line {number}: not a JSON object")
        if _is_header(entry):
            start = position
    number, header = parsed[start]
    assert header is not None
    if header.get("journal") != "stepper":
        raise CheckpointError(f"{path}: line {number}: not a Stepper journal header")
    if header.get("version") != VERSION:
        raise CheckpointError(f"{path}: line {number}: unsupported journal version {header.get('version')!r}")
    return header, [(n, entry) for n, entry in parsed[start + 1 :] if entry is not None]
