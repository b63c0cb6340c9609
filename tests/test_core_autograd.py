"""Analytic slopes (backpropagation) against the `autograd` package, in float64.

The reference forward pass below is written again from the definitions, with
autograd.numpy, independently of stepper.core: activations from their textbook
formulas, losses from the definitions in stepper/core/losses.py's docstring,
and the flat parameter order from stepper/core/network.py's docstring (layer by
layer, W of shape (n_in, n_out) in row-major order, then b). autograd's reverse
mode then gives the reference slopes (Maclaurin, Duvenaud & Adams, autograd,
https://github.com/HIPS/autograd).

Tolerance: relative 1e-10 per entry. Inputs are drawn away from the ReLU kink
(|z| >= 1e-3 asserted) and cross-entropy outputs away from the clipping at 1e-12.
"""

from __future__ import annotations

from typing import Any, Callable

import autograd
import autograd.numpy as anp
import numpy as np
import pytest

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.losses import FUSED, LOSSES
from stepper.core.network import Network

RTOL = 1e-10


def ref_activation(name: str, Z: Any) -> Any:
    """Activations from their formulas (sigmoid as 1 / (1 + e^-z), softmax as e^z / sum e^z)."""
    if name == "identity":
        return Z
    if name == "sigmoid":
        return 1.0 / (1.0 + anp.exp(-Z))
    if name == "tanh":
        return anp.tanh(Z)
    if name == "relu":
        return anp.where(Z > 0.0, Z, 0.0)
    if name == "leaky_relu":
        return anp.where(Z > 0.0, Z, 0.01 * Z)  # slope 0.01: Maas, Hannun & Ng (2013)
    if name == "softplus":
        return anp.log(1.0 + anp.exp(Z))
    if name == "softmax":
        E = anp.exp(Z)
        return E / anp.sum(E, axis=1, keepdims=True)
    raise AssertionError(name)


def ref_loss(name: str, A: Any, Y: np.ndarray) -> Any:
    """Losses as defined in the docstring of stepper/core/losses.py."""
    n, m = Y.shape
    if name == "half_squared_error":
        return 0.5 * anp.sum((A - Y) ** 2) / n
    if name == "mean_squared_error":
        return anp.sum((A - Y) ** 2) / (n * m)
    if name == "binary_cross_entropy":
        return -anp.sum(Y * anp.log(A) + (1.0 - Y) * anp.log(1.0 - A)) / (n * m)
    if name == "categorical_cross_entropy":
        return -anp.sum(Y * anp.log(A)) / n
    raise AssertionError(name)


def ref_cost_fn(n_in: int, spec: list[tuple[int, str, bool]], loss: str, X: np.ndarray,
                Y: np.ndarray) -> Callable[[Any], Any]:
    """The cost as a function of the flat parameter vector, for autograd."""

    def cost(theta: Any) -> Any:
        A = X
        offset = 0
        width = n_in
        for units, activation, bias in spec:
            W = anp.reshape(theta[offset : offset + width * units], (width, units))
            offset += width * units
            Z = anp.dot(A, W)
            if bias:
                Z = Z + theta[offset : offset + units]
                offset += units
            A = ref_activation(activation, Z)
            width = units
        assert offset == theta.shape[0]
        return ref_loss(loss, A, Y)

    return cost


def pre_activations(net: Network, theta: np.ndarray, X: np.ndarray) -> list[np.ndarray]:
    return [cache.Z for _, cache in net.forward(theta, X)]


def targets(kind: str, rng: np.random.Generator, n: int, m: int) -> np.ndarray:
    if kind == "real":
        return rng.normal(size=(n, m))
    if kind == "fraction":  # soft binary targets in (0, 1)
        return rng.uniform(0.05, 0.95, size=(n, m))
    if kind == "binary":
        return rng.integers(0, 2, size=(n, m)).astype(float)
    if kind == "onehot":
        return np.eye(m)[rng.integers(0, m, size=n)]
    if kind == "distribution":  # rows of probabilities that sum to one
        P = rng.uniform(0.1, 1.0, size=(n, m))
        return P / P.sum(axis=1, keepdims=True)
    if kind == "unnormalized":  # non-negative rows that do not sum to one
        return rng.uniform(0.0, 1.0, size=(n, m))
    raise AssertionError(kind)


def check_against_autograd(spec: list[tuple[int, str, bool]], loss: str, target_kind: str,
                           seed: int) -> None:
    rng = np.random.default_rng(seed)
    n_in, n = 3, 7
    layers = []
    width = n_in
    for units, activation, bias in spec:
        layers.append(Dense(width, units, ACTIVATIONS[activation], bias))
        width = units
    net = Network(n_in, layers, loss)
    theta = rng.normal(0.0, 0.7, net.n_params)
    X = rng.normal(size=(n, n_in))
    Y = targets(target_kind, rng, n, width)

    # Stay away from the ReLU kink and from the cross-entropy clipping.
    for (_, activation, _), Z in zip(spec, pre_activations(net, theta, X)):
        if ACTIVATIONS[activation].kink:
            assert np.min(np.abs(Z)) >= 1e-3
    if "cross_entropy" in loss:
        out = net.predict(theta, X)
        assert 1e-6 < out.min() and out.max() < 1.0 - 1e-6

    ref = ref_cost_fn(n_in, spec, loss, X, Y)
    ref_cost = float(ref(theta))
    ref_slopes = autograd.grad(ref)(theta)

    cost, slopes = net.cost_and_slopes(theta, X, Y)
    assert cost == pytest.approx(ref_cost, rel=1e-12)
    assert net.cost(theta, X, Y) == pytest.approx(ref_cost, rel=1e-12)
    np.testing.assert_allclose(slopes, ref_slopes, rtol=RTOL, atol=0.0)
    assert np.any(slopes != 0.0)


HIDDEN_CASES = sorted(ACTIVATIONS)


@pytest.mark.parametrize("hidden", HIDDEN_CASES)
def test_every_activation_as_hidden_layer(hidden: str) -> None:
    # Two hidden layers of the same activation, one of them without bias.
    spec = [(5, hidden, True), (4, hidden, False), (2, "identity", True)]
    for seed in range(3):
        check_against_autograd(spec, "mean_squared_error", "real", seed)


@pytest.mark.parametrize("output", sorted(ACTIVATIONS))
def test_every_activation_as_output_layer(output: str) -> None:
    spec = [(4, "tanh", True), (3, output, True)]
    for seed in range(3):
        check_against_autograd(spec, "half_squared_error", "real", 10 + seed)


# (output activation, loss, targets): every loss, both fused pairs, and the same
# cross-entropies computed from outputs (unfused).
LOSS_CASES = [
    ("identity", "half_squared_error", "real"),
    ("tanh", "mean_squared_error", "real"),
    ("sigmoid", "binary_cross_entropy", "binary"),          # fused
    ("sigmoid", "binary_cross_entropy", "fraction"),        # fused, soft targets
    ("softmax", "binary_cross_entropy", "fraction"),        # unfused
    ("softmax", "categorical_cross_entropy", "onehot"),     # fused
    ("softmax", "categorical_cross_entropy", "distribution"),  # fused
    ("softmax", "categorical_cross_entropy", "unnormalized"),  # fused, rows not summing to 1
    ("sigmoid", "categorical_cross_entropy", "onehot"),     # unfused
    ("sigmoid", "categorical_cross_entropy", "unnormalized"),  # unfused
]


@pytest.mark.parametrize("output,loss,target_kind", LOSS_CASES)
def test_every_loss(output: str, loss: str, target_kind: str) -> None:
    spec = [(6, "softplus", True), (5, "leaky_relu", True), (3, output, True)]
    for seed in range(3):
        check_against_autograd(spec, loss, target_kind, 20 + seed)


def test_cases_cover_every_activation_loss_and_fused_pair() -> None:
    assert {loss for _, loss, _ in LOSS_CASES} == set(LOSSES)
    assert {(out, loss) for out, loss, _ in LOSS_CASES} >= set(FUSED)
    assert set(HIDDEN_CASES) == set(ACTIVATIONS)


def test_fused_pairs_are_used() -> None:
    # The fused forms are the ones under test in LOSS_CASES above.
    net = Network(2, [Dense(2, 3, ACTIVATIONS["softmax"])], "categorical_cross_entropy")
    assert net.fused is FUSED[("softmax", "categorical_cross_entropy")]
    net = Network(2, [Dense(2, 3, ACTIVATIONS["sigmoid"])], "binary_cross_entropy")
    assert net.fused is FUSED[("sigmoid", "binary_cross_entropy")]
    net = Network(2, [Dense(2, 3, ACTIVATIONS["softmax"])], "binary_cross_entropy")
    assert net.fused is None


def test_a_wrong_slope_would_be_caught() -> None:
    # The comparison above is sharp: a slope off by one part in 1e8 fails it.
    spec = [(4, "tanh", True), (2, "identity", True)]
    rng = np.random.default_rng(3)
    net = Network(3, [Dense(3, 4, ACTIVATIONS["tanh"]), Dense(4, 2, ACTIVATIONS["identity"])],
                  "half_squared_error")
    theta = rng.normal(size=net.n_params)
    X, Y = rng.normal(size=(5, 3)), rng.normal(size=(5, 2))
    ref_slopes = autograd.grad(ref_cost_fn(3, [(u, a, True) for u, a, _ in spec], "half_squared_error",
                                           X, Y))(theta)
    _, slopes = net.cost_and_slopes(theta, X, Y)
    slopes[4] *= 1.0 + 1e-8
    with pytest.raises(AssertionError):
        np.testing.assert_allclose(slopes, ref_slopes, rtol=RTOL, atol=0.0)
