"""Numeric slopes through every built-in layer: they agree with backpropagation, and corners are kinks.

A central difference ``(C(w + h) - C(w - h)) / 2h`` approaches the slope with
error ``O(h^2)`` for a smooth cost (Press et al., *Numerical Recipes*, 3rd ed.,
2007, section 5.7), so on seeded random data, away from corners, every weight
must get ``agree``. Where a maximum ties (two entries of a pooling window
equal) or a ReLU input sits at zero, the cost has a corner: the one-sided
slopes differ, the finite difference lands between them, and the weight must
be marked ``kink``, never ``disagree`` (the central difference of ``max(a, b)``
at ``a = b`` is the mean of the two one-sided slopes; a textbook fact).

The stacked paths (layers before the moved one are never rerun) must also give
the same numbers as the definition computed with whole forward passes.
"""

from __future__ import annotations

import numpy as np
import pytest

from layer_cases import Case, cases, grid, input_of
from stepper.core.activations import ACTIVATIONS
from stepper.core.gradcheck import compare
from stepper.core.layers import Builtin, Conv, Dense, Embedding, Flatten, Pool
from stepper.core.network import Network
from stepper.core.numeric import default_step, numeric_slopes
from stepper.core.slice import costs_at_offsets

CASES = cases()


def around(case: Case) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """The case's layer, then a dense layer of two tanh units and one of a single output, mean squared error."""
    layer = case.layer
    layers: list[Builtin] = [layer]
    width = layer.n_out
    layers += [Dense(width, 2, ACTIVATIONS["tanh"]), Dense(2, 1, ACTIVATIONS["identity"])]
    net = Network(layer.n_in, list(layers), "mean_squared_error", input_shape=layer.in_shape)
    rng = np.random.default_rng(4)
    theta = rng.normal(0.0, 0.5, net.n_params)
    for block in net.layout.blocks:
        if block.key == "scale":
            theta[block.start : block.stop] += 1.0
    X = input_of(layer, n=9)
    Y = rng.normal(size=(9, 1))
    return net, theta, X, Y


def by_definition(net: Network, theta: np.ndarray, X: np.ndarray, Y: np.ndarray, h: float) -> np.ndarray:
    """Central differences with a whole forward pass for every evaluation."""
    out = np.empty(net.n_params)
    for i in range(net.n_params):
        plus, minus = theta.copy(), theta.copy()
        plus[i] += h
        minus[i] -= h
        out[i] = (net.cost(plus, X, Y) - net.cost(minus, X, Y)) / (2.0 * h)
    return out


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_every_weight_agrees_through_every_layer(case: Case) -> None:
    net, theta, X, Y = around(case)
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    numeric = numeric_slopes(net, theta, X, Y, "central")
    result = compare(cost, analytic, numeric)
    assert result.counts["agree"] == net.n_params, result.counts
    h = default_step("central")
    np.testing.assert_allclose(numeric.slopes, by_definition(net, theta, X, Y, h), rtol=1e-7, atol=1e-10)


@pytest.mark.parametrize("case", [c for c in CASES if c.layer.param_specs()],
                         ids=[c.name for c in CASES if c.layer.param_specs()])
def test_a_slice_through_a_layer_weight_matches_whole_passes(case: Case) -> None:
    net, theta, X, Y = around(case)
    index = net.layout.blocks[0].start + 1  # an entry of the case layer's first array
    offsets = np.linspace(-0.5, 0.5, 7)
    found = costs_at_offsets(net, theta, X, Y, index, offsets)
    expected = [net.cost(theta + offset * np.eye(net.n_params)[index], X, Y) for offset in offsets]
    np.testing.assert_allclose(found, expected, rtol=1e-12)


def tie_network(K: tuple[float, float]) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """Two input channels, a 1x1 convolution to one channel, a 2x2 max pool, one output.

    At position (0, 0) the input is (1, 0) and at (0, 1) it is (0, 1), so with
    ``K = (0.5, 0.5)`` both convolution outputs are 0.5: the pool's window ties,
    and moving either kernel entry breaks the tie one way or the other.
    """
    conv = Conv((2, 2, 2), 1, grid((2, 2), (1, 1), (1, 1)), ACTIVATIONS["identity"], bias=False)
    pool = Pool((1, 2, 2), grid((2, 2), (2, 2), (2, 2)), "max")
    net = Network(8, [conv, pool, Flatten((1, 1, 1)), Dense(1, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error", input_shape=(2, 2, 2))
    first = np.array([1.0, 0.0, -3.0, -3.0])   # channel 0 over the 2x2 positions
    second = np.array([0.0, 1.0, -3.0, -3.0])  # channel 1
    X = np.concatenate([first, second])[None, :].repeat(3, axis=0) * np.array([[1.0], [2.0], [3.0]])
    theta = np.array([K[0], K[1], 0.8, 0.1])  # K[0,0,0,0], K[0,1,0,0], W, b
    return net, theta, X, np.zeros((3, 1))


def test_a_max_pool_tie_is_a_kink_not_a_disagreement() -> None:
    net, theta, X, Y = tie_network((0.5, 0.5))
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    result = compare(cost, analytic, numeric_slopes(net, theta, X, Y, "central"))
    # The tie sends the whole slope to the first entry; the finite difference sees half of each side.
    assert list(result.verdict[:2]) == ["kink", "kink"]
    assert result.counts["disagree"] == 0 and result.passed
    # Away from the tie the same weights agree (the test can tell the two apart).
    net, theta, X, Y = tie_network((0.6, 0.4))
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    result = compare(cost, analytic, numeric_slopes(net, theta, X, Y, "central"))
    assert result.counts["agree"] == net.n_params


def test_at_a_tie_the_first_entry_takes_the_slope_and_the_finite_difference_lands_halfway() -> None:
    # The documented rule (README, "Layers beyond dense"; numpy's argmax picks the first maximum):
    # the first entry of the window in C order, position (0, 0) fed by K[0,0,0,0], takes the whole
    # slope, K[0,1,0,0] none. Moving K[0,0,0,0] up keeps its entry on top (one-sided slope: all of
    # it), moving it down hands the maximum to the other (none): the central difference is the mean
    # of the two one-sided slopes, half (a textbook fact about max(a, b) at a = b).
    net, theta, X, Y = tie_network((0.5, 0.5))
    _, analytic = net.cost_and_slopes(theta, X, Y)
    numeric = numeric_slopes(net, theta, X, Y, "central").slopes
    assert analytic[0] != 0.0 and analytic[1] == 0.0
    # Within O(h): on either side of the corner the cost curves differently.
    assert numeric[0] == pytest.approx(analytic[0] / 2, rel=1e-4)
    assert numeric[1] == pytest.approx(analytic[0] / 2, rel=1e-4)


def test_a_relu_at_zero_in_a_convolution_is_a_kink() -> None:
    # One channel, a 1x1 kernel K = 1 and bias b = -1: the pixel equal to 1 sits exactly at the corner.
    conv = Conv((1, 1, 2), 1, grid((1, 2), (1, 1), (1, 1)), ACTIVATIONS["relu"])
    net = Network(2, [conv, Flatten((1, 1, 2)), Dense(2, 1, ACTIVATIONS["identity"])], "mean_squared_error",
                  input_shape=(1, 1, 2))
    theta = np.array([1.0, -1.0, 0.7, -0.4, 0.0])
    X = np.array([[1.0, 3.0], [2.0, 1.0]])
    Y = np.array([[0.3], [-0.2]])
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    result = compare(cost, analytic, numeric_slopes(net, theta, X, Y, "central"))
    assert list(result.verdict[:2]) == ["kink", "kink"]
    assert result.passed


def test_an_embedding_slope_collects_every_row_of_its_category() -> None:
    # Rows 0 and 2 hold category 1: the slope of E[1, d] is the sum of both rows' parts (a lookup's
    # slope is a scatter-add), and a category no row holds has slope zero both ways.
    emb = Embedding((2,), (0,), 3, 2)
    net = Network(2, [emb, Dense(3, 1, ACTIVATIONS["identity"])], "half_squared_error")
    theta = np.random.default_rng(0).normal(size=net.n_params)
    X = np.array([[1.0, 0.5], [0.0, -1.0], [1.0, 2.0]])
    Y = np.array([[1.0], [0.0], [-1.0]])
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    numeric = numeric_slopes(net, theta, X, Y, "central")
    assert compare(cost, analytic, numeric).counts["agree"] == net.n_params
    assert np.all(analytic[4:6] == 0.0) and np.all(np.abs(numeric.slopes[4:6]) < 1e-12)  # E[2, :]
