"""``stepper run``: headless stepping, its options, its JSON report and Ctrl-C.

The weights a run reaches are checked against plain descent recomputed with
slopes from the ``autograd`` package (the update theta <- theta - rate * g is
Goodfellow, Bengio & Courville, *Deep Learning*, 2016, algorithm 8.1). The
rest checks our own command-line contract: exit codes 0/1/2, one line on
stderr for bad input, the documented JSON fields.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper import cli
from stepper.commands.common import StopFlag
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
BAKERY = ROOT / "bakery-demand" / "model.toml"
KILN = ROOT / "kiln-tiny" / "model.toml"

JSON_FIELDS = {
    "schema_version", "model", "steps_requested", "steps_done", "stopped_early", "refused", "runaway", "rate", "rule",
    "slope_source", "batch_size", "cost_before", "cost_after", "validation_before", "validation_after", "moved_most",
    "saved", "l2_term_after", "settings", "rate_used_next", "task", "metrics_before", "metrics_after",
}


def run_json(capsys: pytest.CaptureFixture[str], *argv: str) -> dict[str, Any]:
    code = cli.main(["run", *argv, "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    doc: dict[str, Any] = json.loads(out)
    assert set(doc) == JSON_FIELDS
    return doc


def loaded(checkpoint: Path, model: Path = BAKERY) -> Session:
    s = Session(load_setup(model))
    s.load_checkpoint(checkpoint)
    return s


def test_steps_and_rate_match_descent_recomputed_with_autograd(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    save = tmp_path / "k.safetensors"
    doc = run_json(capsys, str(KILN), "--steps", "40", "--rate", "2.0", "--save", str(save))
    setup = load_setup(KILN)
    X, Y = setup.data.X, setup.data.Y
    blocks = setup.network.layout.blocks

    def cost(theta: np.ndarray) -> np.ndarray:
        W1, b1, W2, b2 = [anp.reshape(theta[b.start : b.stop], b.shape) for b in blocks]
        out = 1.0 / (1.0 + anp.exp(-(anp.dot(anp.tanh(anp.dot(X, W1) + b1), W2) + b2)))
        return 0.5 * anp.sum((out - Y) ** 2) / X.shape[0]

    theta = setup.theta0.copy()
    for _ in range(40):
        theta = theta - 2.0 * grad(cost)(theta)
    assert doc["steps_requested"] == doc["steps_done"] == 40
    assert doc["stopped_early"] is False and doc["refused"] is None
    assert (doc["rate"], doc["rule"], doc["slope_source"], doc["batch_size"]) == (2.0, "gd", "analytic", None)
    assert doc["cost_before"] == pytest.approx(float(cost(setup.theta0)), rel=1e-13)
    assert doc["cost_after"] == pytest.approx(float(cost(theta)), rel=1e-10)
    assert doc["validation_before"] is None and doc["validation_after"] is None
    assert doc["saved"] == str(save)
    np.testing.assert_allclose(loaded(save, KILN).theta, theta, rtol=1e-11, atol=1e-14)
    # moved_most: the five largest moves, largest first, with true before/after values.
    s = loaded(save, KILN)
    moves = [abs(m["to"] - m["from"]) for m in doc["moved_most"]]
    assert len(moves) == 5 and moves == sorted(moves, reverse=True)
    assert max(moves) == pytest.approx(float(np.max(np.abs(s.theta - setup.theta0))), rel=1e-15)
    for m in doc["moved_most"]:
        i = s.net.layout.index_of[m["name"]]
        assert (m["from"], m["to"]) == (float(setup.theta0[i]), float(s.theta[i]))


def test_rule_slopes_batch_and_freeze(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    save = tmp_path / "b.safetensors"
    doc = run_json(capsys, str(BAKERY), "--steps", "6", "--rate", "0.01", "--rule", "adam", "--slopes", "numeric",
                   "--batch", "25", "--seed", "2", "--freeze", "L1.b[*]", "--freeze", "L2.W[3,0]", "--save", str(save))
    assert (doc["rule"], doc["slope_source"], doc["batch_size"]) == ("adam", "numeric", 25)
    assert doc["validation_before"] is not None and doc["validation_after"] is not None
    s = loaded(save)
    frozen = {s.names[i] for i in np.flatnonzero(s.frozen)}
    assert frozen == {f"L1.b[{j}]" for j in range(6)} | {"L2.W[3,0]"}
    assert np.array_equal(s.theta[s.frozen], s.setup.theta0[s.frozen])
    assert not any(m["name"] in frozen for m in doc["moved_most"])
    # The same in a Session, with the analytic slopes instead: very close.
    ref = Session(load_setup(BAKERY), rate=0.01, seed=2)
    ref.set_rule("adam")
    ref.set_batch_size(25)
    ref.freeze_matching("L1.b[*]")
    ref.freeze_matching("L2.W[3,0]")
    ref.step(6)
    np.testing.assert_allclose(s.theta, ref.theta, rtol=1e-6, atol=1e-9)


def test_a_batch_larger_than_the_data_is_the_full_batch(capsys: pytest.CaptureFixture[str]) -> None:
    doc = run_json(capsys, str(KILN), "--steps", "2", "--batch", "1000")
    assert doc["batch_size"] is None


def test_resume_continues_exactly(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    half, whole, again = tmp_path / "half.safetensors", tmp_path / "whole.safetensors", tmp_path / "again.safetensors"
    common = ["--rule", "momentum", "--batch", "30", "--seed", "5"]
    run_json(capsys, str(BAKERY), "--steps", "16", "--rate", "0.03", *common, "--save", str(whole))
    run_json(capsys, str(BAKERY), "--steps", "9", "--rate", "0.03", *common, "--save", str(half))
    # Without --rate and --rule, the checkpoint's are used (and the momentum memory kept).
    doc = run_json(capsys, str(BAKERY), "--steps", "7", "--resume", str(half), "--save", str(again))
    assert (doc["rate"], doc["rule"], doc["batch_size"]) == (0.03, "momentum", 30)
    a, b = loaded(whole), loaded(again)
    assert a.theta.tobytes() == b.theta.tobytes()
    assert a.rule_state.equals(b.rule_state)
    assert a.history == b.history
    assert b.step_count == 16


def test_text_report(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    save = tmp_path / "t.safetensors"
    code = cli.main(["run", str(BAKERY), "--steps", "10", "--rate", "0.05", "--batch", "40", "--save", str(save)])
    out, err = capsys.readouterr()
    assert code == 0
    lines = out.splitlines()
    assert lines[0] == "10 of 10 steps: gd, rate 0.05, analytic slopes, batches of 40 (epoch 2: 192 of 192 rows used)"
    assert lines[1].startswith("train cost  ") and " -> " in lines[1]
    assert lines[2].startswith("validation  ")
    assert lines[3].startswith("train       R2 ") and " -> R2 " in lines[3]
    assert lines[4].startswith("validation  R2 ") and "MAE" in lines[4]
    assert lines[5] == "moved most:"
    assert len(lines[6:11]) == 5 and all(line.startswith("  L") for line in lines[6:11])
    assert lines[-1] == f"saved {save}"
    assert "step 10/10" in err  # progress lines when stderr is not a terminal


@pytest.mark.parametrize("argv, message", [
    (["--rate", "-1"], "'-1' must be a positive number"),
    (["--rate", "fast"], "'fast' is not a number"),
    (["--steps", "-1"], "'-1' must be 0 or more"),
    (["--l2", "-0.1"], "'-0.1' must be a number, 0 or more"),
    (["--weight-decay", "much"], "'much' is not a number"),
    (["--clip-norm", "0"], "'0' must be a positive number"),
    (["--schedule", "cosine"], "'cosine': a cosine schedule needs steps"),
    (["--schedule", "cosine:steps=10,tilt=2"], "tilt: a cosine schedule takes no such key"),
    (["--rule", "newton"], "invalid choice: 'newton'"),
    (["--slopes", "guessed"], "invalid choice: 'guessed'"),
    (["--freeze", "L9.*"], "no parameter name matches 'L9.*'"),
    (["--batch", "0"], "'0' must be at least 1"),
])
def test_bad_options_exit_2_with_one_line(capsys: pytest.CaptureFixture[str], argv: list[str], message: str) -> None:
    code = cli.main(["run", str(KILN), *argv])
    out, err = capsys.readouterr()
    assert code == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1 and err.startswith("stepper: ")
    assert message in err


def test_stop_flag_first_asks_then_interrupts(capsys: pytest.CaptureFixture[str]) -> None:
    flag = StopFlag()
    assert not flag.requested
    flag(signal.SIGINT, None)
    assert flag.requested
    assert "stopping after the current step" in capsys.readouterr().err
    with pytest.raises(KeyboardInterrupt):
        flag(signal.SIGINT, None)


#: Runs ``stepper run`` and says on stderr when the first step is made, so the
#: test knows the Ctrl-C handler is in place before it sends SIGINT.
_RUNNER = """
import sys
from contextlib import contextmanager
import stepper.commands.run as run
original = run.progress_bar

@contextmanager
def progress(label, lines=False):
    with original(label, lines) as inner:
        def report(done, total_):
            if done == 1:
                print("first step made", file=sys.stderr, flush=True)
            inner(done, total_)
        yield report

run.progress_bar = progress
from stepper.cli import main
sys.exit(main(sys.argv[1:]))
"""


@pytest.mark.skipif(sys.platform == "win32", reason="SIGINT to a child process is POSIX")
def test_ctrl_c_stops_after_the_current_step_and_still_saves(tmp_path: Path) -> None:
    save = tmp_path / "stopped.safetensors"
    steps = 10_000_000
    child = subprocess.Popen(
        [sys.executable, "-c", _RUNNER, "run", str(BAKERY), "--steps", str(steps), "--rate", "0.01",
         "--save", str(save), "--json"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    try:
        assert child.stderr is not None
        line = child.stderr.readline()
        assert line.strip() == "first step made", line + child.stderr.read()
        child.send_signal(signal.SIGINT)
        out, err = child.communicate(timeout=60)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    assert child.returncode == 0, err
    assert "stopping after the current step" in err
    doc = json.loads(out)
    assert doc["stopped_early"] is True
    assert 1 <= doc["steps_done"] < steps
    assert doc["saved"] == str(save)
    s = loaded(save)
    assert s.step_count == doc["steps_done"]
    assert s.train_cost() == doc["cost_after"]
