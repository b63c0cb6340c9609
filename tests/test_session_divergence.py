"""A step that would make a weight or the cost non-finite is refused, and nothing of it remains.

IEEE 754 float64 overflows past about 1.8e308 (numpy.finfo(float64).max, a
textbook fact of the format); gradient descent at rate 1e30 on the bakery
scenario's squared-error loss gets there within a few steps. These tests check
our own contract: the refusal names weights, points to the rate preview, and
leaves the session exactly as it was before the refused step. The runaway rule
(tests/test_session_runaway.py) would stop these jobs earlier, so it is off here.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stepper import cli
from stepper.errors import DivergenceError
from stepper.formats.model_file import load_setup
from stepper.session import RUN_ON, Session

BAKERY = Path(__file__).resolve().parents[1] / "scenarios" / "bakery-demand" / "model.toml"


@pytest.fixture(scope="module")
def setup():  # type: ignore[no-untyped-def]
    return load_setup(BAKERY)


def diverge(s: Session, n: int = 30) -> DivergenceError:
    s.set_runaway(RUN_ON)
    with pytest.raises(DivergenceError) as info:
        s.step(n)
    return info.value


def test_huge_rate_is_refused_with_names_and_a_smaller_rate(setup) -> None:  # type: ignore[no-untyped-def]
    s = Session(setup, rate=1e30)
    error = diverge(s)
    assert error.exit_code == 1
    assert error.names, "the refusal must name the weights involved"
    for name in error.names:
        assert name in s.names
        assert name in error.message
    assert 0 < s.step_count < 30
    done = s.step_count
    assert error.message == (
        f"step {done + 1} of 30 refused at rate 1e+30: {error.message.split(': ', 1)[1].split(';')[0]}; the "
        f"{done} steps before it are kept (one undo takes them all back). The rate preview shows the cost after one step "
        "at smaller rates.")
    assert "e.g." not in error.message
    # The last action says what happened, in one sentence without the advice.
    assert s.last_action == error.what
    assert error.what.startswith(f"step {done + 1} of 30 refused at rate 1e+30: ")


def test_state_is_as_before_the_refused_step(setup) -> None:  # type: ignore[no-untyped-def]
    s = Session(setup, rate=1e30)
    error = diverge(s)
    done = s.step_count
    # The same steps made again without the refused one: identical state.
    again = Session(setup, rate=1e30)
    again.set_runaway(RUN_ON)
    again.step(done)
    assert s.theta.tobytes() == again.theta.tobytes()
    assert s.rule_state.equals(again.rule_state)
    assert s.history == again.history
    assert np.all(np.isfinite(s.theta))
    # The steps made before the refusal are one undoable operation.
    assert s.last_action is not None and f"step {done + 1} of 30 refused" in s.last_action
    s.undo()
    assert s.theta.tobytes() == setup.theta0.tobytes()
    # A second try is refused at once and changes nothing.
    s.redo()
    theta = s.theta.copy()
    with pytest.raises(DivergenceError) as second:
        s.step()
    assert second.value.message == (f"{error.what.replace(f'step {done + 1} of 30 refused', 'step refused')}; "
                                    "nothing changed. The rate preview shows the cost after one step at smaller "
                                    "rates.")
    assert s.theta.tobytes() == theta.tobytes()
    assert s.step_count == done


@pytest.mark.parametrize("rule", ["gd", "momentum", "adam"])
def test_refusal_keeps_the_rule_memory(setup, rule: str) -> None:  # type: ignore[no-untyped-def]
    s = Session(setup, rate=0.01)
    s.set_rule(rule)
    s.step(5)
    theta, state, history = s.theta.copy(), s.rule_state.copy(), list(s.history)
    # Adam moves each weight by about the rate, so the rate itself must be
    # near the largest float64 for the step to overflow.
    s.set_rate(1e300)
    diverge(s, 3)
    assert s.theta.tobytes() == theta.tobytes()
    assert s.rule_state.equals(state)
    assert s.history == history
    assert s.step_count == 5


def test_refused_mini_batch_step_takes_back_its_draw(setup) -> None:  # type: ignore[no-untyped-def]
    # The journal records only the steps made; a replay must draw the same
    # batches afterwards, so the refused step's draw must not count.
    s = Session(setup, rate=1e30, seed=4)
    s.set_batch_size(16)
    diverge(s)
    again = Session(setup, rate=1e30, seed=4)
    again.set_runaway(RUN_ON)
    again.set_batch_size(16)
    again.step(s.step_count)
    assert s.batch_rng.bit_generator.state == again.batch_rng.bit_generator.state
    s.set_rate(0.01)
    again.set_rate(0.01)
    s.step(5)
    again.step(5)
    assert s.theta.tobytes() == again.theta.tobytes()


def test_cli_run_with_a_huge_rate_exits_1_with_the_message(capsys: pytest.CaptureFixture[str]) -> None:
    code = cli.main(["run", str(BAKERY), "--rate", "1e30", "--steps", "30", "--run-on"])
    out, err = capsys.readouterr()
    assert code == 1
    last = err.strip().splitlines()[-1]
    assert last.startswith("stepper: ")
    assert "refused at rate 1e+30" in last
    assert last.endswith("; try a smaller --rate (the app's rate preview compares rates)")
    assert "Traceback" not in err
    assert "of 30 steps" in out
