"""The guard every output passes: an output never destroys an input.

Every command and the app call :func:`check_output` before they write a file
(a checkpoint, a journal, a plot, a log). It refuses, with a UsageError that
names the file and why:

- a path that is one of the session's inputs: the model file, its data, a
  custom layer's code, a weights file it imports, a journal being read, a
  checkpoint being loaded (compared by file identity, so another spelling of
  the same path, or a hard link, is caught too);
- a symbolic link, a folder, a device, a FIFO: anything that is not a regular
  file (an atomic save renames over its target, which would replace the link
  or the device node itself);
- for a checkpoint, an existing file that is not a Stepper checkpoint; for a
  journal, an existing file that is not a Stepper journal.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path
from typing import Iterable

from stepper.errors import UsageError

#: What an output is, for the extra check on an existing file.
KINDS = ("checkpoint", "journal", "text")


def check_output(path: Path, inputs: Iterable[tuple[str, Path]], kind: str = "text",
                 option: str | None = None) -> None:
    """Refuse to write ``path`` if that would destroy an input (see the module docstring).

    ``inputs`` pairs a role ("the model file", "the data file", ...) with a path;
    ``option`` (e.g. ``--save``) is named in the message when given.
    """
    assert kind in KINDS, kind
    path = Path(path)
    label = f"{option} {path}" if option else str(path)
    try:
        info = path.lstat()
    except FileNotFoundError:
        info = None
    except OSError as exc:
        raise UsageError(f"{label}: cannot be written ({exc.strerror or exc})") from None
    if info is not None:
        if stat.S_ISLNK(info.st_mode):
            raise UsageError(f"{label}: is a symbolic link; Stepper never writes through one "
                             "(give the real path, or another name)")
        if stat.S_ISDIR(info.st_mode):
            raise UsageError(f"{label}: is a folder; give a file name")
        if not stat.S_ISREG(info.st_mode):
            raise UsageError(f"{label}: is not a regular file; Stepper writes only regular files")
        for role, source in inputs:
            if _same(path, Path(source)):
                raise UsageError(f"{label}: is {role}; an output never replaces an input "
                                 "(choose another path)")
        if kind == "checkpoint" and info.st_size > 0:
            from stepper.formats.checkpoint import is_checkpoint

            if not is_checkpoint(path):
                raise UsageError(f"{label}: exists and is not a Stepper checkpoint; Stepper replaces "
                                 "only its own checkpoints (choose another path, or remove the file first)")
        if kind == "journal" and info.st_size > 0:
            from stepper.formats.journal import is_journal

            if not is_journal(path):
                raise UsageError(f"{label}: exists and is not a Stepper journal; Stepper appends only "
                                 "to its own journals (choose another path)")
    else:
        # Not there yet: still refuse a name that resolves onto an input (e.g. through a linked folder).
        for role, source in inputs:
            if _resolved(path) == _resolved(Path(source)):
                raise UsageError(f"{label}: is {role}; an output never replaces an input (choose another path)")


def _same(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except (OSError, ValueError):
        return _resolved(a) == _resolved(b)


def _resolved(path: Path) -> Path:
    try:
        return path.resolve()
    except (OSError, RuntimeError):
        return path.absolute()
