"""End to end: the real ``stepper open`` in an 80x24 tmux pane, driven by keys.

Runs the stepper entry point of the interpreter running the tests (its venv's
bin folder), so it checks what a user gets after ``pip install``. Each run uses
its own tmux session name and kills only that session.
"""

from __future__ import annotations

import os
import shlex
import shutil
import subprocess
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import pytest

from stepper.formats.model_file import load_setup
from stepper.commands.replay import replay
from stepper.scenarios import default_model
from stepper.session import Session

STEPPER = Path(sys.executable).parent / "stepper"

pytestmark = [
    pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux is not installed"),
    pytest.mark.skipif(not STEPPER.exists(), reason=f"no stepper entry point next to {sys.executable}"),
]


class Pane:
    """One detached tmux session running one command."""

    def __init__(self, command: str, width: int = 80, height: int = 24) -> None:
        self.name = f"stepper-e2e-{os.getpid()}-{uuid.uuid4().hex[:8]}"
        for _ in range(5):
            # A tmux server whose last session just ended refuses new sessions while it shuts down.
            started = subprocess.run(["tmux", "new-session", "-d", "-s", self.name, "-x", str(width),
                                      "-y", str(height), command], capture_output=True, text=True)
            if started.returncode == 0:
                return
            time.sleep(0.2)
        raise AssertionError(f"tmux could not start a session: {started.stderr}")

    def screen(self) -> str:
        done = subprocess.run(["tmux", "capture-pane", "-p", "-t", self.name], capture_output=True, text=True)
        return done.stdout

    def keys(self, *keys: str, literal: bool = False) -> None:
        subprocess.run(["tmux", "send-keys", "-t", self.name, *(["-l"] if literal else []), *keys], check=True)

    def wait_for(self, text: str, timeout: float = 20.0) -> str:
        """The screen once it shows ``text``; fails with the last screen after ``timeout`` seconds."""
        end = time.monotonic() + timeout
        while True:
            screen = self.screen()
            if text in screen:
                return screen
            if time.monotonic() > end:
                raise AssertionError(f"{text!r} did not appear; the screen was:\n{screen}")
            time.sleep(0.05)

    def wait_gone(self, text: str, timeout: float = 20.0) -> str:
        """The screen once ``text`` has left it."""
        end = time.monotonic() + timeout
        while True:
            screen = self.screen()
            if text not in screen:
                return screen
            if time.monotonic() > end:
                raise AssertionError(f"{text!r} did not go away; the screen was:\n{screen}")
            time.sleep(0.05)

    def answer(self, key: str, prompt: str, proposal: str, text: str) -> None:
        """Press ``key``, wait for the dialog's ``prompt``, clear its ``proposal``, type ``text``, Enter."""
        self.keys(key)
        self.wait_for(prompt)
        self.keys("C-u")
        # The field's own keys run as actions after plain typing: let the clearing land first.
        self.wait_gone(f"▊  {proposal}")
        self.keys(text, literal=True)
        self.keys("Enter")

    def kill(self) -> None:
        subprocess.run(["tmux", "kill-session", "-t", self.name], capture_output=True)


@pytest.mark.parametrize("term,no_color", [("xterm-256color", False), ("xterm", True)])
def test_step_save_and_quit_in_an_80x24_terminal(tmp_path: Path, term: str, no_color: bool) -> None:
    checkpoint = tmp_path / "after three steps.safetensors"
    status_file = tmp_path / "exit-status"
    env = f"TERM={term}" + (" NO_COLOR=1" if no_color else "")
    journal = tmp_path / "journal.jsonl"
    command = (f"env {env} {shlex.quote(str(STEPPER))} open --log {shlex.quote(str(tmp_path / 'open.log'))} "
               f"--journal {shlex.quote(str(journal))}; "
               f"echo $? > {shlex.quote(str(status_file))}; sleep 30")
    pane = Pane(command)
    try:
        pane.wait_for("q quit")  # the footer: the whole first screen is drawn
        first = pane.wait_for("L1.W[0,0]")
        assert "step 0 " in first
        assert "train" in first and "┤" in first  # the cost plot's axis
        assert all(len(line) <= 80 for line in first.splitlines())
        assert len(first.splitlines()) <= 24

        pane.keys("s", "s", "s")
        pane.wait_for("step 3 ")
        pane.keys("#")
        screen = pane.wait_for("37 agree")
        assert " agree " in screen  # the verdict column, as a word
        assert "unsaved" in screen

        pane.keys("w")
        pane.wait_for(".checkpoints")  # the proposed path (beside the model, or here for an installed one)
        pane.keys("C-u")
        # The field's own keys run as actions after plain typing: let the clearing land first.
        pane.wait_gone(".checkpoints")
        pane.keys(str(checkpoint), literal=True)
        pane.wait_for(checkpoint.name)
        pane.keys("Enter")
        screen = pane.wait_for("last: saved")
        assert "unsaved" not in screen

        pane.keys("q")
        end = time.monotonic() + 20
        while not status_file.exists() or not status_file.read_text().strip():
            assert time.monotonic() < end, pane.screen()
            time.sleep(0.05)
        assert status_file.read_text().strip() == "0"
    finally:
        pane.kill()

    # The checkpoint holds exactly the weights of three full-batch gradient descent
    # steps at the default rate, as the session computes them in this process.
    expected = Session(load_setup(default_model()))
    expected.step(3)
    loaded = Session(load_setup(default_model()))
    loaded.load_checkpoint(checkpoint)
    assert loaded.step_count == 3
    assert np.array_equal(loaded.theta, expected.theta)

    # The journal the app kept rebuilds the same state (the crash-recovery path).
    replayed = replay(journal)
    assert replayed.step_count == 3
    assert np.array_equal(replayed.theta, expected.theta)


def _app_command(tmp_path: Path, extra: str = "") -> str:
    return (f"{shlex.quote(str(STEPPER))} open --no-journal --log {shlex.quote(str(tmp_path / 'open.log'))} "
            f"{extra}; sleep 30")


def test_divergence_then_undo_then_the_rate_preview_then_its_best_rate(tmp_path: Path) -> None:
    pane = Pane(_app_command(tmp_path))
    try:
        pane.wait_for("q quit")
        pane.answer("r", "New learning rate", "0.1", "5")
        pane.wait_for("rate 5 ")
        pane.answer("S", "How many steps?", "100", "20")
        # The run stops while the cost is finite, says so, and opens the rate preview.
        screen = pane.wait_for("problem: stopped after")
        assert "Undo is z" in " ".join(screen.split())
        assert "(the rest is in the log)" not in screen
        assert " best" in pane.wait_for("V: best")
        assert all(len(line) <= 80 for line in screen.splitlines())
        pane.keys("z")
        screen = pane.wait_for("step 0 ")
        assert "last: undid" in screen
        pane.keys("V")
        screen = pane.wait_for("last: rate 5 -> ")
        rate = float(screen.split("last: rate 5 -> ")[1].split()[0])
        assert rate < 5
        pane.answer("S", "How many steps?", "20", "20")
        screen = pane.wait_for("step 20 ")
        assert "problem" not in screen
    finally:
        pane.kill()


@pytest.mark.skipif(shutil.which("script") is None, reason="script (util-linux) is not installed")
def test_no_color_sends_no_colour_codes_at_all(tmp_path: Path) -> None:
    # What the app writes, recorded by script(1): the pane's own capture would add its codes.
    record = tmp_path / "typescript"
    inner = f"{shlex.quote(str(STEPPER))} open --no-journal --log {shlex.quote(str(tmp_path / 'open.log'))}"
    pane = Pane(f"env NO_COLOR=1 TERM=xterm-256color script -q -c {shlex.quote(inner)} {shlex.quote(str(record))}; "
                "sleep 30")
    try:
        pane.wait_for("q quit")
        pane.keys("s", "#", "t")
        pane.wait_for("cost along")
        pane.keys("q")
        pane.wait_for("Quit with unsaved changes?")
        pane.keys("y")
        end = time.monotonic() + 20
        while "cost along" not in record.read_text(errors="replace"):
            assert time.monotonic() < end
            time.sleep(0.05)
    finally:
        pane.kill()
    import re

    output = record.read_bytes().decode("utf-8", errors="replace")
    sgr = re.findall(r"\x1b\[([0-9;:]*)m", output)
    assert sgr, "the app drew nothing"
    colour = [p for codes in sgr for p in codes.replace(":", ";").split(";")
              if p and (30 <= int(p) <= 49 or 90 <= int(p) <= 107)]
    assert colour == []
