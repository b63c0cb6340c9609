"""Writing files so that an interrupted write never damages the previous version.

A file is written to a temporary file in the same folder, flushed to disk,
then renamed over the target. The temporary file's name is our own,
``.NAME.stepper-PID-RANDOM.tmp``: a save killed before the rename leaves it
behind, and the next save into that folder removes every such file whose
process is gone (or that is older than a day), so interrupted saves leave no
litter for long.

File permissions, one policy for every file Stepper writes (checkpoints here,
journals in :mod:`.journal`): a new file gets mode ``0666`` less the umask, as
files written by ordinary programs do (with the usual umask 022,
``-rw-r--r--``); a file written over keeps the mode it had. Make files private
with the umask (``umask 077``).
"""

from __future__ import annotations

import os
import re
import secrets
import stat
import time
from pathlib import Path

#: Temporary files of ours: ``.NAME.stepper-PID-RANDOM.tmp``.
TEMP_NAME = re.compile(r"^\..+\.stepper-(\d+)-[0-9a-f]+\.tmp$")
#: A temporary file older than this is stale even if its process id is in use again.
STALE_SECONDS = 24 * 3600


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


def temp_path(path: Path) -> Path:
    """A fresh temporary name beside ``path``, marked with this process's id."""
    return path.parent / f".{path.name}.stepper-{os.getpid()}-{secrets.token_hex(4)}.tmp"


def remove_stale_temporaries(folder: Path) -> list[Path]:
    """Remove our temporary files in ``folder`` whose writer is gone; returns what was removed."""
    removed: list[Path] = []
    try:
        names = os.listdir(folder)
    except OSError:
        return removed
    now = time.time()
    for name in names:
        match = TEMP_NAME.match(name)
        if match is None:
            continue
        path = folder / name
        pid = int(match[1])
        try:
            info = path.lstat()
        except OSError:
            continue
        if now - info.st_mtime < STALE_SECONDS and (pid == os.getpid() or _alive(pid)):
            continue  # its writer (perhaps another thread of ours) may be writing it right now
        try:
            path.unlink()
            removed.append(path)
        except OSError:
            pass
    return removed


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def write_atomic(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path``: temporary file, flush to disk, rename over.

    If anything fails before the rename, the old file (if any) is untouched and
    the temporary file is removed. Stale temporaries of earlier, interrupted
    saves in the same folder are removed first.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    folder.mkdir(parents=True, exist_ok=True)
    remove_stale_temporaries(folder)
    mode = new_file_mode(path)
    tmp = temp_path(folder / path.name)
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    try:
        os.fchmod(fd, mode)  # the policy above decides the mode, not the umask at this moment
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
