"""The cost slice along one weight: curvature, tangent, step and verdict against exact values."""

from __future__ import annotations

import json
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper import cli
from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.slice import cost_slice, costs_at_offsets
from stepper.formats.model_file import load_setup
from stepper.session import Session

IDENTITY = ACTIVATIONS["identity"]


def linear_problem(seed: int = 0) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """One identity layer, 3 inputs -> 2 outputs, mean squared error, random data."""
    rng = np.random.default_rng(seed)
    net = Network(3, [Dense(3, 2, IDENTITY)], "mean_squared_error")
    theta = rng.normal(0.0, 0.7, net.n_params)
    X = rng.normal(0.0, 1.0, (25, 3))
    Y = rng.normal(0.0, 1.0, (25, 2))
    return net, theta, X, Y


def test_curvature_and_tangent_of_a_single_linear_layer_are_exact() -> None:
    # Worked by hand: C(W) = 1/(n m) sum_s sum_k (X[s] W[:, k] + b[k] - Y[s, k])^2 is a
    # quadratic in each weight. For W[i, j], with residual R = X W + b - Y:
    #   dC/dW[i, j]   = 2/(n m) sum_s X[s, i] R[s, j]
    #   d2C/dW[i, j]2 = 2/(n m) sum_s X[s, i]^2
    # (the diagonal of the least-squares Hessian 2 X^T X / (n m); a textbook fact).
    net, theta, X, Y = linear_problem()
    n, m = Y.shape
    W = theta[:6].reshape(3, 2)
    b = theta[6:]
    R = X @ W + b - Y
    for i in range(3):
        for j in range(2):
            index = net.layout.lookup(f"L1.W[{i},{j}]")
            s = cost_slice(net, theta, X, Y, index, rate=0.1)
            exact_curv = 2.0 / (n * m) * np.sum(X[:, i] ** 2)
            exact_slope = 2.0 / (n * m) * np.sum(X[:, i] * R[:, j])
            assert s.curvature == pytest.approx(exact_curv, rel=1e-6)
            assert s.slope == pytest.approx(exact_slope, rel=1e-12)
            tangent_slope = (s.tangent[-1] - s.tangent[0]) / (s.points[-1] - s.points[0])
            assert tangent_slope == pytest.approx(exact_slope, rel=1e-9)
            # The cost is exactly quadratic along the weight, so the swept costs
            # follow C0 + g d + c d^2 / 2 with the exact g and c.
            d = s.points - s.value
            np.testing.assert_allclose(s.costs, s.cost + exact_slope * d + 0.5 * exact_curv * d * d,
                                       rtol=1e-10)
            assert s.landing_cost == pytest.approx(s.model_cost, rel=1e-9)


def test_curvature_of_a_first_layer_weight_in_a_two_layer_linear_network() -> None:
    # Worked by hand: with A = (X W1 + b1) W2 + b2, dA[s, k]/dW1[i, j] = X[s, i] W2[j, k]
    # and A is linear in W1[i, j], so
    #   d2C/dW1[i, j]2 = 2/(n m) sum_s sum_k (X[s, i] W2[j, k])^2.
    rng = np.random.default_rng(4)
    net = Network(3, [Dense(3, 4, IDENTITY), Dense(4, 2, IDENTITY)], "mean_squared_error")
    theta = rng.normal(0.0, 0.8, net.n_params)
    X = rng.normal(0.0, 1.0, (30, 3))
    Y = rng.normal(0.0, 1.0, (30, 2))
    W2 = net.views(theta)[1]["W"]
    for i, j in [(0, 0), (2, 3), (1, 2)]:
        s = cost_slice(net, theta, X, Y, net.layout.lookup(f"L1.W[{i},{j}]"), rate=0.05)
        exact = 2.0 / (30 * 2) * np.sum((X[:, i, None] * W2[j][None, :]) ** 2)
        assert s.curvature == pytest.approx(exact, rel=1e-6)


def test_rate_times_curvature_predicts_short_overshooting_and_diverging_steps() -> None:
    # On a quadratic along one weight, a step w - r g multiplies the distance to the
    # minimiser w* = w0 - g / c by (1 - r c): short of it for r c < 1, past it for
    # 1 < r c < 2, farther away than before for r c > 2 (LeCun, Bottou, Orr & Mueller,
    # "Efficient BackProp", 1998, section 5.1; recalled from memory).
    net, theta, X, Y = linear_problem(seed=2)
    index = net.layout.lookup("L1.W[1,0]")
    probe = cost_slice(net, theta, X, Y, index, rate=0.1)
    c, g, w0 = probe.curvature, probe.slope, probe.value
    best = w0 - g / c
    for factor, regime in [(0.5, "short"), (1.5, "overshoots"), (2.5, "diverges")]:
        s = cost_slice(net, theta, X, Y, index, rate=factor / c)
        assert s.regime == regime
        assert s.rate_curvature == pytest.approx(factor, rel=1e-12)
        before, after = abs(w0 - best), abs(s.landing - best)
        assert after == pytest.approx(abs(1.0 - factor) * before, rel=1e-5)
        crossed = np.sign(s.landing - best) != np.sign(w0 - best)
        assert crossed == (factor > 1.0)
        assert (s.landing_cost > s.cost) == (factor > 2.0)
    assert probe.best_rate == pytest.approx(1.0 / c)
    # At r c = 1 the step lands on the minimum; within 1e-6 (the numeric curvature's
    # accuracy, stepper.core.slice.LANDS_WITHIN) it is called so, beyond that it is not.
    for factor, regime in [(1.0, "at the minimum"), (1.0 - 0.9e-6, "at the minimum"),
                           (1.0 + 0.9e-6, "at the minimum"), (1.0 - 1.1e-6, "short"),
                           (1.0 + 1.1e-6, "overshoots")]:
        assert cost_slice(net, theta, X, Y, index, rate=factor / c).regime == regime, factor


def test_negative_curvature_sets_no_limit() -> None:
    # One tanh unit, target 0: C(w) = tanh(w)^2 / 2 has C'' = (1 - t^2)(1 - 3 t^2) with
    # t = tanh(w), negative once t^2 > 1/3 (worked by hand; autograd confirms below).
    net = Network(1, [Dense(1, 1, ACTIVATIONS["tanh"], bias=False)], "half_squared_error")
    X = np.array([[1.0]])
    Y = np.array([[0.0]])
    theta = np.array([1.5])
    s = cost_slice(net, theta, X, Y, 0, rate=0.1)

    def cost(w: float) -> float:
        return 0.5 * anp.tanh(w) ** 2

    # autograd (a general-purpose differentiator) gives the exact second derivative.
    exact = grad(grad(cost))(1.5)
    t = np.tanh(1.5)
    assert exact == pytest.approx((1 - t * t) * (1 - 3 * t * t), rel=1e-12)
    assert exact < 0
    assert s.curvature == pytest.approx(exact, rel=1e-6)
    assert s.regime == "no minimum"
    assert s.best_rate == float("inf")


@pytest.mark.parametrize("activation", sorted(ACTIVATIONS))
@pytest.mark.parametrize("output, loss", [("sigmoid", "binary_cross_entropy"),
                                          ("softmax", "categorical_cross_entropy"),
                                          ("identity", "half_squared_error")])
def test_batched_sweep_matches_one_network_run_per_point(activation: str, output: str, loss: str,
                                                         dense_net) -> None:
    net, theta = dense_net(3, [(4, "tanh"), (3, activation), (2, output)], loss, seed=7)
    rng = np.random.default_rng(1)
    X = rng.normal(size=(12, 3))
    Y = np.eye(2)[rng.integers(0, 2, 12)]
    offsets = np.linspace(-1.3, 1.3, 9)
    for index in range(net.n_params):
        batched = costs_at_offsets(net, theta, X, Y, index, offsets)
        direct = []
        for off in offsets:
            moved = theta.copy()
            moved[index] += off
            direct.append(net.cost(moved, X, Y))
        np.testing.assert_allclose(batched, direct, rtol=1e-12, atol=1e-14)


def test_curvature_of_a_nonlinear_network_matches_autograd() -> None:
    # Reference: autograd's exact second derivative of the same cost, written out again.
    rng = np.random.default_rng(3)
    net = Network(2, [Dense(2, 3, ACTIVATIONS["tanh"]), Dense(3, 1, ACTIVATIONS["sigmoid"])],
                  "binary_cross_entropy")
    theta = rng.normal(0.0, 0.9, net.n_params)
    X = rng.normal(size=(40, 2))
    Y = (rng.uniform(size=(40, 1)) < 0.5).astype(float)

    def cost(t: np.ndarray) -> float:
        W1, b1 = t[:6].reshape(2, 3), t[6:9]
        W2, b2 = t[9:12].reshape(3, 1), t[12:13]
        z = anp.dot(anp.tanh(anp.dot(X, W1) + b1), W2) + b2
        # binary cross-entropy from the logits: softplus(z) - y z, averaged.
        return anp.mean(anp.logaddexp(0.0, z) - Y * z)

    hess_diag = [grad(lambda t, k=k: grad(cost)(t)[k])(theta)[k] for k in range(net.n_params)]
    for k in range(net.n_params):
        s = cost_slice(net, theta, X, Y, k, rate=0.1, n_points=5)
        assert s.curvature == pytest.approx(hess_diag[k], rel=1e-5, abs=1e-8)
        assert s.slope == pytest.approx(grad(cost)(theta)[k], rel=1e-10, abs=1e-15)


def test_default_span_shows_the_landing_point() -> None:
    net, theta, X, Y = linear_problem()
    s = cost_slice(net, theta, X, Y, 0, rate=40.0)
    assert s.points[0] <= s.landing <= s.points[-1]
    assert s.points.size == 41 and s.points[20] == pytest.approx(s.value)
    # README: the default span is max(1, |value|, 1.5 |rate x slope|); each term in turn wins.
    for rate, value in [(40.0, None), (1e-6, None), (1e-6, 7.0)]:
        moved = theta.copy()
        if value is not None:
            moved[0] = value
        t = cost_slice(net, moved, X, Y, 0, rate=rate)
        half = max(1.0, abs(t.value), 1.5 * abs(rate * t.slope))
        assert t.points[-1] - t.value == pytest.approx(half, rel=1e-12)
        assert t.value - t.points[0] == pytest.approx(half, rel=1e-12)
    assert 1.5 * abs(40.0 * s.slope) > max(1.0, abs(s.value))   # the first case is the slope's


# -- the command ---------------------------------------------------------------------------------


SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"


def test_slice_command_prints_the_figures_and_writes_the_plot(tmp_path: Path, capsys, monkeypatch) -> None:
    # A small terminal must not shrink a plot written to a file.
    monkeypatch.setenv("COLUMNS", "40")
    monkeypatch.setenv("LINES", "12")
    plot = tmp_path / "slice.txt"
    code = cli.main(["slice", str(SCENARIOS / "bakery-demand"), "L2.b[0]", "--rate", "0.5",
                     "--plot", str(plot), "--size", "60x18"])
    out = capsys.readouterr().out
    assert code == 0
    assert "curvature" in out and "rate x curvature" in out and "Efficient BackProp" in out
    lines = plot.read_text(encoding="utf-8").splitlines()
    assert len(lines) == 18
    assert max(len(line) for line in lines) == 60
    assert "cost along L2.b[0]" in lines[0]
    assert "\x1b[" not in plot.read_text(encoding="utf-8")


def test_slice_command_json_agrees_with_the_core(capsys) -> None:
    # The document must carry the core's own figures for the same weight, rate, span and
    # points (the core is checked against autograd and worked cases above).
    from stepper.formats.model_file import load_setup

    code = cli.main(["slice", str(SCENARIOS / "bakery-demand"), "L1.W[0,1]", "--json", "--points", "7",
                     "--span", "0.5"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    setup = load_setup(SCENARIOS / "bakery-demand" / "model.toml")
    index = setup.network.layout.lookup("L1.W[0,1]")
    core = cost_slice(setup.network, setup.theta0, setup.data.X, setup.data.Y, index, rate=0.1, span=0.5,
                      n_points=7)
    assert doc["rate"] == 0.1   # the documented default rate
    assert doc["weight"] == "L1.W[0,1]" and doc["samples"] == setup.data.n_train
    for key, expected in [("value", core.value), ("cost", core.cost), ("slope", core.slope),
                          ("curvature", core.curvature), ("curvature_step", core.curvature_step),
                          ("rate_x_curvature", core.rate_curvature), ("regime", core.regime),
                          ("best_rate", core.best_rate if np.isfinite(core.best_rate) else None)]:
        assert doc[key] == expected, key
    assert doc["step"] == {"to": core.landing, "cost": core.landing_cost, "model_cost": core.model_cost}
    assert doc["lowest"] == {"value": core.lowest[0], "cost": core.lowest[1]}
    assert doc["sweep"] == {"values": core.points.tolist(), "costs": core.costs.tolist()}


def test_the_readme_example_lands_at_the_minimum(capsys) -> None:
    # README, "Seeing why a slope is what it is": along the output bias of a mean squared
    # error over one output the curvature is exactly 2 (d2/db2 of mean (b + r_s)^2), so at
    # rate 0.5 one step lands at the minimum; the numeric curvature is off by rounding
    # only, and the wording must say "lands at", not "overshoots".
    code = cli.main(["slice", str(SCENARIOS / "bakery-demand"), "L2.b[0]", "--rate", "0.5", "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    assert doc["curvature"] == pytest.approx(2.0, rel=1e-7)
    assert doc["rate_x_curvature"] == pytest.approx(1.0, abs=1e-6)
    assert doc["regime"] == "at the minimum"
    code = cli.main(["slice", str(SCENARIOS / "bakery-demand"), "L2.b[0]", "--rate", "0.5"])
    out = capsys.readouterr().out
    assert "one step lands at this weight's minimum" in out and "overshoot" not in out


def test_slice_command_names_the_nearest_weights_when_the_weight_is_unknown(capsys) -> None:
    model = SCENARIOS / "bakery-demand" / "model.toml"
    code = cli.main(["slice", str(model), "L3.W[0,0]"])
    assert code == 2
    assert capsys.readouterr().err == (
        f"stepper: no weight named 'L3.W[0,0]' in {model} (did you mean L2.W[0,0] or L1.W[0,0]?)\n"
    )


def test_batched_sweep_through_a_custom_layer_matches_one_run_per_point() -> None:
    from stepper.formats.model_file import load_setup

    setup = load_setup(SCENARIOS / "hive-gate-fixed" / "model.toml")
    net, theta, X, Y = setup.network, setup.theta0, setup.data.X, setup.data.Y
    offsets = np.linspace(-0.8, 0.8, 5)
    for name in ("L1.W[2,4]", "L1.b[0]", "L2.V[1,2]", "L2.c[0]", "L3.W[2,0]"):
        index = net.layout.lookup(name)
        direct = []
        for off in offsets:
            moved = theta.copy()
            moved[index] += off
            direct.append(net.cost(moved, X, Y))
        np.testing.assert_allclose(costs_at_offsets(net, theta, X, Y, index, offsets), direct,
                                   rtol=1e-12, atol=1e-15)


def test_slice_plot_keeps_the_one_step_mark_in_sight() -> None:
    from stepper.plots import NOW_MARK, STEP_MARK, slice_plot_text

    session = Session(load_setup(SCENARIOS / "bakery-demand" / "model.toml"))
    data = session.setup.data
    index = session.net.layout.index_of["L2.b[0]"]
    # A tiny rate: the step does not leave the current point's cell. A huge one: it lands beyond the span.
    for rate in (1e-9, 0.5, 5.0):
        result = cost_slice(session.net, session.theta, data.X, data.Y, index, rate)
        text = slice_plot_text(result, 60, 16)
        assert STEP_MARK in text and NOW_MARK in text, (rate, text)


def test_slice_command_plot_draws_cost_and_tangent_with_their_own_glyphs(capsys) -> None:
    from stepper.plots import COST_MARK, TANGENT_MARK

    code = cli.main(["slice", str(SCENARIOS / "bakery-demand"), "L2.b[0]", "--rate", "0.5", "--plot", "-",
                     "--size", "70x20"])
    out = capsys.readouterr().out
    assert code == 0
    plot = out[out.index("cost along L2.b[0]"):]
    body = "".join(line.split("│")[1] if line.count("│") >= 2 else "" for line in plot.splitlines())
    assert body.count(COST_MARK) > 10 and body.count(TANGENT_MARK) > 5
    assert f"{COST_MARK} cost" in plot and f"{TANGENT_MARK} tangent" in plot
