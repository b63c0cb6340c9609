"""Dropout masks and batch norm's running statistics in a session: per step, undone, replayed, saved.

Our own contract (README, "Layers beyond dense"): a dropout mask is drawn once
per step and held for everything computed at that step, so the check is exact;
the validation cost runs without dropout and on batch norm's running
statistics, which move after each step as ``momentum * old + (1 - momentum) *
batch`` (the ONNX BatchNormalization convention) and come back exactly with an
undo, a replay of the journal and a checkpoint. The batch statistics are
recomputed here from Ioffe & Szegedy (2015), Algorithm 1, with plain numpy.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from stepper.commands.replay import replay
from stepper.core.layers import BatchNorm, Dropout
from stepper.formats.model_file import Setup, load_setup
from stepper.session import Session

WriteModel = Callable[..., Path]

MODEL = """\
loss = "mean_squared_error"

[data]
file = "data.csv"
inputs = ["a", "b", "c", "d"]
targets = ["y"]
validation_fraction = 0.25
seed = 3

[init]
scheme = "glorot_uniform"
seed = 5

[[layers]]
units = 6
activation = "tanh"

[[layers]]
type = "batch_norm"
momentum = 0.8

[[layers]]
type = "dropout"
rate = 0.5
seed = 9

[[layers]]
units = 1
activation = "identity"
"""


def data() -> str:
    rng = np.random.default_rng(1)
    X = rng.normal(size=(24, 4))
    y = np.tanh(X @ np.array([0.5, -1.0, 0.3, 0.8])) + 0.1 * rng.normal(size=24)
    return "a,b,c,d,y\n" + "".join(",".join(f"{v:.4f}" for v in row) + f",{t:.4f}\n" for row, t in zip(X, y))


@pytest.fixture
def setup(write_model: WriteModel) -> Setup:
    return load_setup(write_model(MODEL, data()))


def test_the_dropout_mask_holds_within_a_step_and_changes_between_steps(setup: Setup) -> None:
    s = Session(setup, rate=0.05)
    check = s.refresh_check()
    assert check.counts["agree"] == setup.network.n_params  # one mask for cost, analytic and numeric slopes
    theta = s.theta.copy()
    X, Y = setup.data.X, setup.data.Y
    assert s.train_cost() == s.training_net(0).cost(theta, X, Y)
    s.step()
    assert s.step_count == 1
    assert s.training_net(1).cost(theta, X, Y) != s.training_net(0).cost(theta, X, Y)  # a new mask
    check = s.refresh_check()
    assert check.counts["agree"] == setup.network.n_params
    s.undo()
    assert s.train_cost() == s.training_net(0).cost(theta, X, Y)


def test_the_validation_cost_runs_without_dropout_on_the_running_statistics(setup: Setup) -> None:
    s = Session(setup, rate=0.05)
    s.step(3)
    net = setup.network
    dense1, norm, drop, dense2 = net.layers
    assert isinstance(norm, BatchNorm) and isinstance(drop, Dropout)
    p = net.views(s.theta)
    state = net.state_views(s.state)[1]
    H = np.tanh(setup.data.X_val @ p[0]["W"] + p[0]["b"])
    # Ioffe & Szegedy, Algorithm 2: the running mean and variance replace the batch's; dropout is off.
    normed = (H - state["running_mean"]) / np.sqrt(state["running_var"] + norm.epsilon)
    out = (normed * p[1]["scale"] + p[1]["shift"]) @ p[3]["W"] + p[3]["b"]
    assert s.val_cost() == pytest.approx(np.mean((out - setup.data.Y_val) ** 2), rel=1e-12)


def test_running_statistics_move_towards_each_steps_batch(setup: Setup) -> None:
    s = Session(setup, rate=0.05)
    net = setup.network
    before, theta = s.state.copy(), s.theta.copy()
    s.step()
    p = net.views(theta)
    H = np.tanh(setup.data.X @ p[0]["W"] + p[0]["b"])  # the batch norm's input at the step (full batch)
    mean = np.sum(H, axis=0) / H.shape[0]
    var = np.sum((H - mean) ** 2, axis=0) / H.shape[0]
    old = net.state_views(before)[1]
    new = net.state_views(s.state)[1]
    np.testing.assert_allclose(new["running_mean"], 0.8 * old["running_mean"] + 0.2 * mean, rtol=1e-13)
    np.testing.assert_allclose(new["running_var"], 0.8 * old["running_var"] + 0.2 * var, rtol=1e-13)


def test_undo_redo_replay_and_checkpoints_bring_the_running_statistics_back(setup: Setup, tmp_path: Path) -> None:
    journal = tmp_path / "journal.jsonl"
    s = Session(setup, journal=journal, rate=0.05)
    s.step(2)
    after_two, val_two = s.state.copy(), s.val_cost()
    s.set_batch_size(6)
    s.step(3)
    after_five = s.state.copy()
    assert not np.array_equal(after_two, after_five)
    s.undo()
    assert s.state.tobytes() == after_two.tobytes() and s.val_cost() == val_two
    s.redo()
    assert s.state.tobytes() == after_five.tobytes()
    saved = s.save_checkpoint(tmp_path / "ck.safetensors")
    theta_five = s.theta.copy()
    s.reset()
    assert s.state.tobytes() == setup.network.initial_state().tobytes()
    s.close()
    rebuilt = replay(journal)
    assert rebuilt.state.tobytes() == setup.network.initial_state().tobytes()
    rebuilt.undo()  # the reset
    assert rebuilt.state.tobytes() == after_five.tobytes()
    assert rebuilt.theta.tobytes() == theta_five.tobytes()
    fresh = Session(setup)
    fresh.load_checkpoint(saved)
    assert fresh.state.tobytes() == after_five.tobytes()
    assert fresh.step_count == 5
    fresh.undo()
    assert fresh.state.tobytes() == setup.network.initial_state().tobytes()


@pytest.mark.parametrize("batch", [None, 8])
def test_the_range_test_steps_as_the_session_does_with_dropout_and_batch_norm(setup: Setup,
                                                                             batch: int | None) -> None:
    # Our own contract (README, "A rate range test"): each rate takes its steps exactly as a real run
    # would. With dropout and batch norm that means each step's masks, the running statistics moving
    # with every batch, and the validation cost in evaluation (no dropout, running statistics); the
    # reference is the session itself making the same steps.
    session = Session(setup, rate=0.05, batch_size=batch)
    session.step(2)
    result = session.range_test([0.02, 0.3], steps=5)
    start = session.train_cost()
    assert result.start_cost == pytest.approx(start, rel=1e-12)
    for index, rate in enumerate([0.02, 0.3]):
        twin = Session(setup, rate=0.05, batch_size=batch)
        twin.step(2)
        twin.set_rate(rate)
        twin.step(5, watch=False)  # the range test has no runaway rule: compare every step
        assert result.train[index] == pytest.approx(twin.train_cost(), rel=1e-12)
        assert result.val is not None
        assert result.val[index] == pytest.approx(twin.val_cost(), rel=1e-12)


def test_the_rows_of_each_split_run_as_that_splits_cost_does(setup: Setup) -> None:
    # The loss is an average over rows (stepper.core.rows), so the mean of the row losses is the data
    # term of the cost (L2 is 0 here): training rows at the step's dropout masks and batch statistics,
    # validation rows in evaluation (no dropout, the running statistics), as the two costs run.
    session = Session(setup, rate=0.05)
    session.step(3)
    assert float(np.mean(session.rows().loss)) == pytest.approx(session.train_cost(), rel=1e-12)
    val = session.val_cost()
    assert val is not None
    assert float(np.mean(session.rows(validation=True).loss)) == pytest.approx(val, rel=1e-12)
