"""A manual change whose new cost cannot be computed leaves the session exactly as it was.

A custom layer may refuse some parameter values by raising (here: a scale that
must stay positive). Setting such a value or perturbing into it must then
change nothing: weights, history, undo stack and journal.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Iterator

import numpy as np
import pytest

from stepper.errors import CustomLayerError
from stepper.formats.journal import read_journal
from stepper.formats.model_file import load_setup
from stepper.session import Session

LAYER = '''
import numpy as np


class ScaledUnits:
    """out = (X @ W) * s, for a per-unit scale s that must stay positive."""

    def __init__(self, n_in, units, options):
        self.n_in = n_in
        self.n_out = units

    def init(self, rng):
        return {"W": rng.normal(0.0, 0.5, (self.n_in, self.n_out)), "s": np.ones(self.n_out)}

    def forward(self, params, X):
        if np.any(params["s"] <= 0.0):
            raise ValueError("scale must stay positive")
        H = X @ params["W"]
        return H * params["s"], (X, H)

    def backward(self, params, cache, dOut):
        X, H = cache
        dH = dOut * params["s"]
        return {"W": X.T @ dH, "s": (dOut * H).sum(axis=0)}, dH @ params["W"].T
'''


@pytest.fixture
def session(custom_model: Callable[..., Path], tmp_path: Path) -> Iterator[Session]:
    model = custom_model(LAYER, "scaled.py", "ScaledUnits")
    opened = Session(load_setup(model), journal=tmp_path / "journal.jsonl")
    yield opened
    opened.close()


def _state(session: Session) -> tuple[bytes, list[object], bool, int]:
    return session.theta.tobytes(), list(session.history), session.can_undo, session.version


def test_set_value_refused_by_the_layer_changes_nothing(session: Session, tmp_path: Path) -> None:
    session.step()
    before = _state(session)
    journal_before = read_journal(tmp_path / "journal.jsonl")[1]
    index = session.net.layout.lookup("L2.s[0]")
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
    index = session.net.layout.lookup("L2.s[1]")
    before = _state(session)
    with pytest.raises(CustomLayerError):
        session.perturb(100.0, [index], seed=4)  # seed 4 draws -65.2: the scale turns negative
    assert session.theta.tobytes() == before[0]
    assert session.history == before[1]
    assert not session.can_undo
    assert np.all(np.isfinite(session.theta))


def test_step_refused_by_the_layer_changes_nothing_and_keeps_the_batch_draw(session: Session) -> None:
    session.set_batch_size(10)
    session.set_rule("gd")
    slopes = session.analytic_slopes()
    scales = [session.net.layout.lookup(f"L2.s[{j}]") for j in range(3)]
    # A rate that sends the scale with the largest positive slope below zero in one step.
    pushed = max(scales, key=lambda i: slopes[i])
    assert slopes[pushed] > 0
    rng_before = session.batch_rng.bit_generator.state
    session.set_rate(10.0 * session.theta[pushed] / slopes[pushed])
    before = _state(session)
    with pytest.raises(CustomLayerError, match="scale must stay positive"):
        session.step()
    assert session.theta.tobytes() == before[0]
    assert session.history == before[1]
    assert session.step_count == 0
    assert session.batch_rng.bit_generator.state == rng_before
