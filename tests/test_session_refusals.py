"""A manual change whose new cost cannot be computed leaves the session exactly as it was.

A custom layer may refuse some parameter values by raising (here: a scale that
must stay positive). Setting such a value or perturbing into it must then
change nothing: weights, history, undo stack and journal.
"""

from __future__ import annotations

from pathlib import Path
from typing import Iterator

import numpy as np
import pytest

from stepper.errors import CustomLayerError
from stepper.formats.journal import read_journal
from stepper.formats.model_file import load_setup
from stepper.session import Session

LAYER = '''
import numpy as np


class PositiveScale:
    """out = X * s, elementwise, for a scale s that must stay positive."""

    def __init__(self, n_in, units, options):
        self.n_out = n_in

    def init(self, rng):
        return {"s": np.ones(self.n_out)}

    def forward(self, params, X):
        if np.any(params["s"] <= 0.0):
            raise ValueError("scale must stay positive")
        return X * params["s"], X

    def backward(self, params, cache, dOut):
        X = cache
        return {"s": (dOut * X).sum(axis=0)}, dOut * params["s"]
'''

MODEL = '''
loss = "mean_squared_error"

[data]
file = "data.csv"
inputs = ["a", "b"]
targets = ["y"]

[init]
scheme = "glorot_uniform"
seed = 2

[[layers]]
type = "custom"
file = "scale.py"
class = "PositiveScale"

[[layers]]
units = 1
activation = "identity"
'''

# Invented demo rows.
DATA = "a,b,y\n0.5,1.0,0.3\n-0.2,0.4,0.1\n0.9,-0.3,0.5\n"


@pytest.fixture
def session(tmp_path: Path) -> Iterator[Session]:
    (tmp_path / "scale.py").write_text(LAYER)
    (tmp_path / "data.csv").write_text(DATA)
    (tmp_path / "model.toml").write_text(MODEL)
    opened = Session(load_setup(tmp_path / "model.toml"), journal=tmp_path / "journal.jsonl")
    yield opened
    opened.close()


def _state(session: Session) -> tuple[bytes, list[object], bool, int]:
    return session.theta.tobytes(), list(session.history), session.can_undo, session.version


def test_set_value_refused_by_the_layer_changes_nothing(session: Session, tmp_path: Path) -> None:
    session.step()
    before = _state(session)
    journal_before = read_journal(tmp_path / "journal.jsonl")[1]
    index = session.net.layout.lookup("L1.s[0]")
    with pytest.raises(CustomLayerError, match="scale must stay positive"):
        session.set_value(index, -1.0)
    assert session.theta.tobytes() == before[0]
    assert session.history == before[1]
    assert read_journal(tmp_path / "journal.jsonl")[1] == journal_before
    # Undo still takes back the step, the last operation that happened.
    assert session.undo() == "1 step"
    assert session.step_count == 0


def test_perturb_refused_by_the_layer_changes_nothing(session: Session) -> None:
    # Perturbing the scale far below zero makes the layer raise.
    index = session.net.layout.lookup("L1.s[1]")
    before = _state(session)
    with pytest.raises(CustomLayerError):
        session.perturb(100.0, [index], seed=4)  # seed 4 draws -65.2: the scale turns negative
    assert session.theta.tobytes() == before[0]
    assert session.history == before[1]
    assert not session.can_undo
    assert np.all(np.isfinite(session.theta))
