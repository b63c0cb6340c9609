"""Journals: every operation of a session, one JSON object per line.

The first line is a header::

    {"journal": "stepper", "version": 1, "model": "/abs/path/model.toml", "digest": "<sha256>",
     "start": {"rate": 0.1, "rule": "gd", "seed": 0}}

``start`` holds the settings the session began with (its seed decides the
mini-batch draws), so a replay begins where the session began.

Each further line is one operation with its arguments, e.g.
``{"op": "step", "n": 10}`` or ``{"op": "perturb", "scale": 0.01, "seed": 42,
"names": null}``. Lines are flushed to disk as they are written, so after a
crash the journal holds every operation up to the last whole line; a line cut
off mid-way is ignored on replay.
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
            fresh = not self.path.exists() or self.path.stat().st_size == 0
            self._handle: IO[str] = open(self.path, "a", encoding="utf-8")
        except OSError as exc:
            raise CheckpointError(f"{path}: cannot write the journal ({exc.strerror})") from None
        if fresh:
            self.append({"journal": "stepper", "version": VERSION, "model": str(Path(model).resolve()),
                         "digest": digest, "start": dict(start or {})})

    def append(self, entry: dict[str, Any]) -> None:
        self._handle.write(json.dumps(entry, separators=(",", ":")) + "\n")
        self._handle.flush()
        os.fsync(self._handle.fileno())

    def close(self) -> None:
        self._handle.close()


def read_journal(path: Path) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The header and the whole operation lines of a journal.

    A last line without its newline (a write cut off by a crash) is dropped;
    any other line that is not a JSON object is an error naming the line.
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
    entries: list[dict[str, Any]] = []
    for number, line in enumerate(complete, start=1):
        if not line.strip():
            continue
        try:
            entry = json.loads(line)
        except json.JSONDecodeError:
            raise CheckpointError(f"{path}: line {number}: not a JSON object") from None
        if not isinstance(entry, dict):
            raise CheckpointError(f"{path}: line {number}: not a JSON object")
        entries.append(entry)
    header = entries[0] if entries else {}
    if header.get("journal") != "stepper":
        raise CheckpointError(f"{path}: line 1: not a Stepper journal header")
    if header.get("version") != VERSION:
        raise CheckpointError(f"{path}: line 1: unsupported journal version {header.get('version')!r}")
    return header, entries[1:]
