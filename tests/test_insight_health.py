"""Layer health on constructed cases: saturation, dead ReLUs, update ratios, slopes along the depth."""

from __future__ import annotations

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper.core.activations import ACTIVATIONS
from stepper.core.health import layer_health
from stepper.core.layers import Dense
from stepper.core.network import Network

from edge_cases import saturation_case, signal_ratio_case


def test_a_layer_forced_into_saturation() -> None:
    # tanh'(z) = 1 - tanh(z)^2 (a textbook derivative) is below 0.01 exactly when
    # |z| > artanh(sqrt(0.99)); count that directly from Z as the reference.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(200, 3))
    Y = rng.normal(size=(200, 1))
    net = Network(3, [Dense(3, 4, ACTIVATIONS["tanh"]), Dense(4, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    views = net.views(theta := np.zeros(net.n_params))
    views[0]["W"][...] = [[0.2, 30.0, 0.1, 1.0], [0.1, 0.0, -0.2, 1.0], [0.0, 0.0, 0.3, 1.0]]
    views[0]["b"][...] = [25.0, 0.0, 0.0, 0.0]   # unit 0 always saturated, unit 1 on |30 x0| > 3
    views[1]["W"][...] = [[1.0], [1.0], [1.0], [1.0]]
    health = layer_health(net, theta, X, Y, rate=0.1)
    first = health.layers[0]
    Z = X @ views[0]["W"] + views[0]["b"]
    # The documented thresholds, written out: slope below 0.01 on at least 90% of the samples.
    expected = np.mean(np.abs(Z) > np.arctanh(np.sqrt(1.0 - 0.01)), axis=0)
    np.testing.assert_allclose(first.saturation, expected)
    assert first.saturation[0] == 1.0 and first.saturation[2] == 0.0
    np.testing.assert_array_equal(first.saturated_units, np.flatnonzero(expected >= 0.9))
    assert 0 in first.saturated_units and 2 not in first.saturated_units
    assert first.saturated_fraction == pytest.approx(len(first.saturated_units) / 4)
    assert np.isnan(first.dead_fraction) and first.active is None
    # The identity output cannot saturate.
    assert health.layers[1].saturation is None


def test_a_layer_of_dead_relus() -> None:
    # A ReLU unit whose pre-activation is negative on every sample outputs 0 and
    # passes no slope to its incoming weights (relu'(z) = 0 for z < 0).
    rng = np.random.default_rng(1)
    X = rng.normal(size=(100, 2))
    Y = rng.normal(size=(100, 1))
    net = Network(2, [Dense(2, 5, ACTIVATIONS["relu"]), Dense(5, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = rng.normal(0.0, 0.5, net.n_params)
    net.views(theta)[0]["b"][[1, 3]] = -50.0
    health = layer_health(net, theta, X, Y, rate=0.1)
    first = health.layers[0]
    np.testing.assert_array_equal(first.dead_units, [1, 3])
    assert first.dead_fraction == pytest.approx(2 / 5)
    assert first.saturation is None
    _, slopes = net.cost_and_slopes(theta, X, Y)
    assert np.all(net.views(slopes)[0]["W"][:, [1, 3]] == 0.0)
    assert first.active is not None and np.all(first.active[[0, 2, 4]] > 0)


def test_update_ratio_and_norms_against_autograd() -> None:
    # Reference slopes from autograd on the same network written out again; the ratio
    # is rate * |dW| / |W| for the weight array (not the bias).
    rng = np.random.default_rng(2)
    net = Network(2, [Dense(2, 3, ACTIVATIONS["tanh"]), Dense(3, 1, ACTIVATIONS["identity"])],
                  "half_squared_error")
    theta = rng.normal(0.0, 0.7, net.n_params)
    X = rng.normal(size=(30, 2))
    Y = rng.normal(size=(30, 1))

    def cost(W1: np.ndarray, b1: np.ndarray, W2: np.ndarray, b2: np.ndarray) -> float:
        out = anp.dot(anp.tanh(anp.dot(X, W1) + b1), W2) + b2
        return 0.5 * anp.sum((out - Y) ** 2) / 30

    p = net.views(theta)
    args = (p[0]["W"], p[0]["b"], p[1]["W"], p[1]["b"])
    health = layer_health(net, theta, X, Y, rate=0.3)
    for layer, argnum in ((0, 0), (1, 2)):
        dW = grad(cost, argnum=argnum)(*args)
        entry = health.layers[layer]
        assert entry.weight_norm == pytest.approx(np.linalg.norm(args[argnum]), rel=1e-14)
        assert entry.slope_norm == pytest.approx(np.linalg.norm(dW), rel=1e-10)
        assert entry.update_ratio == pytest.approx(0.3 * np.linalg.norm(dW) / np.linalg.norm(args[argnum]),
                                                   rel=1e-10)


def test_ratio_verdict_edges_are_the_documented_ones() -> None:
    # README: around 1e-3 per step is the rule of thumb (common practice, no published
    # source); below 1e-4 is marked low and above 1e-2 high. Probed 1% inside and
    # outside each edge: the ratio is linear in the rate, so the rate sets it exactly.
    rng = np.random.default_rng(3)
    net = Network(2, [Dense(2, 1, ACTIVATIONS["identity"])], "mean_squared_error")
    theta = rng.normal(size=net.n_params)
    X, Y = rng.normal(size=(10, 2)), rng.normal(size=(10, 1))
    base = layer_health(net, theta, X, Y, rate=1.0).layers[0].update_ratio
    for ratio, verdict in [(0.99e-4, "low"), (1.01e-4, "typical"), (1e-3, "typical"),
                           (0.99e-2, "typical"), (1.01e-2, "high")]:
        entry = layer_health(net, theta, X, Y, rate=ratio / base).layers[0]
        assert entry.update_ratio == pytest.approx(ratio, rel=1e-12)
        assert entry.ratio_verdict == verdict, ratio


def test_saturation_edges_are_the_documented_ones() -> None:
    # README: a unit is saturated when its activation slope is below 0.01 on 90% of
    # the samples (common practice). Unit 0 sits at exactly 90%, unit 1 at 89%, with a
    # slope of 0.0099; a slope of 0.0101 never counts.
    net, theta, X, Y = saturation_case([0.90, 0.89, 1.0], slope=0.0099)
    first = layer_health(net, theta, X, Y, rate=0.1).layers[0]
    np.testing.assert_allclose(first.saturation, [0.90, 0.89, 1.0])
    assert list(first.saturated_units) == [0, 2]
    net, theta, X, Y = saturation_case([1.0], slope=0.0101)
    first = layer_health(net, theta, X, Y, rate=0.1).layers[0]
    assert list(first.saturation) == [0.0] and first.saturated_units.size == 0


def test_trend_edges_are_a_factor_ten() -> None:
    # stepper.core.health: slopes "shrink" or "grow" on the way back when the first
    # layer's error signal is below a tenth or above ten times the last layer's
    # (common practice, no published source). The case's travel is exactly |W2|.
    for ratio, trend in [(0.099, "shrinking"), (0.101, "steady"), (9.9, "steady"), (10.1, "growing")]:
        health = layer_health(*signal_ratio_case(ratio), rate=0.1)
        assert health.travel == pytest.approx(ratio, rel=1e-12)
        assert health.trend == trend, ratio
        # The table's "vs next" column: each layer's error signal over the next one's.
        assert health.layers[0].signal_change == pytest.approx(ratio, rel=1e-12)
        assert np.isnan(health.layers[1].signal_change)


def test_a_perfect_fit_and_zero_weights_have_no_ratio_to_show() -> None:
    # A network that fits its targets exactly has no error signal: no trend to read.
    net, theta, X, _ = signal_ratio_case(0.5)
    health = layer_health(net, theta, X, 0.5 * X, rate=0.1)
    assert health.trend == "no signal" and np.isnan(health.travel)
    assert all(np.isnan(entry.signal_change) for entry in health.layers)
    # All-zero weights: the update-to-weight ratio is undefined, not infinite, and gets no verdict.
    zero = layer_health(net, np.zeros(net.n_params), X, X, rate=0.1).layers[0]
    assert np.isnan(zero.update_ratio) and zero.ratio_verdict == ""


def test_a_relu_unit_exactly_at_zero_is_dead() -> None:
    # ReLU passes no slope where its input is not positive: relu'(0) = 0 here (the kink
    # counts as inactive), so a unit whose input is exactly 0 on every sample is dead.
    net = Network(2, [Dense(2, 2, ACTIVATIONS["relu"]), Dense(2, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = np.zeros(net.n_params)
    net.views(theta)[0]["W"][:, 1] = [1.0, -1.0]
    X = np.random.default_rng(5).normal(size=(10, 2))
    entry = layer_health(net, theta, X, np.ones((10, 1)), rate=0.1).layers[0]
    assert entry.active is not None and entry.active[0] == 0.0
    assert list(entry.dead_units) == [0]


def test_slopes_shrink_through_deep_sigmoid_layers_and_grow_through_large_linear_ones() -> None:
    # Backpropagation multiplies the error signal by W^T and the activation slope at
    # each layer; sigmoid' <= 1/4 with small weights shrinks it geometrically (the
    # vanishing-slope effect studied by Glorot & Bengio 2010, recalled from memory),
    # while identity layers with large weights grow it.
    rng = np.random.default_rng(4)
    X = rng.normal(size=(40, 4))
    Y = rng.normal(size=(40, 1))
    deep = [Dense(4, 4, ACTIVATIONS["sigmoid"]) for _ in range(6)] + [Dense(4, 1, ACTIVATIONS["identity"])]
    net = Network(4, deep, "mean_squared_error")
    health = layer_health(net, rng.normal(0.0, 0.5, net.n_params), X, Y, rate=0.1)
    assert health.trend == "shrinking"
    assert all(entry.signal_change < 1.0 for entry in health.layers[:-1])
    assert health.travel == pytest.approx(health.layers[0].signal_rms / health.layers[-1].signal_rms)
    wide = [Dense(4, 4, ACTIVATIONS["identity"]) for _ in range(6)] + [Dense(4, 1, ACTIVATIONS["identity"])]
    net = Network(4, wide, "mean_squared_error")
    health = layer_health(net, rng.normal(0.0, 2.0, net.n_params), X, Y, rate=0.1)
    assert health.trend == "growing"
    single = Network(4, [Dense(4, 1, ACTIVATIONS["identity"])], "mean_squared_error")
    assert layer_health(single, np.ones(5), X, Y, rate=0.1).trend == "single layer"


def test_fused_sigmoid_output_is_not_called_saturated() -> None:
    # With binary cross-entropy on the logits the output slope is a - y (a textbook
    # result), which a saturated sigmoid does not shrink.
    net = Network(1, [Dense(1, 1, ACTIVATIONS["sigmoid"])], "binary_cross_entropy")
    X = np.ones((5, 1))
    Y = np.zeros((5, 1))
    entry = layer_health(net, np.array([20.0, 0.0]), X, Y, rate=0.1).layers[0]
    assert entry.saturation is None
    plain = Network(1, [Dense(1, 1, ACTIVATIONS["sigmoid"])], "mean_squared_error")
    assert layer_health(plain, np.array([20.0, 0.0]), X, Y, rate=0.1).layers[0].saturated_fraction == 1.0
