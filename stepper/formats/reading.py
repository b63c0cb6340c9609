"""Reading files from users: regular files only, with a size limit, and bounded JSON.

Every reader in :mod:`stepper.formats` goes through :func:`read_limited`:

- only a regular file is read: a FIFO would block for ever, ``/dev/zero``
  would never end, a folder is not a file. The file is opened without
  blocking (``O_NONBLOCK``, so even opening a FIFO with no writer returns at
  once) and checked with ``fstat`` on the open descriptor, so what is checked
  is what is read;
- at most ``limit`` bytes are read; a longer file is refused before its
  content is read, and a file that grows while it is read is refused too.

:func:`loads_json` parses JSON and turns the interpreter's RecursionError on
deeply nested text into a plain error, and turns the non-standard constants
``NaN``, ``Infinity`` and ``-Infinity`` (which Python's parser accepts) into
errors as well: no number read from a file is ever infinite by surprise.
"""

from __future__ import annotations

import contextvars
import hashlib
import json
import os
import stat
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Callable, Iterator, NoReturn

#: Size limits (bytes) of what Stepper reads. Generous for the small networks and
#: data sets Stepper is for; each one turns a wrong path into a message, not an
#: exhausted machine.
MODEL_FILE_LIMIT = 16 * 1024 * 1024
DATA_FILE_LIMIT = 512 * 1024 * 1024
CODE_FILE_LIMIT = 8 * 1024 * 1024
#: A checkpoint holds at most 10 million float64 parameters three times (weights,
#: Adam's m and v, plus its counts), and the cost history.
CHECKPOINT_LIMIT = 2 * 1024 * 1024 * 1024
JOURNAL_LIMIT = 1024 * 1024 * 1024
#: One journal line (an operation) is a few hundred bytes; a frozen-names list of a
#: large model can be long.
JOURNAL_LINE_LIMIT = 64 * 1024 * 1024


def _fail(error: Callable[[str], Exception], message: str) -> NoReturn:
    raise error(message)


def open_regular(path: Path, limit: int, error: Callable[[str], Exception], label: str | None = None,
                 noun: str = "file") -> int:
    """A descriptor of ``path`` opened for reading, after checking it is a regular file within ``limit``.

    ``error`` builds the exception to raise (a StepperError subclass); messages
    name the file as ``label`` (default: the path) and call it ``noun``
    ("no such model file").
    """
    name = label or str(path)
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except FileNotFoundError:
        _fail(error, f"{name}: no such {noun}")
    except IsADirectoryError:
        _fail(error, f"{name}: is a folder, not a {noun}")
    except (OSError, ValueError) as exc:  # ValueError: a NUL character in the path
        _fail(error, f"{name}: cannot be read ({getattr(exc, 'strerror', None) or exc})")
    try:
        info = os.fstat(fd)
        if stat.S_ISDIR(info.st_mode):
            _fail(error, f"{name}: is a folder, not a {noun}")
        if not stat.S_ISREG(info.st_mode):
            _fail(error, f"{name}: is not a regular file ({_kind(info.st_mode)}); Stepper reads only regular files")
        if info.st_size > limit:
            _fail(error, f"{name}: is {_size(info.st_size)}, more than the {_size(limit)} Stepper reads "
                         "from such a file")
        # Blocking again for the reads themselves (a regular file never blocks anyway).
        os.set_blocking(fd, True)
    except BaseException:
        os.close(fd)
        raise
    return fd


def read_limited(path: Path, limit: int, error: Callable[[str], Exception], label: str | None = None,
                 noun: str = "file") -> bytes:
    """The bytes of regular file ``path``, at most ``limit`` of them (see the module docstring)."""
    name = label or str(path)
    fd = open_regular(path, limit, error, label, noun)
    with open(fd, "rb", closefd=True) as handle:
        try:
            data = handle.read(limit + 1)
        except OSError as exc:
            _fail(error, f"{name}: cannot be read ({exc.strerror or exc})")
    if len(data) > limit:
        _fail(error, f"{name}: grew past {_size(limit)} while it was read")
    record_read(path, data)
    return data


_reads: contextvars.ContextVar[list[tuple[Path, str]] | None] = contextvars.ContextVar("stepper_reads", default=None)


@contextmanager
def collect_reads() -> Iterator[list[tuple[Path, str]]]:
    """Inside, every file read through this module is listed as ``(resolved path, sha256)``.

    A model file's loader wraps itself in it, so the setup knows every file it was
    built from (data, code, weights), whichever reader read it; journals record
    them and a replay checks them.
    """
    reads: list[tuple[Path, str]] = []
    token = _reads.set(reads)
    try:
        yield reads
    finally:
        _reads.reset(token)


def record_read(path: Path, data: bytes) -> None:
    """Note a file's bytes for :func:`collect_reads` (readers that do not use :func:`read_limited` call it)."""
    reads = _reads.get()
    if reads is not None:
        try:
            resolved = Path(path).resolve()
        except (OSError, RuntimeError):
            resolved = Path(path).absolute()
        reads.append((resolved, hashlib.sha256(data).hexdigest()))


def read_text(path: Path, limit: int, error: Callable[[str], Exception], label: str | None = None,
              noun: str = "file") -> str:
    """A regular file's text, UTF-8 with an optional byte-order mark (which is dropped)."""
    name = label or str(path)
    data = read_limited(path, limit, error, label, noun)
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError:
        _fail(error, f"{name}: not UTF-8 text")


def loads_json(text: str | bytes, error: Callable[[str], Exception], where: str) -> Any:
    """``json.loads`` that raises ``error("{where}: ...")`` for bad, too deeply nested or non-finite JSON."""
    try:
        return json.loads(text, parse_constant=_refuse_constant)
    except RecursionError:
        _fail(error, f"{where}: JSON nested too deeply")
    except _NotFinite as exc:
        _fail(error, f"{where}: {exc.args[0]} is not a number JSON allows")
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        _fail(error, f"{where}: not valid JSON ({exc})")


class _NotFinite(ValueError):
    pass


def _refuse_constant(name: str) -> Any:
    raise _NotFinite(name)


def _kind(mode: int) -> str:
    if stat.S_ISFIFO(mode):
        return "a FIFO"
    if stat.S_ISCHR(mode):
        return "a character device"
    if stat.S_ISBLK(mode):
        return "a block device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a plain file"


def _size(n: int) -> str:
    for unit, scale in (("GiB", 1024**3), ("MiB", 1024**2), ("KiB", 1024)):
        if n >= scale:
            return f"{n / scale:.1f} {unit}".replace(".0 ", " ")
    return f"{n} bytes"
