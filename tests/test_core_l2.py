"""The L2 term in the cost: its slopes by autograd and by central differences written out here.

The term is ``(lambda / 2) * sum(w^2)`` over the weights, not the biases,
with slope ``lambda * w`` (Goodfellow, Bengio & Courville, *Deep Learning*,
2016, section 7.1.1, eqs. 7.2-7.3). The reference cost below is written again
in ``autograd.numpy`` for a tanh-identity network with mean squared error, so
neither the data term nor the penalty is taken from the code under test.
"""

from __future__ import annotations

from typing import Any, Callable

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper.core.gradcheck import iter_check
from stepper.core.numeric import numeric_slopes, run_to_end
from stepper.core.slice import cost_slice

LAMBDA = 0.3


def setup_net(dense_net: Callable[..., Any], l2: float = LAMBDA) -> tuple[Any, np.ndarray, np.ndarray, np.ndarray]:
    net, theta = dense_net(3, [(4, "tanh"), (2, "identity")], "mean_squared_error", seed=4)
    net.l2 = l2
    rng = np.random.default_rng(3)
    X = rng.normal(size=(25, 3))
    Y = rng.normal(size=(25, 2))
    return net, theta, X, Y


def reference_cost(net: Any, X: np.ndarray, Y: np.ndarray, lam: float) -> Callable[[np.ndarray], Any]:
    blocks = net.layout.blocks
    assert [b.prefix for b in blocks] == ["L1.W", "L1.b", "L2.W", "L2.b"]

    def cost(theta: np.ndarray) -> Any:
        W1, b1, W2, b2 = (anp.reshape(theta[b.start : b.stop], b.shape) for b in blocks)
        out = anp.dot(anp.tanh(anp.dot(X, W1) + b1), W2) + b2
        data = anp.mean((out - Y) ** 2)                                 # mean squared error
        return data + 0.5 * lam * (anp.sum(W1**2) + anp.sum(W2**2))    # eq. 7.2, weights only

    return cost


def test_cost_and_slopes_match_autograd(dense_net: Callable[..., Any]) -> None:
    net, theta, X, Y = setup_net(dense_net)
    ref = reference_cost(net, X, Y, LAMBDA)
    cost, slopes = net.cost_and_slopes(theta, X, Y)
    assert cost == pytest.approx(float(ref(theta)), rel=1e-13)
    np.testing.assert_allclose(slopes, grad(ref)(theta), rtol=1e-11, atol=1e-14)
    assert net.penalty(theta) == pytest.approx(0.5 * LAMBDA * float(np.sum(theta[~net.layout.is_bias] ** 2)))


def test_bias_slopes_carry_no_term(dense_net: Callable[..., Any]) -> None:
    net, theta, X, Y = setup_net(dense_net)
    with_term = net.cost_and_slopes(theta, X, Y)[1]
    net.l2 = 0.0
    without = net.cost_and_slopes(theta, X, Y)[1]
    bias = net.layout.is_bias
    np.testing.assert_array_equal(with_term[bias], without[bias])
    np.testing.assert_allclose(with_term[~bias] - without[~bias], LAMBDA * theta[~bias], rtol=1e-9)


def test_numeric_slopes_include_the_term(dense_net: Callable[..., Any]) -> None:
    net, theta, X, Y = setup_net(dense_net)
    ref = reference_cost(net, X, Y, LAMBDA)
    h = 1e-5
    # Central differences (C(w + h) - C(w - h)) / 2h of the reference cost, one weight at a time.
    expected = np.empty(theta.size)
    for i in range(theta.size):
        up, down = theta.copy(), theta.copy()
        up[i] += h
        down[i] -= h
        expected[i] = (float(ref(up)) - float(ref(down))) / (2 * h)
    got = numeric_slopes(net, theta, X, Y, h=h).slopes
    np.testing.assert_allclose(got, expected, rtol=1e-7, atol=1e-10)


def test_check_stays_exact_with_the_term(dense_net: Callable[..., Any]) -> None:
    net, theta, X, Y = setup_net(dense_net, l2=2.0)  # a term that dominates the slopes
    result = run_to_end(iter_check(net, theta, X, Y))
    assert result is not None
    assert result.counts["agree"] == theta.size, result.counts
    assert float(np.nanmax(result.rel_error)) < 1e-7


def test_slice_curvature_gains_lambda(dense_net: Callable[..., Any]) -> None:
    # Along one weight the term adds (lambda / 2) w^2, whose second derivative is lambda.
    net, theta, X, Y = setup_net(dense_net)
    index = net.layout.lookup("L2.W[1,0]")
    curved = cost_slice(net, theta, X, Y, index, 0.1).curvature
    net.l2 = 0.0
    plain = cost_slice(net, theta, X, Y, index, 0.1).curvature
    assert curved - plain == pytest.approx(LAMBDA, rel=1e-4)
