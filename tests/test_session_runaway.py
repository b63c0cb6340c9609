"""A job of steps stops when its cost runs away while still finite (stepper.session.runaway).

The rule is our own and documented in the module: stop once the cost exceeds
``growth`` x its value at the job's start, or once it rose ``rises`` steps in a
row and is above that start. These tests hold the rule to its thresholds from
both sides (a threshold moved by a part in a billion changes the outcome), and
check what a stop keeps and says. The costs that the thresholds are set from
come from the same descent with no rule at all, so the test does not repeat the
code it checks. Plain descent on bakery-demand at rate 0.8 diverges: its cost
rises on every step, about 1.8, 2.5, 4.7, 17, 50, 585 times the start.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stepper import cli
from stepper.commands.replay import replay
from stepper.errors import DivergenceError, RunawayError
from stepper.formats.model_file import Setup, load_setup
from stepper.session import RUN_ON, RunawayRule, Session
from stepper.session.runaway import COST_FLOOR

BAKERY = Path(__file__).resolve().parents[1] / "scenarios" / "bakery-demand" / "model.toml"
KILN = Path(__file__).resolve().parents[1] / "scenarios" / "kiln-tiny" / "model.toml"
RATE = 0.8


@pytest.fixture(scope="module")
def setup() -> Setup:
    return load_setup(BAKERY)


@pytest.fixture(scope="module")
def free_costs(setup: Setup) -> np.ndarray:
    """Training cost at the start and after each of 8 steps at RATE, with no runaway rule."""
    s = Session(setup, rate=RATE)
    s.set_runaway(RUN_ON)
    s.step(8)
    return np.array([h.train_cost for h in s.history])


def stops_after(setup: Setup, rule: RunawayRule, n: int = 8) -> int:
    """How many steps a job of ``n`` at RATE makes under ``rule`` before it stops (n if it never does)."""
    s = Session(setup, rate=RATE)
    s.set_runaway(rule)
    try:
        s.step(n)
    except RunawayError:
        pass
    return s.step_count


def test_the_descent_used_here_rises_on_every_step(free_costs: np.ndarray) -> None:
    assert np.all(np.diff(free_costs) > 0)
    assert free_costs[5] / free_costs[0] < 1e3 < free_costs[7] / free_costs[0]


@pytest.mark.parametrize("k", [3, 5])
def test_growth_threshold_from_both_sides(setup: Setup, free_costs: np.ndarray, k: int) -> None:
    ratio = free_costs[k] / free_costs[0]
    assert stops_after(setup, RunawayRule(growth=ratio * (1 - 1e-9), rises=None)) == k
    assert stops_after(setup, RunawayRule(growth=ratio * (1 + 1e-9), rises=None)) == k + 1


def test_default_growth_is_a_thousand(setup: Setup, free_costs: np.ndarray) -> None:
    first = int(np.argmax(free_costs / free_costs[0] > 1e3))
    assert stops_after(setup, RunawayRule(rises=None)) == first == 7


@pytest.mark.parametrize("k", [2, 4])
def test_rises_threshold(setup: Setup, k: int) -> None:
    assert stops_after(setup, RunawayRule(growth=None, rises=k)) == k
    assert stops_after(setup, RunawayRule(growth=None, rises=k + 1)) == k + 1


def test_rises_count_only_above_the_start_and_start_afresh() -> None:
    watch = RunawayRule(growth=None, rises=2).watch(1.0)
    # Down, then up twice while still below the start: no stop.
    assert [watch.after(c) for c in (0.5, 0.6, 0.7)] == [None, None, None]
    # The third rise in a row takes it above the start.
    assert watch.after(1.1) == ("the cost rose on each of the last 3 steps, past its value at the start "
                                "(1 -> 1.1)")
    # A fall resets the count.
    watch = RunawayRule(growth=None, rises=2).watch(1.0)
    assert [watch.after(c) for c in (1.2, 1.1, 1.3)] == [None, None, None]
    assert watch.after(1.4) is not None
    # A cost that stays the same is no rise.
    watch = RunawayRule(growth=None, rises=2).watch(1.0)
    assert [watch.after(c) for c in (1.2, 1.2, 1.3)] == [None, None, None]
    assert watch.after(1.4) is not None


def test_growth_compares_with_a_floor_for_a_start_near_zero() -> None:
    watch = RunawayRule(growth=10.0, rises=None).watch(0.0)
    assert watch.after(10 * COST_FLOOR) is None
    assert watch.after(10 * COST_FLOOR * (1 + 1e-9)) is not None


def test_rules_are_checked() -> None:
    with pytest.raises(ValueError, match="above 1"):
        RunawayRule(growth=1.0)
    with pytest.raises(ValueError, match="at least 1"):
        RunawayRule(rises=0)
    assert RunawayRule().describe() == "cost above 1000 x its start, or 30 rises in a row above its start"
    assert RUN_ON.describe() == "off"


# -- what a stop keeps and says ---------------------------------------------------------------


def test_a_stop_keeps_its_steps_as_one_undo_and_says_what_to_do(setup: Setup, free_costs: np.ndarray) -> None:
    s = Session(setup, rate=RATE)
    with pytest.raises(RunawayError) as info:
        s.step(20)
    error = info.value
    assert isinstance(error, DivergenceError) and error.exit_code == 1
    assert s.step_count == 7
    assert [h.train_cost for h in s.history] == pytest.approx(list(free_costs[:8]), rel=1e-12)
    what = (f"stopped after 7 of 20 steps at rate 0.8: the cost grew past 1000 x its value at the start "
            f"({free_costs[0]:.4g} -> {free_costs[7]:.4g})")
    assert error.what == what and s.last_action == what
    assert error.message == (f"{what}; the 7 steps are kept (one undo takes them all back). The rate preview "
                             "shows the cost after one step at smaller rates.")
    s.undo()
    assert s.step_count == 0 and s.theta.tobytes() == setup.theta0.tobytes()


def test_a_single_step_that_runs_away(setup: Setup, free_costs: np.ndarray) -> None:
    s = Session(setup, rate=RATE)
    s.set_runaway(RunawayRule(growth=1.5, rises=None))
    with pytest.raises(RunawayError) as info:
        s.step()
    assert info.value.message == (
        f"the step at rate 0.8 ran away: the cost grew past 1.5 x its value at the start ({free_costs[0]:.4g} "
        f"-> {free_costs[1]:.4g}); it is kept (undo takes it back). The rate preview shows the cost after "
        "one step at smaller rates.")
    assert s.step_count == 1


def test_a_journal_with_a_stopped_job_replays_exactly(setup: Setup, tmp_path: Path) -> None:
    journal = tmp_path / "j.jsonl"
    s = Session(setup, journal=journal, rate=RATE)
    with pytest.raises(RunawayError):
        s.step(20)
    s.close()
    again = replay(journal)
    assert again.step_count == 7
    assert again.theta.tobytes() == s.theta.tobytes()


# -- stepper run ---------------------------------------------------------------------------------


def test_run_stops_with_exit_1_and_one_line(capsys: pytest.CaptureFixture[str], free_costs: np.ndarray) -> None:
    code = cli.main(["run", str(BAKERY), "--rate", "0.8", "--steps", "20"])
    out, err = capsys.readouterr()
    assert code == 1
    assert err.splitlines()[-1] == (
        f"stepper: stopped after 7 of 20 steps at rate 0.8: the cost grew past 1000 x its value at the start "
        f"({free_costs[0]:.4g} -> {free_costs[7]:.4g}); try a smaller --rate (the app's rate preview compares "
        "rates), or --run-on to let it run on")
    assert out.startswith("7 of 20 steps (the cost ran away): gd, rate 0.8")


def test_run_options_set_the_rule(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["run", str(BAKERY), "--rate", "0.8", "--steps", "8", "--run-on", "--json"]) == 0
    assert '"runaway": null' in capsys.readouterr().out
    assert cli.main(["run", str(BAKERY), "--rate", "0.8", "--steps", "8", "--runaway-growth", "1e6"]) == 0
    capsys.readouterr()
    assert cli.main(["run", str(BAKERY), "--rate", "0.8", "--steps", "8", "--runaway-growth", "1e9",
                     "--runaway-rises", "3", "--json"]) == 1
    out, err = capsys.readouterr()
    assert '"steps_done": 3' in out and "the cost rose on each of the last 3 steps" in out
    assert cli.main(["run", str(KILN), "--steps", "5", "--runaway-rises", "0"]) == 0
    capsys.readouterr()


@pytest.mark.parametrize("argv, message", [
    (["--runaway-growth", "1"], "run: argument --runaway-growth: '1' must be above 1"),
    (["--runaway-growth", "inf"], "run: argument --runaway-growth: 'inf' must be a positive number"),
    (["--runaway-rises", "-1"], "run: argument --runaway-rises: '-1' must be 0 (never) or more"),
    (["--runaway-rises", "x"], "run: argument --runaway-rises: 'x' is not a whole number"),
])
def test_bad_rule_options(capsys: pytest.CaptureFixture[str], argv: list[str], message: str) -> None:
    assert cli.main(["run", str(KILN), *argv]) == 2
    assert capsys.readouterr().err == f"stepper: {message}\n"
