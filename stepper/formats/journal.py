"""Journals: every operation of a session, one JSON object per line.

The first line is a header::

    {"journal": "stepper", "version": 2, "session": "<random id>",
     "model": "/abs/path/model.toml", "digest": "<sha256>",
     "inputs": [{"role": "data", "path": "/abs/data.csv", "sha256": "..."}, ...],
     "start": {"rate": 0.1, "rule": "gd", "seed": 0, "slope_source": "analytic", "batch_size": null}}

``start`` holds the settings the session began with (its seed decides the
mini-batch draws), so a replay begins where the session began; a key that an
older journal lacks takes its default. ``inputs``
names every other file the model file reads (data, custom-layer code, weights
to import) with its SHA-256: a replay refuses to run if any of them, or the
model file, has changed since (unless forced).

Each further line is one operation with its arguments and a sequence number
counting from 1, e.g. ``{"seq": 3, "op": "perturb", "scale": 0.01, "seed": 42,
"names": null}``. Steps are written as they are made, a line every
:data:`STEP_LINE_SECONDS` at most (``{"op": "step", "n": 120}``, then
``{"op": "step", "n": 95, "continues": true}`` for more steps of the same
run), so a killed session loses at most that much. Lines are flushed to disk
as they are written; after a crash the journal holds every operation up to the
last whole line, and a line cut off mid-way is ignored on replay. A loaded
checkpoint is recorded with the SHA-256 of its bytes (``{"op": "load",
"path": ..., "sha256": ...}``): a replay refuses it if the file has been
overwritten since.

A new journal is created exclusively under a name no other session uses
(:func:`new_journal_path`). A session that opens an existing journal (``--journal
PATH``) starts a new part of it with a header of its own, and a replay rebuilds
the latest part. While a session writes a journal it holds a lock on it, so a
second session cannot write into the same file; a replay still checks that the
sequence numbers of the latest part run 1, 2, 3, ... and refuses a file whose
lines come from more than one session.
"""

from __future__ import annotations

import fcntl
import json
import os
import secrets
from datetime import datetime
from pathlib import Path
from typing import IO, Any

from stepper.errors import CheckpointError
from stepper.formats import fields
from stepper.formats.reading import JOURNAL_LIMIT, JOURNAL_LINE_LIMIT, open_regular

VERSION = 2
READABLE_VERSIONS = (1, 2)
#: Steps of a running job are written to the journal at least this often.
STEP_LINE_SECONDS = 0.1
#: Most steps one journal line may ask for (a replay of more would run for days).
MAX_STEPS_PER_LINE = 1_000_000_000


class JournalWriter:
    """Appends operations to a journal file, flushing each line to disk.

    Raises CheckpointError when the file cannot be created or is in use by
    another session; :meth:`append` raises OSError when a line cannot be
    written (the session decides what to do about it).
    """

    def __init__(self, path: Path, model: Path, digest: str, start: dict[str, Any] | None = None,
                 inputs: list[dict[str, str]] | None = None, exclusive: bool = False) -> None:
        self.path = Path(path)
        self.session = secrets.token_hex(8)
        self._seq = 0
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            if self.path.is_symlink() or (self.path.exists() and not self.path.is_file()):
                raise CheckpointError(f"{path}: is not a regular file; a journal must be one")
            flags = os.O_RDWR | os.O_APPEND | os.O_CREAT | (os.O_EXCL if exclusive else 0)
            # Mode as for every file Stepper writes (see .atomic): 0666 less the umask when new;
            # appending keeps the mode an existing journal has.
            fd = os.open(self.path, flags | os.O_NONBLOCK, 0o666)
        except FileExistsError:
            raise CheckpointError(f"{path}: exists already (a new journal is never written into another one)") from None
        except OSError as exc:
            raise CheckpointError(f"{path}: cannot write the journal ({exc.strerror})") from None
        try:
            if not _is_regular(fd):
                raise CheckpointError(f"{path}: is not a regular file; a journal must be one")
            os.set_blocking(fd, True)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                raise CheckpointError(f"{path}: another Stepper session is writing this journal; "
                                      "give this one a journal of its own") from None
            except OSError:
                pass  # a file system without locks: the sequence numbers still guard replay
            cut = _ends_mid_line(fd)
            self._handle: IO[str] = open(fd, "a", encoding="utf-8", closefd=True)
        except BaseException:
            os.close(fd)
            raise
        if cut:
            # Close the line a crash left unfinished, so the header starts a line of its own.
            self._handle.write("\n")
        self._write({"journal": "stepper", "version": VERSION, "session": self.session,
                     "model": str(Path(model).resolve()), "digest": digest, "inputs": list(inputs or []),
                     "start": dict(start or {})})

    def append(self, entry: dict[str, Any]) -> None:
        """Write one entry as a line (with the next sequence number) and flush it to disk.

        After :meth:`close` an entry is still appended (the file is opened for
        that line alone): a job that finishes its last step while the session
        is closing must not lose that step from the journal.
        """
        self._seq += 1
        self._write({"seq": self._seq, **entry})

    def _write(self, entry: dict[str, Any]) -> None:
        line = json.dumps(entry, separators=(",", ":"), allow_nan=False) + "\n"
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
        try:
            self._handle.close()
        except OSError:
            pass  # the last flush failed (a full disk): the lines before it are on disk


def _is_regular(fd: int) -> bool:
    import stat

    return stat.S_ISREG(os.fstat(fd).st_mode)


def new_journal_path(folder: Path) -> Path:
    """A journal name in ``folder`` that no other session uses: the time and a random part.

    The file is not created here; :class:`JournalWriter` with ``exclusive=True``
    creates it and fails rather than share it.
    """
    return Path(folder) / f"journal-{datetime.now():%Y%m%d-%H%M%S}-{secrets.token_hex(3)}.jsonl"


def _ends_mid_line(fd: int) -> bool:
    """True when the open file is not empty and its last byte is not a newline."""
    size = os.fstat(fd).st_size
    if size == 0:
        return False
    return os.pread(fd, 1, size - 1) != b"\n"


def is_journal(path: Path) -> bool:
    """True when ``path`` is a regular file whose first line is a Stepper journal header."""
    try:
        fd = open_regular(path, JOURNAL_LIMIT, CheckpointError)
    except CheckpointError:
        return False
    with open(fd, "rb", closefd=True) as handle:
        first = handle.readline(64 * 1024)
    try:
        head = json.loads(first)
    except (ValueError, RecursionError):
        return False
    return isinstance(head, dict) and head.get("journal") == "stepper"


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
    object is an error naming the line. The file must be a regular file of at
    most :data:`JOURNAL_LIMIT` bytes, each line at most :data:`JOURNAL_LINE_LIMIT`.
    """
    fd = open_regular(path, JOURNAL_LIMIT, CheckpointError, noun="journal")
    parsed: list[tuple[int, dict[str, Any] | None]] = []
    with open(fd, "rb", closefd=True) as handle:
        number = 0
        while True:
            raw = handle.readline(JOURNAL_LINE_LIMIT + 1)
            if not raw:
                break
            number += 1
            if not raw.endswith(b"\n"):
                if len(raw) > JOURNAL_LINE_LIMIT:
                    raise CheckpointError(f"{path}: line {number}: longer than {JOURNAL_LINE_LIMIT:,} bytes")
                break  # whatever follows the last newline was not finished
            if not raw.strip():
                continue
            try:
                entry = json.loads(raw.decode("utf-8"), parse_constant=_no_constant)
            except RecursionError:
                raise CheckpointError(f"{path}: line {number}: JSON nested too deeply") from None
            except _NotFinite as exc:
                raise CheckpointError(f"{path}: line {number}: {exc.args[0]} is not a number JSON allows") from None
            except (UnicodeDecodeError, ValueError):
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
    version = header.get("version")
    if version not in READABLE_VERSIONS or isinstance(version, bool):
        raise CheckpointError(f"{path}: line {number}: unsupported journal version {version!r}")
    _check_header(path, number, header)
    entries = [(n, entry) for n, entry in parsed[start + 1 :] if entry is not None]
    if version >= 2:
        for expected, (n, entry) in enumerate(entries, start=1):
            if entry.get("seq") != expected:
                raise CheckpointError(
                    f"{path}: line {n}: lines of more than one session are mixed in this journal "
                    f"(sequence number {entry.get('seq')!r} where {expected} was due); it cannot be replayed")
    return header, entries


class _NotFinite(ValueError):
    pass


def _no_constant(name: str) -> Any:
    raise _NotFinite(name)


def _check_header(path: Path, number: int, header: dict[str, Any]) -> None:
    where = f"{path}: line {number}"

    def error(message: str) -> CheckpointError:
        return CheckpointError(message)

    fields.text(header.get("model"), error, f"{where}: model")
    digest = header.get("digest")
    if digest is not None:
        fields.text(digest, error, f"{where}: digest", 128)
    inputs = header.get("inputs", [])
    if not isinstance(inputs, list):
        raise CheckpointError(f"{where}: inputs: expected a list")
    for i, item in enumerate(inputs):
        fields.table(item, error, f"{where}: inputs[{i}]")
        fields.text(item.get("path"), error, f"{where}: inputs[{i}].path")
        fields.text(item.get("sha256"), error, f"{where}: inputs[{i}].sha256", 128)
    start = fields.table(header.get("start", {}), error, f"{where}: start")
    if "seed" in start:
        fields.whole(start["seed"], error, f"{where}: start.seed", 0, 2**63 - 1)
    if "rate" in start:
        fields.number(start["rate"], error, f"{where}: start.rate", positive=True)
    if "rule" in start:
        fields.text(start["rule"], error, f"{where}: start.rule", 64)
    if "slope_source" in start:
        fields.text(start["slope_source"], error, f"{where}: start.slope_source", 64)
    if start.get("batch_size") is not None:
        fields.whole(start["batch_size"], error, f"{where}: start.batch_size", 1)
