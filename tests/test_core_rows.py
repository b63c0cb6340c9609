"""Per-row losses against scikit-learn's losses computed one row at a time.

``sklearn.metrics.log_loss`` (cross-entropy, natural log) and
``mean_squared_error`` are the references; the half squared error
``1/2 sum_k (a_k - y_k)^2`` is written out in numpy. The mean of the row
losses must be the data term of the cost (every loss averages over samples).
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
import pytest
from sklearn.metrics import log_loss, mean_squared_error

from stepper.core.rows import row_losses, worst_rows


def data(n_in: int, n_out: int, n: int, seed: int, onehot: bool = False, binary: bool = False) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, n_in))
    if onehot:
        return X, np.eye(n_out)[rng.integers(0, n_out, n)]
    if binary:
        return X, (rng.uniform(size=(n, n_out)) < 0.5).astype(float)
    return X, rng.normal(size=(n, n_out))


def test_categorical_rows_match_log_loss(dense_net: Callable[..., Any]) -> None:
    net, theta = dense_net(3, [(5, "tanh"), (4, "softmax")], "categorical_cross_entropy", seed=1, scale=2.0)
    X, Y = data(3, 4, 30, 2, onehot=True)
    rows = row_losses(net, theta, X, Y)
    for i in range(30):
        expected = log_loss([int(np.argmax(Y[i]))], rows.output[i : i + 1], labels=[0, 1, 2, 3])
        assert rows.loss[i] == pytest.approx(expected, rel=1e-10), i
    assert float(np.mean(rows.loss)) == pytest.approx(net.cost(theta, X, Y), rel=1e-13)


def test_binary_rows_match_log_loss(dense_net: Callable[..., Any]) -> None:
    net, theta = dense_net(2, [(3, "relu"), (1, "sigmoid")], "binary_cross_entropy", seed=3, scale=1.5)
    X, Y = data(2, 1, 25, 4, binary=True)
    rows = row_losses(net, theta, X, Y)
    for i in range(25):
        p = float(rows.output[i, 0])
        expected = log_loss([int(Y[i, 0])], [[1 - p, p]], labels=[0, 1])
        assert rows.loss[i] == pytest.approx(expected, rel=1e-9), i
    assert float(np.mean(rows.loss)) == pytest.approx(net.cost(theta, X, Y), rel=1e-13)


def test_squared_error_rows(dense_net: Callable[..., Any]) -> None:
    net, theta = dense_net(3, [(4, "tanh"), (2, "identity")], "mean_squared_error", seed=5)
    X, Y = data(3, 2, 40, 6)
    rows = row_losses(net, theta, X, Y)
    # mean_squared_error over the two outputs of each row (rows as columns, raw values).
    expected = mean_squared_error(Y.T, rows.output.T, multioutput="raw_values")
    np.testing.assert_allclose(rows.loss, expected, rtol=1e-12)
    net.loss = "half_squared_error"
    half = row_losses(net, theta, X, Y)
    np.testing.assert_allclose(half.loss, 0.5 * np.sum((rows.output - Y) ** 2, axis=1), rtol=1e-12)
    assert float(np.mean(half.loss)) == pytest.approx(net.cost(theta, X, Y), rel=1e-13)


def test_rows_leave_the_l2_term_out(dense_net: Callable[..., Any]) -> None:
    net, theta = dense_net(3, [(4, "tanh"), (1, "identity")], "mean_squared_error", seed=7)
    X, Y = data(3, 1, 20, 8)
    net.l2 = 0.5
    rows = row_losses(net, theta, X, Y)
    assert float(np.mean(rows.loss)) == pytest.approx(net.cost(theta, X, Y) - net.penalty(theta), rel=1e-12)


def test_confident_wrong_rows_stay_finite(dense_net: Callable[..., Any]) -> None:
    # Logits of size ~1e3: computed from Z (log-sum-exp), the loss is large but finite.
    net, theta = dense_net(2, [(3, "softmax")], "categorical_cross_entropy", seed=9, scale=500.0)
    X, Y = data(2, 3, 50, 10, onehot=True)
    rows = row_losses(net, theta, X, Y)
    assert np.all(np.isfinite(rows.loss)) and rows.loss.max() > 100


def test_worst_rows_are_the_largest_first() -> None:
    loss = np.array([0.5, 3.0, 1.0, 3.0, np.nan, 0.0, 2.0])
    # NaN counts as the largest; ties keep the lower index first.
    assert worst_rows(loss, 4).tolist() == [4, 1, 3, 6]
    assert worst_rows(loss, 100).tolist() == [4, 1, 3, 6, 2, 0, 5]
    rng = np.random.default_rng(0)
    big = rng.integers(0, 50, 5000).astype(float)
    np.testing.assert_array_equal(worst_rows(big, 300), np.argsort(-big, kind="stable")[:300])
    assert worst_rows(big, 0).size == 0


@pytest.mark.parametrize("units", [1, 3, 32, 40])
def test_row_max_is_numpys_max(units: int) -> None:
    # numpy.max over the last axis is the reference, NaN included (both propagate it).
    from stepper.core.activations import row_max

    Z = np.random.default_rng(units).normal(size=(4, 7, units))
    Z[1, 2, 0] = np.nan
    np.testing.assert_array_equal(row_max(Z), np.max(Z, axis=-1, keepdims=True))
