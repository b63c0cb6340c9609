"""The slope breakdown: its factors multiply back to the slope, and each factor is what it says."""

from __future__ import annotations

import json
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper import cli
from stepper.core.activations import ACTIVATIONS
from stepper.core.breakdown import slope_breakdown
from stepper.core.layers import Dense
from stepper.core.network import Network

from edge_cases import saturation_case, signal_ratio_case

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"

# (hidden activation, output activation, loss): every activation in a hidden layer,
# and the output pairs that are fused with their loss, a coupled softmax that is
# not, and plain ones.
OUTPUTS = [
    ("sigmoid", "binary_cross_entropy"),       # fused: broken down at Z
    ("softmax", "categorical_cross_entropy"),  # fused: broken down at Z
    ("softmax", "mean_squared_error"),         # coupled units, not fused: at Z too
    ("identity", "half_squared_error"),
    ("tanh", "mean_squared_error"),
]


def data_for(net: Network, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(0.0, 1.0, (17, net.n_inputs))
    Y = np.eye(net.n_outputs)[rng.integers(0, net.n_outputs, 17)]
    return X, Y


def relative_to_size(total: float, analytic: float, parts: np.ndarray) -> float:
    # A sum of n terms is exact to about n u sum|terms| (floating-point summation;
    # Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., 2002,
    # section 4.2, recalled from memory), so the gap is measured against the terms' size.
    return abs(total - analytic) / max(abs(analytic), float(np.sum(np.abs(parts))), 1e-300)


@pytest.mark.parametrize("hidden", sorted(ACTIVATIONS))
@pytest.mark.parametrize("output, loss", OUTPUTS)
def test_factors_multiply_back_to_the_analytic_slope(hidden: str, output: str, loss: str, dense_net) -> None:
    for seed in range(3):
        net, theta = dense_net(3, [(5, "tanh"), (4, hidden), (3, output)], loss, seed=seed)
        X, Y = data_for(net, seed)
        for index in range(net.n_params):
            b = slope_breakdown(net, theta, X, Y, index)
            np.testing.assert_array_equal(b.products, b.error * b.act_slope * b.inputs)
            assert relative_to_size(b.total, b.analytic, b.products) < 1e-12, net.layout.names[index]


def test_each_factor_matches_autograd() -> None:
    # Reference: the autograd package differentiates the same network written out again.
    # The error signal at hidden unit j is dC/dA1[:, j]; the activation slope is
    # tanh'(Z1) = 1 - tanh(Z1)^2 (a textbook derivative); the input is X[:, i].
    rng = np.random.default_rng(11)
    net = Network(3, [Dense(3, 4, ACTIVATIONS["tanh"]), Dense(4, 2, ACTIVATIONS["sigmoid"])],
                  "half_squared_error")
    theta = rng.normal(0.0, 0.8, net.n_params)
    X = rng.normal(size=(9, 3))
    Y = rng.uniform(size=(9, 2))
    p = net.views(theta)
    W1, b1, W2, b2 = p[0]["W"], p[0]["b"], p[1]["W"], p[1]["b"]
    Z1 = X @ W1 + b1

    def cost_from_hidden(A1: np.ndarray) -> float:
        out = 1.0 / (1.0 + anp.exp(-(anp.dot(A1, W2) + b2)))
        return 0.5 * anp.sum((out - Y) ** 2) / X.shape[0]

    def cost_of_W1(W: np.ndarray) -> float:
        return cost_from_hidden(anp.tanh(anp.dot(X, W) + b1))

    dA1 = grad(cost_from_hidden)(np.tanh(Z1))
    dW1 = grad(cost_of_W1)(W1)
    for i in range(3):
        for j in range(4):
            b = slope_breakdown(net, theta, X, Y, net.layout.lookup(f"L1.W[{i},{j}]"), sample=2)
            np.testing.assert_allclose(b.error, dA1[:, j], rtol=1e-12, atol=1e-16)
            np.testing.assert_allclose(b.act_slope, 1.0 - np.tanh(Z1[:, j]) ** 2, rtol=1e-12)
            np.testing.assert_array_equal(b.inputs, X[:, i])
            assert b.total == pytest.approx(dW1[i, j], rel=1e-12)
            assert b.at(2) == (b.error[2], b.act_slope[2], X[2, i], b.products[2])


def test_bias_input_is_one_and_fused_output_is_taken_at_z() -> None:
    # Softmax with categorical cross-entropy: dC/dZ = (softmax(Z) - y) / n for one-hot
    # targets (a textbook result, e.g. Bishop, Pattern Recognition and Machine
    # Learning, 2006, eq. 4.109, recalled from memory).
    rng = np.random.default_rng(5)
    net = Network(2, [Dense(2, 3, ACTIVATIONS["softmax"])], "categorical_cross_entropy")
    theta = rng.normal(size=net.n_params)
    X = rng.normal(size=(6, 2))
    Y = np.eye(3)[[0, 1, 2, 0, 1, 2]]
    Z = X @ theta[:6].reshape(2, 3) + theta[6:]
    P = np.exp(Z) / np.exp(Z).sum(axis=1, keepdims=True)
    b = slope_breakdown(net, theta, X, Y, net.layout.lookup("L1.b[1]"))
    assert b.through_z and b.kind == "bias" and b.source is None
    np.testing.assert_array_equal(b.inputs, np.ones(6))
    np.testing.assert_array_equal(b.act_slope, np.ones(6))
    np.testing.assert_allclose(b.error, (P[:, 1] - Y[:, 1]) / 6, rtol=1e-12)


def flag_codes(net: Network, theta: np.ndarray, X: np.ndarray, Y: np.ndarray, name: str) -> set[str]:
    return {f.code for f in slope_breakdown(net, theta, X, Y, net.layout.lookup(name)).flags}


def test_flags_a_saturated_unit_and_a_dead_relu() -> None:
    rng = np.random.default_rng(0)
    X = rng.normal(size=(50, 2))
    Y = rng.normal(size=(50, 1))
    # tanh'(z) = 1 - tanh(z)^2 < 0.01 once |z| > 3 (textbook derivative); a bias of 40
    # puts unit 0 there on every sample.
    net = Network(2, [Dense(2, 2, ACTIVATIONS["tanh"]), Dense(2, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = np.array([0.5, 0.1, -0.3, 0.2, 40.0, 0.0, 1.0, 1.0, 0.0])
    assert "saturated" in flag_codes(net, theta, X, Y, "L1.W[0,0]")
    assert "saturated" not in flag_codes(net, theta, X, Y, "L1.W[0,1]")
    # A ReLU whose input is negative on every sample passes no slope back; the weight
    # it feeds onward sees an input that is exactly zero.
    net = Network(2, [Dense(2, 2, ACTIVATIONS["relu"]), Dense(2, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = np.array([0.5, 0.1, -0.3, 0.2, -40.0, 0.0, 1.0, 1.0, 0.0])
    b = slope_breakdown(net, theta, X, Y, net.layout.lookup("L1.W[1,0]"))
    assert "dead" in {f.code for f in b.flags} and b.analytic == 0.0
    assert "input_near_zero" in flag_codes(net, theta, X, Y, "L2.W[0,0]")
    assert not {"dead", "input_near_zero"} & flag_codes(net, theta, X, Y, "L2.W[1,0]")


def test_flags_large_inputs_and_cancelling_samples() -> None:
    net = Network(1, [Dense(1, 1, ACTIVATIONS["identity"])], "mean_squared_error")
    X = np.array([[900.0], [1100.0]])
    Y = np.array([[1.0], [2.0]])
    assert "input_large" in flag_codes(net, np.array([0.001, 0.0]), X, Y, "L1.W[0,0]")
    # Residuals +1 and -1 on equal inputs: the two samples' parts cancel exactly.
    X = np.array([[1.0], [1.0]])
    Y = np.array([[0.0], [2.0]])
    b = slope_breakdown(net, np.array([1.0, 0.0]), X, Y, 0)
    assert b.analytic == 0.0 and "cancelling" in {f.code for f in b.flags}


def test_saturated_flag_edges_are_the_documented_ones() -> None:
    # README: a saturated unit has an activation slope below 0.01 on 90% of the samples
    # (common practice). Units at 90% and 100% with slope 0.0099 are flagged, one at 89%
    # is not; a slope of 0.0101 is never flagged.
    net, theta, X, Y = saturation_case([0.90, 0.89, 1.0], slope=0.0099)
    flagged = ["saturated" in flag_codes(net, theta, X, Y, f"L1.W[{j},{j}]") for j in range(3)]
    assert flagged == [True, False, True]
    net, theta, X, Y = saturation_case([1.0], slope=0.0101)
    assert "saturated" not in flag_codes(net, theta, X, Y, "L1.W[0,0]")


def test_flag_sentences_name_the_unit_and_the_threshold() -> None:
    net, theta, X, Y = saturation_case([0.90, 1.0], slope=0.0099)
    b = slope_breakdown(net, theta, X, Y, net.layout.lookup("L1.W[0,0]"))
    assert [f.text for f in b.flags if f.code == "saturated"] == [
        "unit 0 of layer 1 is saturated on 90% of the samples (its tanh slope is below 0.01)"]
    codes = flag_codes(*signal_ratio_case(2e3), "L1.b[0]")
    assert "signal_exploded" in codes


def test_fused_sigmoid_output_is_broken_down_at_z() -> None:
    # README: where the output activation is computed together with its loss (sigmoid
    # with binary cross-entropy) the error signal is taken at Z and the activation
    # factor is 1. dC/dZ = (sigmoid(Z) - y) / (n m) for the mean binary cross-entropy
    # (PRML section 4.3.2), with scipy.special.expit as sigmoid.
    from scipy.special import expit

    rng = np.random.default_rng(12)
    net = Network(2, [Dense(2, 1, ACTIVATIONS["sigmoid"])], "binary_cross_entropy")
    theta = rng.normal(size=net.n_params)
    X = rng.normal(size=(7, 2))
    Y = rng.integers(0, 2, size=(7, 1)).astype(float)
    b = slope_breakdown(net, theta, X, Y, net.layout.lookup("L1.W[1,0]"))
    Z = X @ theta[:2].reshape(2, 1) + theta[2:]
    assert b.through_z
    np.testing.assert_array_equal(b.act_slope, np.ones(7))
    np.testing.assert_allclose(b.error, (expit(Z[:, 0]) - Y[:, 0]) / 7, rtol=1e-12)
    np.testing.assert_array_equal(b.inputs, X[:, 1])


def test_sample_numbers_run_from_zero_to_n_minus_one() -> None:
    net, theta, X, Y = signal_ratio_case(1.0)
    n = X.shape[0]
    assert slope_breakdown(net, theta, X, Y, 0, sample=0).sample == 0
    assert slope_breakdown(net, theta, X, Y, 0, sample=n - 1).sample == n - 1
    for bad in (n, -1):
        with pytest.raises(IndexError):
            slope_breakdown(net, theta, X, Y, 0, sample=bad)
    with pytest.raises(IndexError):
        slope_breakdown(net, theta, X, Y, net.n_params)


def test_error_signal_flags_at_a_thousand_times() -> None:
    # README: an error signal that shrank or grew by 1000 times on the way back from the
    # output (common practice). In the case the hidden unit's signal is exactly |W2|
    # times the output's, probed 1% inside and outside each edge.
    for ratio, expected in [(0.99e-3, {"signal_vanished"}), (1.01e-3, set()), (0.99e3, set()),
                            (1.01e3, {"signal_exploded"})]:
        codes = flag_codes(*signal_ratio_case(ratio), "L1.W[0,0]")
        assert codes & {"signal_vanished", "signal_exploded"} == expected, ratio


def test_input_and_cancelling_flag_edges() -> None:
    # stepper.core.breakdown (common practice, no published source): an input is near
    # zero when |a| < 1e-3 on 90% of the samples, large when its mean |a| exceeds 100;
    # the samples cancel when |sum| < 0.01 of the summed sizes of the per-sample parts.
    # One identity unit, mean squared error: the part of sample s is 2 (w a_s - y_s) a_s / n.
    net = Network(1, [Dense(1, 1, ACTIVATIONS["identity"])], "mean_squared_error")
    Y = np.zeros((10, 1))
    for near, expected in [(0.999e-3, True), (1.001e-3, False)]:
        X = np.full((10, 1), near)
        X[9] = 1.0   # 90% of the samples near zero
        assert ("input_near_zero" in flag_codes(net, np.array([1.0, 0.0]), X, Y, "L1.W[0,0]")) == expected
    for size, expected in [(99.0, False), (101.0, True)]:
        X = np.full((10, 1), size)
        assert ("input_large" in flag_codes(net, np.array([1e-3, 0.0]), X, Y, "L1.W[0,0]")) == expected
    # Two samples, a = 1 each, residuals r and -(r - d): parts 2r/2 and -2(r-d)/2, so
    # |sum| / sum|parts| = d / (2r - d).
    X = np.ones((2, 1))
    for share, expected in [(0.0099, True), (0.0101, False)]:
        d = 2.0 * share / (1.0 + share)   # r = 1
        Y2 = np.array([[-1.0], [1.0 - d]])  # w = 0, b = 0: residuals +1 and -(1 - d)
        b = slope_breakdown(net, np.array([0.0, 0.0]), X, Y2, 0)
        spread = float(np.sum(np.abs(b.products)))
        assert abs(b.total) / spread == pytest.approx(share, rel=1e-9)
        assert ("cancelling" in {f.code for f in b.flags}) == expected, share


def test_factors_multiply_back_around_a_custom_layer() -> None:
    # The error signal reaching layer 1 is the custom layer's own dX.
    from stepper.formats.model_file import load_setup

    setup = load_setup(SCENARIOS / "hive-gate-fixed" / "model.toml")
    net = setup.network
    for index, name in enumerate(net.layout.names):
        if name.startswith("L2."):
            continue
        b = slope_breakdown(net, setup.theta0, setup.data.X, setup.data.Y, index)
        assert relative_to_size(b.total, b.analytic, b.products) < 1e-12, name


def test_custom_layer_parameters_are_refused() -> None:
    from stepper.formats.model_file import load_setup

    setup = load_setup(SCENARIOS / "hive-gate-fixed" / "model.toml")
    index = setup.network.layout.lookup("L2.V[0,0]")
    with pytest.raises(ValueError, match="custom layer"):
        slope_breakdown(setup.network, setup.theta0, setup.data.X, setup.data.Y, index)


# -- the command ---------------------------------------------------------------------------------


def test_explain_command_shows_factors_and_their_sum(capsys) -> None:
    code = cli.main(["explain", str(SCENARIOS / "bakery-demand"), "L1.W[3,2]", "--sample-index", "5"])
    out = capsys.readouterr().out
    assert code == 0
    assert "weight from input 3 (footfall) to unit 2 of layer 1 (dense 4->6 tanh)" in out
    assert "sample 5" in out and "mean over samples" in out
    total = next(line for line in out.splitlines() if line.startswith("sum of the"))
    table = next(line for line in out.splitlines() if line.startswith("analytic slope (table)"))
    assert float(total.split()[-1]) == pytest.approx(float(table.split()[-1]), rel=1e-11)


def test_explain_command_json_and_its_errors(capsys) -> None:
    model = SCENARIOS / "hive-gate-fixed" / "model.toml"
    assert cli.main(["explain", str(model), "L3.b[0]", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["sum_of_products"] == pytest.approx(doc["analytic"], rel=1e-12)
    assert doc["mean"]["input"] == 1.0
    assert cli.main(["explain", str(model), "L2.W[0,0]"]) == 2
    assert capsys.readouterr().err == (
        "stepper: L2.W[0,0] belongs to a custom layer (custom 5->3 gate.py:GatedUnits), "
        "which has no units to break its slope down by\n"
    )
    assert cli.main(["explain", str(model), "L1.W[0,0]", "--sample-index", "999"]) == 2
    assert capsys.readouterr().err == "stepper: --sample-index 999: the training set has samples 0 to 175\n"
