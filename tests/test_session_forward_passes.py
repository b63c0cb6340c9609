"""One forward pass saved per step: the pass that gives the new cost also gives the next slopes.

The reference is plain gradient descent written out here from its definition
(Goodfellow, Bengio & Courville, *Deep Learning*, 2016, algorithm 8.1:
``theta <- theta - rate * g``), with the cost and slopes of each point taken
from ``Network.cost_and_slopes`` afresh: the session's steps must land on the
same weights and costs bit for bit while running the network forward once per
step on the training set (plus once on the validation rows for their cost).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from stepper.core.network import Network
from stepper.core.rows import row_losses
from stepper.formats.model_file import load_setup
from stepper.session import Session

BAKERY = Path(__file__).resolve().parents[1] / "scenarios" / "bakery-demand" / "model.toml"


@pytest.fixture(scope="module")
def setup():  # type: ignore[no-untyped-def]
    return load_setup(BAKERY)


def counting(monkeypatch: pytest.MonkeyPatch) -> dict[str, int]:
    """Count forward passes by the number of rows they run on."""
    calls: dict[str, int] = {}
    original = Network.forward

    def forward(self: Network, theta: Any, X: Any, start: int = 0) -> Any:
        key = f"{X.shape[-2]} rows"
        calls[key] = calls.get(key, 0) + 1
        return original(self, theta, X, start)

    monkeypatch.setattr(Network, "forward", forward)
    return calls


def test_full_batch_steps_match_plain_descent_with_one_forward_pass_each(setup: Any,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    data = setup.data
    theta = setup.theta0.copy()
    costs = []
    for _ in range(5):
        _, g = setup.network.cost_and_slopes(theta, data.X, data.Y)
        theta = theta + (-0.05 * g)
        costs.append(setup.network.cost(theta, data.X, data.Y))

    s = Session(setup, rate=0.05)
    s.step(1)  # the first step also computes the slopes at the start
    calls = counting(monkeypatch)
    s.step(4)
    assert calls == {f"{data.n_train} rows": 4, f"{data.n_val} rows": 4}
    assert s.theta.tobytes() == theta.tobytes()
    assert [h.train_cost for h in s.history[1:]] == costs
    # The slopes and the rows' losses shown after the last step come from the same pass: no further
    # pass runs on the training rows.
    slopes = s.analytic_slopes()
    rows = s.rows()
    assert calls[f"{data.n_train} rows"] == 4
    assert slopes.tobytes() == setup.network.cost_and_slopes(theta, data.X, data.Y)[1].tobytes()
    assert rows.loss.tobytes() == row_losses(setup.network, theta, data.X, data.Y).loss.tobytes()


def test_mini_batches_still_take_the_cost_on_every_row(setup: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    s = Session(setup, rate=0.05, batch_size=16)
    calls = counting(monkeypatch)
    s.step(3)
    # Slopes on each batch, then the new cost on the training and on the validation rows.
    assert calls == {"16 rows": 3, f"{setup.data.n_train} rows": 3, f"{setup.data.n_val} rows": 3}


def test_numeric_slopes_are_not_taken_from_backpropagation(setup: Any) -> None:
    s = Session(setup, rate=0.05, slope_source="numeric")
    s.step(1)
    assert "slopes" not in s._cache or s._cache["slopes"][0] != s.version
    assert np.isfinite(s.train_cost())
