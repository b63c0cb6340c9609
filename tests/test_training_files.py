"""The training settings in files: the model file's ``[training]`` table and checkpoints.

TOML per https://toml.io/en/v1.0.0; a checkpoint keeps every setting and the
last update and gives them back bit for bit (our own contract, as for weights).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Callable

import numpy as np
import pytest
from safetensors import safe_open
from safetensors.numpy import save_file

from stepper.core.schedules import Schedule
from stepper.formats.checkpoint import load_checkpoint
from stepper.formats.model_file import load_setup
from stepper.session import Session
from test_model_file import DATA, MODEL, load_error

WriteModel = Callable[..., Path]

TRAINING = """
[training]
l2 = 0.001
weight_decay = 0.02
clip_norm = 1.5

[training.schedule]
kind = "cosine"
steps = 200
warmup = 10
"""


def test_training_table_sets_the_session(write_model: WriteModel) -> None:
    setup = load_setup(write_model(MODEL + TRAINING, DATA))
    assert setup.network.l2 == 0.001
    s = Session(setup)
    assert (s.l2, s.weight_decay, s.clip_norm) == (0.001, 0.02, 1.5)
    assert s.schedule == Schedule("cosine", steps=200, warmup=10)
    # The cost carries the term: (0.001 / 2) * sum of squared weights.
    weights = setup.theta0[~setup.network.layout.is_bias]
    assert s.penalty() == pytest.approx(0.0005 * float(np.sum(weights**2)), rel=1e-13)


def test_without_the_table_nothing_is_on(write_model: WriteModel) -> None:
    s = Session(load_setup(write_model(MODEL, DATA)))
    assert (s.l2, s.weight_decay, s.clip_norm, s.schedule) == (0.0, 0.0, None, Schedule())


@pytest.mark.parametrize("text,expected", [
    ("[training]\nl2 = -1\n", "training.l2: -1.0 must be a number, 0 or more"),
    ("[training]\nclip_norm = 0\n", "training.clip_norm: 0.0 must be a positive number"),
    ("[training]\nweight_decay = \"some\"\n", "training.weight_decay: expected a number, got the string 'some'"),
    ("[training]\nmomentum = 0.5\n", "training.momentum: unknown key (allowed: clip_norm, l2, schedule, weight_decay)"),
    ("[training.schedule]\nkind = \"cosine\"\n", "training.schedule: a cosine schedule needs steps"),
    ("[training.schedule]\nkind = \"step\"\nevery = 10\nfactor = 2.0\n",
     "training.schedule: factor = 2: the decay factor must be in (0, 1]"),
    ("[training]\nl2 = nan\n", "training.l2: nan must be a number, 0 or more"),
])
def test_mistakes_are_named(write_model: WriteModel, text: str, expected: str) -> None:
    assert load_error(write_model, MODEL + text) == f"model.toml: {expected}"


def test_checkpoint_keeps_every_setting_and_the_last_update(write_model: WriteModel, tmp_path: Path) -> None:
    setup = load_setup(write_model(MODEL, DATA))
    s = Session(setup, rate=0.05, rule="adam")
    s.set_l2(0.003)
    s.set_weight_decay(0.01)
    s.set_clip_norm(0.7)
    s.set_schedule(Schedule("step", every=2, factor=0.5))
    s.step(3)
    path = s.save_checkpoint(tmp_path / "ck.safetensors")
    other = Session(setup)
    other.load_checkpoint(path)
    assert (other.l2, other.weight_decay, other.clip_norm, other.schedule) == (0.003, 0.01, 0.7, s.schedule)
    assert other.last_update is not None and s.last_update is not None
    assert other.last_update.tobytes() == s.last_update.tobytes()
    assert other.train_cost() == s.train_cost()  # the L2 term came back with the weights
    np.testing.assert_array_equal(load_checkpoint(path, setup.network.layout).last_update, s.last_update)
    # Undoing the load takes the settings back too; the fresh session had made no step.
    other.undo()
    assert (other.l2, other.weight_decay, other.clip_norm, other.schedule) == (0.0, 0.0, None, Schedule())
    assert other.last_update is None


def test_an_older_checkpoint_keeps_the_model_files_settings(write_model: WriteModel, tmp_path: Path) -> None:
    # A checkpoint written before these settings existed: no keys, no last_update tensors.
    plain = load_setup(write_model(MODEL, DATA))
    s = Session(plain)
    s.step(2)
    with safe_open(str(s.save_checkpoint(tmp_path / "ck.safetensors")), framework="numpy") as handle:
        meta = json.loads(handle.metadata()["stepper"])
        tensors = {k: handle.get_tensor(k) for k in handle.keys() if not k.startswith("last_update.")}
    for key in ("l2", "weight_decay", "clip_norm", "schedule"):
        del meta[key]
    older = tmp_path / "older.safetensors"
    save_file(tensors, str(older), metadata={"stepper": json.dumps(meta)})
    with_training = Session(load_setup(write_model(MODEL + TRAINING, DATA, name="with.toml")))
    with_training.load_checkpoint(older)
    assert (with_training.l2, with_training.weight_decay, with_training.clip_norm) == (0.001, 0.02, 1.5)
    assert with_training.schedule == Schedule("cosine", steps=200, warmup=10)
    assert with_training.last_update is None
    np.testing.assert_array_equal(with_training.theta, s.theta)


def test_tracked_metrics_are_kept_in_checkpoints(tmp_path: Path) -> None:
    # The main figure recorded per step comes back with the history; accuracy by scikit-learn.
    from sklearn.metrics import accuracy_score

    setup = load_setup(Path(__file__).resolve().parents[1] / "scenarios" / "seed-sorter" / "model.toml")
    s = Session(setup, rate=0.5)
    s.step(2)
    s.set_track_metrics(True)
    s.step(3)
    said = np.argmax(s.net.predict(s.theta, setup.data.X), axis=1)
    assert s.history[-1].train_metric == pytest.approx(accuracy_score(np.argmax(setup.data.Y, axis=1), said))
    assert s.history[2].train_metric is None and s.history[3].train_metric is not None
    other = Session(setup)
    other.load_checkpoint(s.save_checkpoint(tmp_path / "m.safetensors"))
    assert [h.train_metric for h in other.history] == [h.train_metric for h in s.history]
    assert [h.val_metric for h in other.history] == [h.val_metric for h in s.history]
