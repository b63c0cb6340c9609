"""Stepping on numeric slopes, and stepping on seeded mini-batches.

Central differences have truncation error O(h^2) (Press et al., *Numerical
Recipes*, 3rd ed., 2007, section 5.7), so descent on numeric slopes must follow
descent on backpropagated slopes to many digits. Mini-batch descent uses the
slope of the cost on the drawn samples only (Goodfellow, Bengio & Courville,
*Deep Learning*, 2016, algorithm 8.1: "sample a minibatch ... compute gradient
estimate on the minibatch"); the draw itself is our own design (a seeded
choice without replacement), re-done here with numpy's documented Generator.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import approx_fprime

from stepper.errors import UsageError
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"


@pytest.fixture(scope="module")
def bakery():  # type: ignore[no-untyped-def]
    return load_setup(ROOT / "bakery-demand" / "model.toml")


@pytest.mark.parametrize("rule, rate", [("gd", 0.1), ("momentum", 0.05), ("adam", 0.01)])
def test_numeric_steps_follow_analytic_steps(bakery, rule: str, rate: float) -> None:  # type: ignore[no-untyped-def]
    analytic = Session(bakery, rate=rate)
    numeric = Session(bakery, rate=rate)
    for s in (analytic, numeric):
        s.set_rule(rule)
    numeric.set_slope_source("numeric")
    analytic.step(15)
    numeric.step(15)
    np.testing.assert_allclose(numeric.theta, analytic.theta, rtol=1e-7, atol=1e-9)
    costs_a = [h.train_cost for h in analytic.history]
    costs_n = [h.train_cost for h in numeric.history]
    np.testing.assert_allclose(costs_n, costs_a, rtol=1e-8)
    assert costs_n[-1] < costs_n[0]


def test_one_numeric_step_is_minus_rate_times_finite_differences(bakery) -> None:  # type: ignore[no-untyped-def]
    # Reference slopes from SciPy's own finite differences (forward, step 1e-7),
    # which agree with central differences to about 1e-6 relative.
    s = Session(bakery, rate=0.1)
    s.set_slope_source("numeric")
    data = bakery.data
    theta0 = s.theta.copy()

    def cost(theta: np.ndarray) -> float:
        return s.net.cost(theta, data.X, data.Y)

    reference = approx_fprime(theta0, cost, 1e-7)
    s.step()
    np.testing.assert_allclose((s.theta - theta0) / -0.1, reference, rtol=1e-4, atol=1e-6)


def test_mini_batch_steps_are_reproducible_from_the_seed(bakery) -> None:  # type: ignore[no-untyped-def]
    runs = []
    for seed in (3, 3, 4):
        s = Session(bakery, rate=0.1, seed=seed)
        s.set_batch_size(16)
        s.step(20)
        runs.append(s.theta.copy())
    assert runs[0].tobytes() == runs[1].tobytes()
    assert not np.array_equal(runs[0], runs[2])


def test_a_mini_batch_step_uses_the_slopes_of_the_drawn_samples(bakery) -> None:  # type: ignore[no-untyped-def]
    s = Session(bakery, rate=0.1, seed=9)
    s.set_batch_size(12)
    # Epoch-wise: an order of the rows from default_rng(seed), taken 12 at a time.
    order = np.random.default_rng(9).permutation(bakery.data.n_train)
    theta = s.theta.copy()
    for k in range(3):
        pick = np.sort(order[12 * k : 12 * (k + 1)])
        _, slopes = s.net.cost_and_slopes(theta, bakery.data.X[pick], bakery.data.Y[pick])
        theta = theta - 0.1 * slopes
    s.step(3)
    np.testing.assert_allclose(s.theta, theta, rtol=1e-14, atol=1e-15)
    # The cost history is still the cost on the whole training set.
    assert s.history[-1].train_cost == pytest.approx(s.net.cost(s.theta, bakery.data.X, bakery.data.Y), rel=1e-15)


def test_mini_batches_with_numeric_slopes(bakery) -> None:  # type: ignore[no-untyped-def]
    a = Session(bakery, rate=0.1, seed=1)
    n = Session(bakery, rate=0.1, seed=1)
    for s in (a, n):
        s.set_batch_size(20)
    n.set_slope_source("numeric")
    a.step(5)
    n.step(5)
    np.testing.assert_allclose(n.theta, a.theta, rtol=1e-7, atol=1e-9)


def test_batch_size_of_the_whole_set_is_full_batch(bakery) -> None:  # type: ignore[no-untyped-def]
    s = Session(bakery)
    s.set_batch_size(bakery.data.n_train)
    assert s.batch_size is None
    with pytest.raises(UsageError, match="between 1 and"):
        s.set_batch_size(bakery.data.n_train + 1)


def test_mini_batches_use_every_row_once_per_epoch(bakery, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    # Epoch-wise sampling (each row once per pass, reshuffled each epoch) is common
    # practice (e.g. Goodfellow, Bengio & Courville, Deep Learning, 2016, section 8.1.3).
    n = bakery.data.n_train  # 192 rows: batches of 50 make epochs of 50, 50, 50, 42
    s = Session(bakery, rate=0.01, seed=4)
    s.set_batch_size(50)
    seen: list[np.ndarray] = []
    real = s.net.cost_and_slopes

    def spy(theta, X, Y):  # type: ignore[no-untyped-def]
        rows = [int(np.flatnonzero((bakery.data.X == x).all(axis=1))[0]) for x in X]
        seen.append(np.array(rows))
        return real(theta, X, Y)

    monkeypatch.setattr(s.net, "cost_and_slopes", spy)
    s.step(8)
    sizes = [len(rows) for rows in seen]
    assert sizes == [50, 50, 50, 42, 50, 50, 50, 42]
    first, second = np.concatenate(seen[:4]), np.concatenate(seen[4:])
    assert sorted(first.tolist()) == list(range(n)) and sorted(second.tolist()) == list(range(n))
    assert not np.array_equal(first, second), "each epoch draws a new order"
    assert s.epoch == 2 and s.batch_cursor == n
