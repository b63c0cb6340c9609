"""Undo and redo: every operation can be taken back and done again, exactly, many levels deep.

"Exactly" means bit for bit: the weights, the frozen mask, the update rule's
memory (RuleState.equals), the settings, the step count, the cost history and
the mini-batch generator are compared with ==, never with a tolerance. These
are properties of our own design (no outside source needed: an undo either
restores the state or it does not).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest

from stepper.core.optimizers import RuleState
from stepper.core.schedules import Schedule
from stepper.formats.model_file import load_setup
from stepper.session import HistoryEntry, Session

BAKERY = Path(__file__).resolve().parents[1] / "scenarios" / "bakery-demand" / "model.toml"


@dataclass
class State:
    """Everything an undo must bring back."""

    theta: np.ndarray
    frozen: np.ndarray
    rule_state: RuleState
    step_count: int
    rate: float
    slope_source: str
    batch_size: int | None
    history: list[HistoryEntry]
    batch_rng: dict[str, Any]
    train_cost: float
    training: tuple[Any, ...]

    def same_as(self, other: "State") -> bool:
        return (
            self.theta.tobytes() == other.theta.tobytes()
            and np.array_equal(self.frozen, other.frozen)
            and self.rule_state.equals(other.rule_state)
            and self.step_count == other.step_count
            and self.rate == other.rate
            and self.slope_source == other.slope_source
            and self.batch_size == other.batch_size
            and self.history == other.history
            and self.batch_rng == other.batch_rng
            and self.train_cost == other.train_cost
            and self.training == other.training
        )


def state_of(s: Session) -> State:
    return State(s.theta.copy(), s.frozen.copy(), s.rule_state.copy(), s.step_count, s.rate,
                 s.slope_source, s.batch_size, list(s.history), s.batch_rng.bit_generator.state,
                 s.train_cost(), (s.l2, s.weight_decay, s.clip_norm, s.schedule))


@pytest.fixture(scope="module")
def setup():  # type: ignore[no-untyped-def]
    return load_setup(BAKERY)


def started(setup: Any) -> Session:
    """A session with some history and rule memory, so undo has something to get wrong."""
    s = Session(setup, rate=0.05)
    s.set_rule("momentum")
    s.freeze([1, 2])
    s.step(3)
    return s


#: Every undoable operation, each applied to a session already in motion.
OPERATIONS: dict[str, Callable[[Session, Path], None]] = {
    "step": lambda s, tmp: s.step(),
    "n_steps": lambda s, tmp: s.step(7),
    "set_rate": lambda s, tmp: s.set_rate(0.01),
    "set_rule_adam": lambda s, tmp: s.set_rule("adam"),
    "set_rule_gd": lambda s, tmp: s.set_rule("gd"),
    "set_slope_source": lambda s, tmp: s.set_slope_source("numeric"),
    "set_batch_size": lambda s, tmp: s.set_batch_size(16),
    "freeze": lambda s, tmp: s.freeze([0, 5, 9]),
    "unfreeze": lambda s, tmp: s.unfreeze([2]),
    "toggle_freeze_on": lambda s, tmp: s.toggle_freeze([3, 4]),
    "toggle_freeze_off": lambda s, tmp: s.toggle_freeze([1, 2]),
    "freeze_layer": lambda s, tmp: s.freeze_layer(1),
    "freeze_matching": lambda s, tmp: s.freeze_matching("L1.W[0,*]"),
    "perturb_all": lambda s, tmp: s.perturb(0.1),
    "perturb_some_seeded": lambda s, tmp: s.perturb(0.3, [10, 11, 20, 30], seed=5),
    "set_value": lambda s, tmp: s.set_value(7, -1.25),
    "reset": lambda s, tmp: s.reset(),
    "load_checkpoint": lambda s, tmp: load_other(s, tmp),
    "set_l2": lambda s, tmp: s.set_l2(0.05),
    "set_weight_decay": lambda s, tmp: s.set_weight_decay(0.01),
    "set_clip_norm": lambda s, tmp: s.set_clip_norm(0.5),
    "set_schedule": lambda s, tmp: s.set_schedule(Schedule("cosine", steps=50, warmup=5)),
}


def load_other(s: Session, tmp: Path) -> None:
    """Save a quite different state of the same model, then load it into ``s``."""
    other = Session(s.setup, rate=0.02)
    other.set_rule("adam")
    other.set_batch_size(32)
    other.freeze_matching("L2.*")
    other.set_l2(0.02)
    other.set_weight_decay(0.003)
    other.set_clip_norm(2.0)
    other.set_schedule(Schedule("step", every=3, factor=0.5))
    other.step(4)
    path = other.save_checkpoint(tmp / "other.safetensors")
    s.load_checkpoint(path)


@pytest.mark.parametrize("name", list(OPERATIONS))
def test_each_operation_undoes_and_redoes_exactly(setup: Any, tmp_path: Path, name: str) -> None:
    s = started(setup)
    before = state_of(s)
    OPERATIONS[name](s, tmp_path)
    after = state_of(s)
    assert not after.same_as(before), f"{name} changed nothing, so the test proves nothing"
    for _ in range(3):
        assert s.undo() is not None
        assert state_of(s).same_as(before), f"undo of {name}"
        assert s.redo() is not None
        assert state_of(s).same_as(after), f"redo of {name}"


def test_many_levels_deep_and_back(setup: Any, tmp_path: Path) -> None:
    s = started(setup)
    states = [state_of(s)]
    order = list(OPERATIONS) + ["step", "set_rule_adam", "n_steps", "perturb_all", "set_batch_size", "n_steps"]
    assert "set_schedule" in order
    for name in order:
        OPERATIONS[name](s, tmp_path)
        states.append(state_of(s))
    # All the way back, passing through every recorded state in reverse order...
    for level in range(len(order), 0, -1):
        assert s.undo() is not None
        assert state_of(s).same_as(states[level - 1]), f"undo back to level {level - 1} ({order[level - 1]})"
    assert s.can_undo  # the operations of started() are still there
    # ...and all the way forward again.
    for level in range(1, len(order) + 1):
        assert s.redo() is not None
        assert state_of(s).same_as(states[level]), f"redo to level {level} ({order[level - 1]})"
    assert not s.can_redo


def test_undo_all_the_way_to_the_start(setup: Any) -> None:
    s = Session(setup, rate=0.05)
    start = state_of(s)
    s.set_rule("adam")
    s.step(2)
    s.perturb(0.05)
    s.step(3)
    while s.can_undo:
        s.undo()
    assert state_of(s).same_as(start)
    assert s.undo() is None
    assert s.last_action == "nothing to undo"


def test_a_new_operation_clears_redo(setup: Any) -> None:
    s = started(setup)
    s.step(2)
    s.set_rate(0.2)
    s.undo()
    s.undo()
    assert s.can_redo
    s.set_value(0, 0.5)
    assert not s.can_redo
    assert s.redo() is None
    assert s.last_action == "nothing to redo"


def test_cancelled_steps_are_one_undoable_operation(setup: Any) -> None:
    s = started(setup)
    before = state_of(s)
    job = s.iter_steps(50)
    for done, _ in job:
        if done == 4:
            job.close()
            break
    assert s.step_count == before.step_count + 4
    after = state_of(s)
    s.undo()
    assert state_of(s).same_as(before)
    s.redo()
    assert state_of(s).same_as(after)


def test_undo_of_a_step_restores_the_mini_batch_draws(setup: Any) -> None:
    # Undoing mini-batch steps and stepping again draws the same batches again,
    # so the result is the same as the first time.
    s = started(setup)
    s.set_batch_size(10)
    s.step(5)
    first = state_of(s)
    s.undo()
    s.step(5)
    assert state_of(s).same_as(first)


def test_last_update_is_the_last_steps_change_until_an_undo_moves_the_weights(setup: Any) -> None:
    # The last update is a figure to show, not undo state: it is the change the last step made
    # while the weights are that step's result, and there is none once an undo or redo moved them.
    s = Session(setup, rate=0.05)
    assert s.last_update is None
    before = s.theta.copy()
    s.step()
    assert s.last_update is not None
    np.testing.assert_array_equal(s.last_update, s.theta - before)
    s.set_rate(0.02)
    s.undo()  # the rate goes back, the weights stay the last step's result
    assert s.last_update is not None
    s.undo()  # the step goes back
    assert s.last_update is None
    s.redo()
    assert s.last_update is None


@pytest.mark.parametrize("name", list(OPERATIONS))
def test_undo_back_to_the_saved_state_clears_unsaved(setup: Any, tmp_path: Path, name: str) -> None:
    s = started(setup)
    s.save_checkpoint(tmp_path / "saved.safetensors")
    assert not s.dirty
    OPERATIONS[name](s, tmp_path)
    assert s.dirty or name == "load_checkpoint"  # a load is itself a saved state
    s.undo()
    assert not s.dirty, name  # back to exactly what the checkpoint holds
    s.redo()
    assert s.dirty or name == "load_checkpoint"
    s.undo()
    s.undo()  # one further back than the save: unsaved again
    assert s.dirty


def test_a_fresh_session_is_clean_again_after_undoing_everything(setup: Any) -> None:
    s = Session(setup)
    s.step(2)
    s.set_rate(0.3)
    assert s.dirty
    s.undo()
    s.undo()
    assert not s.dirty
    assert "step counter stays at 0" in (s.reset() or s.last_action or "")
