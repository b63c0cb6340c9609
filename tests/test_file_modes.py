"""One permission policy for the files Stepper writes: 0666 less the umask when new, the old mode kept.

The rule is the POSIX one for a file created with mode 0666 (open(2): "the
mode of the created file is (mode & ~umask)"); a write over an existing file
keeps its mode, as a save by an ordinary editor does (common practice).
"""

from __future__ import annotations

import os
import stat
from pathlib import Path
from typing import Iterator

import pytest

from stepper.formats.atomic import current_umask, write_atomic
from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model
from stepper.session import Session

pytestmark = pytest.mark.skipif(os.name != "posix", reason="file modes are POSIX")


@pytest.fixture
def umask_027() -> Iterator[None]:
    old = os.umask(0o027)
    try:
        yield
    finally:
        os.umask(old)


def mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def test_the_umask_is_read_without_changing_it(umask_027: None) -> None:
    assert current_umask() == 0o027
    assert current_umask() == 0o027


def test_checkpoints_and_journals_are_created_0666_less_the_umask(tmp_path: Path, umask_027: None) -> None:
    session = Session(load_setup(default_model()), journal=tmp_path / "journal.jsonl")
    session.step()
    checkpoint = session.save_checkpoint(tmp_path / "ck.safetensors")
    session.close()
    assert mode(checkpoint) == 0o640
    assert mode(tmp_path / "journal.jsonl") == 0o640


def test_a_file_written_over_keeps_its_mode(tmp_path: Path, umask_027: None) -> None:
    target = tmp_path / "ck.safetensors"
    target.write_bytes(b"old")
    target.chmod(0o600)
    write_atomic(target, b"new")
    assert target.read_bytes() == b"new" and mode(target) == 0o600
    target.unlink()  # a checkpoint is saved only over a checkpoint (the output guard)
    session = Session(load_setup(default_model()))
    session.save_checkpoint(target)
    target.chmod(0o644)
    session.save_checkpoint(target)
    assert mode(target) == 0o644
