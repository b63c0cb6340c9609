"""Faults: a kill at any moment, a kill during a save, a journal that cannot be written.

Our own contract (no outside reference applies): after ``kill -9`` of a
journaled run, ``stepper replay`` rebuilds every step the journal logged, bit
for bit (compared with the same number of steps made in one go); a save killed
half-way leaves the previous checkpoint or the new one whole, and the next save
into the folder removes the temporary file it left; a journal that fails with
an OSError (a full disk) costs the session nothing and ``--save`` is still written.
"""

from __future__ import annotations

import errno
import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from stepper import cli
from stepper.commands.replay import replay
from stepper.formats import atomic
from stepper.formats.journal import JournalWriter, read_journal
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
BAKERY = ROOT / "bakery-demand" / "model.toml"

posix = pytest.mark.skipif(sys.platform == "win32", reason="kill -9 is POSIX")


def logged_steps(journal: Path) -> int:
    _, entries = read_journal(journal)
    return sum(int(e["n"]) for e in entries if e.get("op") == "step")


def finish(child: subprocess.Popen[str] | subprocess.Popen[bytes]) -> None:
    """The child killed (if still running) and reaped, its pipe closed."""
    if child.poll() is None:
        child.kill()
        child.wait()
    if child.stdout is not None:
        child.stdout.close()


def wait_for(condition, timeout: float = 30.0) -> None:  # type: ignore[no-untyped-def]
    end = time.monotonic() + timeout
    while not condition():
        assert time.monotonic() < end, "timed out"
        time.sleep(0.02)


@posix
@pytest.mark.slow
@pytest.mark.parametrize("attempt", range(3))
def test_kill_9_at_a_random_moment_loses_no_logged_step(tmp_path: Path, attempt: int) -> None:
    journal = tmp_path / "j.jsonl"
    child = subprocess.Popen(
        [sys.executable, "-m", "stepper", "run", str(BAKERY), "--steps", "100000000", "--rate", "0.01",
         "--rule", "momentum", "--batch", "16", "--seed", str(attempt), "--journal", str(journal)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, stdin=subprocess.DEVNULL)
    try:
        wait_for(lambda: journal.exists() and journal.stat().st_size > 0)
        time.sleep(random.Random(attempt).uniform(0.2, 1.2))
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=30)
    finally:
        finish(child)
    n = logged_steps(journal)
    assert n > 0
    rebuilt = replay(journal)
    assert rebuilt.step_count == n
    straight = Session(load_setup(BAKERY), rate=0.01, seed=attempt)
    straight.set_rule("momentum")
    straight.set_batch_size(16)
    straight.step(n)
    assert rebuilt.theta.tobytes() == straight.theta.tobytes()
    assert rebuilt.rule_state.equals(straight.rule_state)
    assert list(rebuilt.history.columns().train) == list(straight.history.columns().train)


def test_steps_of_a_long_job_reach_the_journal_while_it_runs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # Lines every STEP_LINE_SECONDS; with the clock advanced a second per step every step is its own line.
    clock = iter(range(10**6))
    monkeypatch.setattr("stepper.session.stepping.time.monotonic", lambda: float(next(clock)))
    journal = tmp_path / "j.jsonl"
    s = Session(load_setup(BAKERY), journal=journal)
    job = s.iter_steps(5)
    next(job)
    next(job)
    next(job)
    _, entries = read_journal(journal)
    assert [e["n"] for e in entries] == [1, 1]  # two steps made, both on disk already
    assert "continues" not in entries[0] and entries[1]["continues"] is True
    for _ in job:
        pass
    s.close()
    rebuilt = replay(journal)
    assert rebuilt.step_count == 5 and rebuilt.theta.tobytes() == s.theta.tobytes()
    rebuilt.undo()
    assert rebuilt.step_count == 0, "the job's lines replay as one undoable run of steps"


def test_flush_journal_writes_the_steps_a_screen_is_about_to_show(tmp_path: Path) -> None:
    journal = tmp_path / "j.jsonl"
    s = Session(load_setup(BAKERY), journal=journal)
    job = s.iter_steps(50)
    for _ in range(4):
        next(job)
    s.flush_journal()
    assert logged_steps(journal) == 3
    job.close()
    s.close()
    assert logged_steps(journal) == 3


SAVER = """
import sys
import numpy as np
from pathlib import Path
from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.formats.checkpoint import CheckpointData, save_checkpoint
net = Network(1000, [Dense(1000, 2400, ACTIVATIONS["tanh"])], "mean_squared_error")
theta = np.zeros(net.n_params)
target = Path(sys.argv[1])
save_checkpoint(target, net.layout, CheckpointData(theta, {}, {"i": 0}))
print("first", flush=True)
i = 0
while True:
    i += 1
    theta[:] = i
    save_checkpoint(target, net.layout, CheckpointData(theta, {}, {"i": i}))
"""


@posix
@pytest.mark.slow
def test_kill_during_save_keeps_a_whole_checkpoint_and_the_next_save_cleans_up(tmp_path: Path) -> None:
    # 2.4 million weights: each save writes ~19 MB, so a kill lands mid-write.
    from stepper.core.activations import ACTIVATIONS
    from stepper.core.layers import Dense
    from stepper.core.network import Network
    from stepper.formats.checkpoint import CheckpointData, load_checkpoint, save_checkpoint

    target = tmp_path / "ck.safetensors"
    child = subprocess.Popen([sys.executable, "-c", SAVER, str(target)], stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout is not None and child.stdout.readline().strip() == "first"
        wait_for(lambda: any(atomic.TEMP_NAME.match(p.name) for p in tmp_path.iterdir()), timeout=10)
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=30)
    finally:
        finish(child)
    net = Network(1000, [Dense(1000, 2400, ACTIVATIONS["tanh"])], "mean_squared_error")
    data = load_checkpoint(target, net.layout)  # whole: the old one or the new one
    assert (data.theta == data.meta["i"]).all()
    assert any(atomic.TEMP_NAME.match(p.name) for p in tmp_path.iterdir()), "the kill left its temporary file"
    save_checkpoint(tmp_path / "next.safetensors", net.layout, CheckpointData(data.theta, {}, {}))
    assert not [p for p in tmp_path.iterdir() if atomic.TEMP_NAME.match(p.name)]


def test_a_journal_that_fails_costs_nothing_and_save_is_still_written(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    real = JournalWriter._write
    written = {"lines": 0}

    def full_disk(self: JournalWriter, entry: dict[str, object]) -> None:
        written["lines"] += 1
        if written["lines"] > 4:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        real(self, entry)

    monkeypatch.setattr(JournalWriter, "_write", full_disk)
    monkeypatch.setattr("stepper.formats.journal.STEP_LINE_SECONDS", 0.0)
    monkeypatch.setattr("stepper.session.stepping.STEP_LINE_SECONDS", 0.0)
    save = tmp_path / "out.safetensors"
    code = cli.main(["run", str(BAKERY), "--steps", "40", "--rate", "0.05", "--journal", str(tmp_path / "j.jsonl"),
                     "--save", str(save), "--json"])
    out, err = capsys.readouterr()
    assert code == 0
    assert json.loads(out)["steps_done"] == 40
    assert "warning: the journal" in err and "No space left on device" in err
    loaded = Session(load_setup(BAKERY))
    loaded.load_checkpoint(save)
    assert loaded.step_count == 40


def test_a_failing_journal_in_a_session_sets_a_problem_and_keeps_going(tmp_path: Path,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    s = Session(load_setup(BAKERY), journal=tmp_path / "j.jsonl")
    s.step(2)

    def fail(self: JournalWriter, entry: dict[str, object]) -> None:
        raise OSError(errno.EIO, "Input/output error")

    monkeypatch.setattr(JournalWriter, "_write", fail)
    s.set_rate(0.2)
    s.step(3)
    assert s.journal is None and s.journal_problem is not None and "Input/output error" in s.journal_problem
    assert s.step_count == 5 and s.rate == 0.2
    s.save_checkpoint(tmp_path / "kept.safetensors")
