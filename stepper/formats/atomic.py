"""Writing files so that an interrupted write never damages the previous version.

File permissions, one policy for every file Stepper writes (checkpoints here,
journals in :mod:`.journal`): a new file gets mode ``0666`` less the umask, as
files written by ordinary programs do (with the usual umask 022,
``-rw-r--r--``); a file written over keeps the mode it had. Make files private
with the umask (``umask 077``).
"""

from __future__ import annotations

import os
import stat
import tempfile
from pathlib import Path


def current_umask() -> int:
    """The process's umask, read without changing it where the system allows (Linux's /proc)."""
    try:
        with open("/proc/self/status", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)  # elsewhere: read it by setting it, then put it back at once
    os.umask(mask)
    return mask


def new_file_mode(path: Path) -> int:
    """The mode a file written to ``path`` gets: the mode it has now, or ``0666`` less the umask."""
    try:
        info = os.stat(path)
    except OSError:
        return 0o666 & ~current_umask()
    return stat.S_IMODE(info.st_mode) if stat.S_ISREG(info.st_mode) else 0o666 & ~current_umask()


def write_atomic(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path``: temporary file, flush to disk, rename over.

    If anything fails before the rename, the old file (if any) is untouched and
    the temporary file is removed.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    folder.mkdir(parents=True, exist_ok=True)
    mode = new_file_mode(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        os.fchmod(fd, mode)  # mkstemp makes it private; the policy above decides instead
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    try:
        dir_fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dir_fd)
    except OSError:
        pass
    finally:
        os.close(dir_fd)
