"""Numeric slopes: against SciPy's finite differences, their order of accuracy, and kink marking."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pytest
from scipy.optimize import approx_fprime

import stepper.core.numeric as numeric_module
from stepper.core import numeric_dense
from stepper.core.activations import ACTIVATIONS
from stepper.core.compare import relative_error, verdicts
from stepper.core.gradcheck import compare, iter_check
from stepper.core.layers import Dense, ParamSpec
from stepper.core.network import Network
from stepper.core.numeric import NumericSlopes, default_step, iter_numeric_slopes, numeric_slopes, run_to_end

EPS = float(np.finfo(np.float64).eps)

# (hidden, hidden, output activation, loss): every activation appears, with its usual losses.
NETWORKS = [
    ("tanh", "sigmoid", "identity", "mean_squared_error"),
    ("softplus", "softmax", "softmax", "categorical_cross_entropy"),
    ("leaky_relu", "relu", "sigmoid", "binary_cross_entropy"),
    ("relu", "tanh", "softplus", "half_squared_error"),
]


def random_problem(acts: tuple[str, str, str, str], seed: int) -> tuple[Network, Any, Any, Any]:
    hidden1, hidden2, output, loss = acts
    rng = np.random.default_rng(seed)
    net = Network(4, [Dense(4, 6, ACTIVATIONS[hidden1]), Dense(6, 5, ACTIVATIONS[hidden2], False),
                      Dense(5, 3, ACTIVATIONS[output])], loss)
    theta = rng.normal(0.0, 0.7, net.n_params)
    X = rng.normal(size=(20, 4))
    if "cross_entropy" in loss:
        Y = np.eye(3)[rng.integers(0, 3, 20)]
    else:
        Y = rng.normal(size=(20, 3))
    return net, theta, X, Y


# -- against scipy.optimize.approx_fprime ----------------------------------------------------


@pytest.mark.parametrize("acts", NETWORKS, ids=lambda a: "-".join(a))
@pytest.mark.parametrize("h", [1e-4, 1e-6, float(np.sqrt(EPS))])
def test_forward_slopes_match_scipy(acts: tuple[str, str, str, str], h: float) -> None:
    # Reference: scipy.optimize.approx_fprime, forward differences
    # (f(x + h e_i) - f(x)) / h, on the same cost function and the same h.
    net, theta, X, Y = random_problem(acts, seed=1)
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    ours = numeric_slopes(net, theta, X, Y, "forward", h)
    ref = approx_fprime(theta, lambda t: net.cost(t, X, Y), h)
    assert ours.method == "forward" and ours.h == h
    # Both compute the same quotient; they may differ only by rounding in the two
    # cost evaluations, about eps * |C| / h each (Nocedal & Wright, Numerical
    # Optimization, 2nd ed., 2006, section 8.1, recalled from memory). The factor
    # 16 is headroom for the summations inside the cost (common practice).
    rounding = 16.0 * EPS * max(abs(cost), 1.0) / h
    np.testing.assert_allclose(ours.slopes, ref, rtol=0.0, atol=rounding)
    if h >= 1e-6:
        # At these steps the truncation error, about h |C''| / 2 and shared by both,
        # is far larger than that rounding: the agreement is not a tolerance artefact.
        assert 20.0 * np.max(np.abs(ours.slopes - ref)) < np.max(np.abs(ours.slopes - analytic))


def test_forward_slopes_match_scipy_with_a_custom_layer() -> None:
    # Parameters of non-dense layers go through the slow path (re-running the
    # network from that layer on), and dense layers after them run copy by copy.
    rng = np.random.default_rng(4)
    net = Network(3, [Dense(3, 4, ACTIVATIONS["tanh"]), Scale(4), Dense(4, 2, ACTIVATIONS["sigmoid"])],
                  "half_squared_error")
    theta = rng.normal(0.0, 0.8, net.n_params)
    X, Y = rng.normal(size=(9, 3)), rng.uniform(size=(9, 2))
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    h = 1e-6
    ours = numeric_slopes(net, theta, X, Y, "forward", h)
    ref = approx_fprime(theta, lambda t: net.cost(t, X, Y), h)  # SciPy reference, as above
    np.testing.assert_allclose(ours.slopes, ref, rtol=0.0, atol=16.0 * EPS * max(cost, 1.0) / h)
    central = numeric_slopes(net, theta, X, Y, "central")
    np.testing.assert_allclose(central.slopes, analytic, rtol=1e-7, atol=1e-10)


@dataclass(frozen=True)
class Scale:
    """A minimal non-dense layer for the tests: ``A = X * s`` with ``s`` of shape ``(n,)``."""

    n_in: int

    @property
    def n_out(self) -> int:
        return self.n_in

    @property
    def label(self) -> str:
        return f"scale {self.n_in}"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return (ParamSpec("s", (self.n_in,), "weight"),)

    def forward(self, params: dict[str, Any], X: Any) -> tuple[Any, Any]:
        return X * params["s"], X

    def backward(self, params: dict[str, Any], cache: Any, dOut: Any) -> tuple[dict[str, Any], Any]:
        return {"s": np.sum(dOut * cache, axis=0)}, dOut * params["s"]


# -- order of accuracy -----------------------------------------------------------------------


def smooth_problem() -> tuple[Network, Any, Any, Any]:
    rng = np.random.default_rng(7)
    net = Network(3, [Dense(3, 5, ACTIVATIONS["tanh"]), Dense(5, 4, ACTIVATIONS["tanh"]),
                      Dense(4, 2, ACTIVATIONS["identity"])], "mean_squared_error")
    theta = rng.normal(0.0, 0.8, net.n_params)
    return net, theta, rng.normal(size=(16, 3)), rng.normal(size=(16, 2))


@pytest.mark.parametrize("method,order", [("central", 2.0), ("forward", 1.0)])
def test_error_shrinks_with_the_order_of_the_method(method: str, order: float) -> None:
    # Truncation error of central differences is O(h^2), of forward differences
    # O(h) (Press, Teukolsky, Vetterling & Flannery, Numerical Recipes, 3rd ed.,
    # 2007, section 5.7; Goodfellow, Bengio & Courville, Deep Learning, 2016,
    # section 11.5 -- both recalled from memory). Over h = 1e-2 .. 1e-4 rounding
    # (about eps / h < 1e-11) is negligible, so the log-log slope of the error
    # against h is the order.
    net, theta, X, Y = smooth_problem()
    _, analytic = net.cost_and_slopes(theta, X, Y)
    steps = np.logspace(-2, -4, 9)
    errors = [np.linalg.norm(numeric_slopes(net, theta, X, Y, method, h).slopes - analytic)
              for h in steps]
    fitted = np.polyfit(np.log(steps), np.log(errors), 1)[0]
    assert fitted == pytest.approx(order, abs=0.1)


def test_default_steps_balance_truncation_and_rounding() -> None:
    # h = eps^(1/3) for central and eps^(1/2) for forward differences
    # (Numerical Recipes, 3rd ed., 2007, section 5.7, recalled from memory).
    assert numeric_module.default_step("central") == pytest.approx(EPS ** (1 / 3))
    assert numeric_module.default_step("forward") == pytest.approx(EPS**0.5)
    net, theta, X, Y = smooth_problem()
    _, analytic = net.cost_and_slopes(theta, X, Y)
    central = numeric_slopes(net, theta, X, Y).slopes
    forward = numeric_slopes(net, theta, X, Y, "forward").slopes
    scale = np.max(np.abs(analytic))
    assert np.max(np.abs(central - analytic)) < 1e-9 * scale
    assert np.max(np.abs(forward - analytic)) < 1e-6 * scale
    assert np.max(np.abs(central - analytic)) < np.max(np.abs(forward - analytic))


# -- the batched machinery --------------------------------------------------------------------


def test_chunking_and_subsets_do_not_change_the_result(monkeypatch: pytest.MonkeyPatch) -> None:
    net, theta, X, Y = random_problem(NETWORKS[2], seed=5)
    full = numeric_slopes(net, theta, X, Y)
    which = [0, 7, 24, net.n_params - 1, 30, 7]
    part = numeric_slopes(net, theta, X, Y, which=which)
    assert np.all(np.isnan(np.delete(part.slopes, which)))
    np.testing.assert_allclose(part.slopes[which], full.slopes[which], rtol=1e-12, atol=1e-15)
    monkeypatch.setattr(numeric_module, "CHUNK_BYTES", 1)  # one perturbation per chunk
    tiny = numeric_slopes(net, theta, X, Y)
    np.testing.assert_allclose(tiny.slopes, full.slopes, rtol=1e-9, atol=1e-12)
    assert np.array_equal(tiny.kink, full.kink)


@pytest.mark.parametrize("acts", NETWORKS, ids=lambda acts: "-".join(acts[:3]))
def test_sub_blocks_of_a_chunk_do_not_change_the_result(acts: tuple[str, str, str, str],
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    # The rank-one path runs the later layers on a few moved copies at a time; one copy per
    # sub-block must give the same costs, bit for bit, and the same kink flags.
    net, theta, X, Y = random_problem(acts, seed=11)
    X = X * 3.0  # wider pre-activations: more ReLU units change side within the step
    whole = numeric_slopes(net, theta, X, Y, h=1e-2)
    monkeypatch.setattr(numeric_dense, "SUB_BYTES", 1)
    one_by_one = numeric_slopes(net, theta, X, Y, h=1e-2)
    assert one_by_one.slopes.tobytes() == whole.slopes.tobytes()
    assert np.array_equal(one_by_one.kink, whole.kink)
    if "relu" in acts[:2]:
        assert whole.kink.any() and not whole.kink.all()


def test_theta_is_not_modified_and_progress_reaches_the_total() -> None:
    net, theta, X, Y = random_problem(NETWORKS[0], seed=2)
    before = theta.copy()
    seen: list[tuple[int, int]] = []
    result = run_to_end(iter_numeric_slopes(net, theta, X, Y), lambda d, t: seen.append((d, t)))
    assert result is not None and np.all(np.isfinite(result.slopes))
    assert np.array_equal(theta, before)
    done = [d for d, _ in seen]
    assert done == sorted(done) and seen[-1] == (net.n_params, net.n_params)


def test_cancelling_stops_early() -> None:
    net, theta, X, Y = random_problem(NETWORKS[0], seed=2)
    assert run_to_end(iter_numeric_slopes(net, theta, X, Y), cancelled=lambda: True) is None


def test_unknown_method_is_refused() -> None:
    net, theta, X, Y = random_problem(NETWORKS[0], seed=2)
    with pytest.raises(ValueError):
        numeric_slopes(net, theta, X, Y, "backward")


# -- kinks --------------------------------------------------------------------------------------

H = numeric_module.default_step("central")


def kinked_problem(where: str) -> tuple[Network, Any, Any, Any, int]:
    """One sample, a ReLU unit whose pre-activation is 1e-8 (well within h of zero).

    ``where`` says which layer holds that unit relative to the parameter we watch
    (the first weight of layer 1): ``"same"`` (layer 1 is the ReLU), ``"next"``
    (layer 2) or ``"later"`` (layer 3). Returns the network, weights, data and the
    flat index of the watched parameter.
    """
    X = np.array([[0.8, -0.5]])
    Y = np.array([[0.3]])
    acts = {"same": ("relu", "tanh", "tanh"), "next": ("tanh", "relu", "tanh"),
            "later": ("tanh", "tanh", "relu")}[where]
    net = Network(2, [Dense(2, 3, ACTIVATIONS[acts[0]]), Dense(3, 3, ACTIVATIONS[acts[1]]),
                      Dense(3, 3, ACTIVATIONS[acts[2]]), Dense(3, 1, ACTIVATIONS["identity"])],
                  "half_squared_error")
    rng = np.random.default_rng(3)
    theta = rng.uniform(0.3, 0.9, net.n_params)  # all positive: every unit is on
    layer = {"same": 0, "next": 1, "later": 2}[where]
    bias = net.layout.find_block(layer, "b")
    # Move unit 0 of that layer to 1e-8 above its kink on the one sample.
    Z = net.forward(theta, X)[layer][1].Z
    theta[bias.start] -= Z[0, 0] - 1e-8
    assert abs(net.forward(theta, X)[layer][1].Z[0, 0]) < 1e-7
    return net, theta, X, Y, 0


@pytest.mark.parametrize("where", ["same", "next", "later"])
def test_unit_within_h_of_its_kink_is_marked(where: str) -> None:
    net, theta, X, Y, watched = kinked_problem(where)
    result = run_to_end(iter_check(net, theta, X, Y, "central"))
    assert result is not None
    numeric = numeric_slopes(net, theta, X, Y, "central")
    assert numeric.kink[watched]
    # Without the mark the watched slope would count as a failure; with it, it is a kink.
    unmarked = verdicts(result.rel_error, np.zeros(net.n_params, dtype=bool))
    assert unmarked[watched] == "disagree"
    assert result.verdict[watched] == "kink"
    assert result.passed
    assert "disagree" not in set(result.verdict)


@pytest.mark.parametrize("where", ["same", "next", "later"])
def test_no_kink_marked_far_from_kinks(where: str) -> None:
    net, theta, X, Y, _ = kinked_problem(where)
    theta = np.random.default_rng(3).uniform(0.3, 0.9, net.n_params)  # every |z| > 0.3
    result = run_to_end(iter_check(net, theta, X, Y, "central"))
    assert result is not None
    assert set(result.verdict) == {"agree"}
    assert not numeric_slopes(net, theta, X, Y).kink.any()


def test_forward_method_marks_only_the_side_it_steps_to() -> None:
    net, theta, X, Y, watched = kinked_problem("same")
    # z = +1e-8 and the watched weight multiplies x = 0.8 > 0: a forward step up stays
    # on the same side, a step down (negative h is not allowed) is never taken.
    assert not numeric_slopes(net, theta, X, Y, "forward").kink[watched]
    assert numeric_slopes(net, theta, X, Y, "central").kink[watched]


def test_corrupted_analytic_slope_disagrees() -> None:
    net, theta, X, Y = random_problem(NETWORKS[0], seed=8)
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    numeric = numeric_slopes(net, theta, X, Y)
    assert compare(cost, analytic, numeric).passed
    bad = analytic.copy()
    bad[5] *= 1.01
    result = compare(cost, bad, numeric)
    assert result.verdict[5] == "disagree"
    assert np.count_nonzero(result.verdict != "agree") == 1
    assert not result.passed
    assert result.worst() == 5


# -- relative error, verdicts and rounding noise ------------------------------------------------


def test_relative_error_and_verdict_thresholds() -> None:
    # rel = |a - n| / max(|a|, |n|, 1e-8); agree <= 1e-5 < doubtful <= 1e-3 < disagree
    # (the rule documented in README.md; thresholds are common practice).
    a = np.array([1.0, 1.0, 1.0, 1.0, 1e-12, 2.0, 1.0, 1.0])
    n = np.array([1.0 + 1e-5, 1.0 + 2e-5, 1.0 + 1e-3, 1.0 + 2e-3, 3e-12, 2.0, np.nan, 1.5])
    rel = relative_error(a, n)
    assert rel[0] == pytest.approx(1e-5 / (1.0 + 1e-5))
    assert rel[4] == pytest.approx(2e-12 / 1e-8)  # the floor keeps tiny slopes comparable
    kink = np.zeros(8, dtype=bool)
    kink[[5, 7]] = True
    assert list(verdicts(rel, kink)) == ["agree", "doubtful", "doubtful", "disagree", "doubtful", "agree",
                                         "", "kink"]
    # The edges themselves: "agree at 1e-5 or below, doubtful up to 1e-3" (README).
    edges = np.array([1e-5, np.nextafter(1e-5, 1.0), 1e-3, np.nextafter(1e-3, 1.0)])
    assert list(verdicts(edges, np.zeros(4, dtype=bool))) == ["agree", "doubtful", "doubtful", "disagree"]
    # The floor of the relative error is the documented 1e-8 unless the caller sets another.
    assert relative_error(np.array([3e-9]), np.array([0.0]))[0] == pytest.approx(0.3)
    assert relative_error(np.array([3e-9]), np.array([0.0]), floor=1e-6)[0] == pytest.approx(3e-3)


def test_tiny_slopes_within_rounding_noise_agree() -> None:
    # A weight fed by an input of 1e-10 has a slope of order 1e-10: its central
    # difference is dominated by the rounding of the two costs, about eps |C| / h
    # (Numerical Recipes, 3rd ed., 2007, section 5.7, recalled from memory).
    rng = np.random.default_rng(6)
    net = Network(3, [Dense(3, 4, ACTIVATIONS["tanh"]), Dense(4, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = rng.normal(size=net.n_params)
    X = rng.normal(size=(5, 3))
    X[:, 2] = 1e-10
    Y = rng.normal(size=(5, 1))
    result = run_to_end(iter_check(net, theta, X, Y))
    assert result is not None
    tiny = [net.layout.lookup(f"L1.W[2,{u}]") for u in range(4)]
    assert np.all(np.abs(result.analytic[tiny]) < 1e-8)
    noise = 16.0 * EPS * abs(result.cost) / result.h   # the documented allowance, written out
    assert np.all(np.abs(result.analytic - result.numeric)[tiny] <= noise)
    assert np.all(result.verdict == "agree") and result.passed
    # The allowance is absolute, at the noise level: a tiny slope that is wrong by
    # more than that still disagrees.
    numeric = numeric_slopes(net, theta, X, Y)
    bad = result.analytic.copy()
    bad[tiny[0]] += 10.0 * noise
    assert compare(result.cost, bad, numeric).verdict[tiny[0]] == "disagree"


@pytest.mark.parametrize("method", ["central", "forward"])
def test_rounding_allowance_is_sixteen_times_eps_cost_over_h(method: str) -> None:
    # README, "How the slopes are compared": a numeric slope carries a rounding error of
    # about u |C| / h (Numerical Recipes, 3rd ed., 2007, section 5.7); two slopes closer
    # than 16 times that agree (the factor is common practice). Slopes of 100 units (above
    # the allowance, so the comparison can resolve them; see test_core_verdicts for slopes
    # below it), apart by 15 and by 17 times u |C| / h: only the first agrees.
    cost, h = 0.8, default_step(method)
    unit = EPS * cost / h
    numeric = NumericSlopes(np.full(4, 100.0 * unit), np.zeros(4, dtype=bool), method, h)
    analytic = numeric.slopes + np.array([15.0, -15.0, 17.0, 20.0]) * unit
    result = compare(cost, analytic, numeric)
    assert list(result.verdict) == ["agree", "agree", "disagree", "disagree"]
    # The relative error shown is still the computed one (README): far above 1e-5 here.
    assert np.all(result.rel_error > 1e-5)
    # The allowance scales with |C| and 1 / h: at twice the cost, 17 units agree too.
    assert compare(2.0 * cost, analytic, numeric).verdict[2] == "agree"


def test_worst_skips_uncomputed_slopes() -> None:
    # Slopes not computed (NaN relative error) are never the worst, even when every
    # computed one is small.
    net, theta, X, Y = random_problem(NETWORKS[0], seed=8)
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    part = numeric_slopes(net, theta, X, Y, which=[3, 4, 5])
    result = compare(cost, analytic, part)
    assert np.isnan(result.rel_error[0]) and result.worst() in (3, 4, 5)
    assert result.rel_error[result.worst()] == np.nanmax(result.rel_error)


# -- details of the batched pass -------------------------------------------------------------------


@pytest.mark.parametrize("name", sorted(ACTIVATIONS))
def test_in_place_activation_is_bit_for_bit(name: str) -> None:
    # The numeric pass applies activations in place; the unperturbed cost uses fn.
    Z = np.random.default_rng(0).normal(0.0, 4.0, size=(3, 20, 5))
    Z[0, 0, :3] = [0.0, -0.0, 1e-300]
    out = Z.copy()
    assert ACTIVATIONS[name].apply_in_place(out) is out
    expected = ACTIVATIONS[name].fn(Z)
    assert np.array_equal(out, expected) and np.array_equal(np.signbit(out), np.signbit(expected))


def test_relu_unit_exactly_at_zero_behind_a_zero_weight() -> None:
    # A sample of zeros with zero biases puts the next ReLU layer exactly at its
    # kink; a zero weight into it must not turn the look-up into 0 * inf = NaN.
    net = Network(2, [Dense(2, 3, ACTIVATIONS["tanh"]), Dense(3, 2, ACTIVATIONS["relu"]),
                      Dense(2, 1, ACTIVATIONS["identity"])], "mean_squared_error")
    theta = np.random.default_rng(0).normal(size=net.n_params)
    views = net.views(theta)
    views[0]["b"][:] = 0.0
    views[1]["b"][:] = 0.0
    views[1]["W"][0, 1] = 0.0
    X = np.array([[0.0, 0.0], [1.0, -0.5]])
    Y = np.array([[1.0], [0.0]])
    result = numeric_slopes(net, theta, X, Y)  # warnings are errors in this suite
    assert np.all(np.isfinite(result.slopes))
    # every first-layer bias moves the zero sample's ReLU units off zero
    assert result.kink[net.layout.lookup("L1.b[0]")]


@pytest.mark.parametrize("h", [0.0, -1e-6, float("nan"), float("inf")])
def test_step_must_be_a_positive_number(h: float) -> None:
    net, theta, X, Y = random_problem(NETWORKS[0], seed=2)
    with pytest.raises(ValueError):
        numeric_slopes(net, theta, X, Y, "central", h)


def test_non_finite_slopes_disagree_and_uncomputed_ones_stay_blank() -> None:
    net, theta, X, Y = random_problem(NETWORKS[0], seed=8)
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    part = numeric_slopes(net, theta, X, Y, which=[0, 1, 2])
    assert part.computed is not None and list(np.nonzero(part.computed)[0]) == [0, 1, 2]
    bad = analytic.copy()
    bad[1] = np.inf
    result = compare(cost, bad, part)
    assert list(result.verdict[:3]) == ["agree", "disagree", "agree"]
    assert set(result.verdict[3:]) == {""}
    assert not result.passed
    # A cost that overflows: no slope can be checked, so the check must not pass.
    with np.errstate(over="ignore", invalid="ignore"):
        big = run_to_end(iter_check(net, theta, X, Y * 1e200))
    assert big is not None and big.cost == np.inf
    assert not big.passed and big.counts["disagree"] == net.n_params
