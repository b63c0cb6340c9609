"""Update rules against their published equations, computed again here in plain numpy.

- momentum: Polyak 1964, "Some methods of speeding up the convergence of
  iteration methods", in the form of Sutskever, Martens, Dahl & Hinton 2013,
  "On the importance of initialization and momentum in deep learning", eq. 1:
  ``v_{t+1} = mu v_t - eps grad f(theta_t)``, ``theta_{t+1} = theta_t + v_{t+1}``.
- Adam: Kingma & Ba 2015, "Adam: A Method for Stochastic Optimization",
  algorithm 1, with the paper's defaults beta1 = 0.9, beta2 = 0.999, eps = 1e-8.
- plain descent: theta <- theta - eps g (Goodfellow, Bengio & Courville,
  *Deep Learning*, 2016, algorithm 8.1).

The slopes of the reference runs come from the ``autograd`` package on a cost
written out again here, so neither the rule nor the slopes are taken from the
code under test. mu = 0.9 is common practice (no published source for the value).
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper.core.optimizers import RULES, compute_update, fresh_state
from stepper.formats.model_file import load_setup
from stepper.session import Session

KILN = Path(__file__).resolve().parents[1] / "scenarios" / "kiln-tiny" / "model.toml"

MU = 0.9  # common practice
BETA1, BETA2, EPS = 0.9, 0.999, 1e-8  # Kingma & Ba 2015, section 2 ("good default settings")


def momentum_reference(g: np.ndarray, v: np.ndarray, rate: float) -> tuple[np.ndarray, np.ndarray]:
    """Sutskever et al. 2013, eq. 1: returns (change of theta, new velocity)."""
    v_new = MU * v - rate * g
    return v_new, v_new


def adam_reference(g: np.ndarray, m: np.ndarray, v: np.ndarray, t: int,
                   rate: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Kingma & Ba 2015, algorithm 1, one pass of the loop (t already incremented)."""
    m = BETA1 * m + (1 - BETA1) * g
    v = BETA2 * v + (1 - BETA2) * g**2
    m_hat = m / (1 - BETA1**t)
    v_hat = v / (1 - BETA2**t)
    return -rate * m_hat / (np.sqrt(v_hat) + EPS), m, v


def kiln_cost_slopes(session: Session) -> Callable[[np.ndarray], np.ndarray]:
    """Slopes of the kiln-tiny cost (tanh then sigmoid, half squared error) by autograd."""
    X, Y = session.setup.data.X, session.setup.data.Y
    blocks = session.net.layout.blocks

    def cost(theta: np.ndarray) -> np.ndarray:
        part = [anp.reshape(theta[b.start : b.stop], b.shape) for b in blocks]
        W1, b1, W2, b2 = part
        hidden = anp.tanh(anp.dot(X, W1) + b1)
        out = 1.0 / (1.0 + anp.exp(-(anp.dot(hidden, W2) + b2)))
        return 0.5 * anp.sum((out - Y) ** 2) / X.shape[0]

    assert [b.prefix for b in blocks] == ["L1.W", "L1.b", "L2.W", "L2.b"]
    return grad(cost)  # type: ignore[no-any-return]


def kiln(rule: str, rate: float) -> Session:
    s = Session(load_setup(KILN), rate=rate)
    if rule != "gd":
        s.set_rule(rule)
    return s


# -- one update, on its own -------------------------------------------------------------------


def test_momentum_one_update_matches_eq_1() -> None:
    rng = np.random.default_rng(1)
    g, v = rng.normal(size=7), rng.normal(size=7)
    state = fresh_state("momentum", 7)
    state.arrays["velocity"] = v.copy()
    delta, nxt = compute_update(state, g, 0.03)
    want_delta, want_v = momentum_reference(g, v, 0.03)
    np.testing.assert_allclose(delta, want_delta, rtol=1e-15)
    np.testing.assert_allclose(nxt.arrays["velocity"], want_v, rtol=1e-15)
    assert np.array_equal(state.arrays["velocity"], v), "compute_update must not touch its input"


@pytest.mark.parametrize("t", [1, 2, 10, 1000])
def test_adam_one_update_matches_algorithm_1(t: int) -> None:
    rng = np.random.default_rng(t)
    g = rng.normal(size=9)
    m, v = rng.normal(size=9) * 0.1, rng.random(9) * 0.01
    state = fresh_state("adam", 9)
    state.arrays["m"], state.arrays["v"] = m.copy(), v.copy()
    state.arrays["count"][:] = t - 1
    state.t = t - 1
    delta, nxt = compute_update(state, g, 0.002)
    want_delta, want_m, want_v = adam_reference(g, m, v, t, 0.002)
    np.testing.assert_allclose(delta, want_delta, rtol=1e-13)
    np.testing.assert_allclose(nxt.arrays["m"], want_m, rtol=1e-15)
    np.testing.assert_allclose(nxt.arrays["v"], want_v, rtol=1e-15)
    assert nxt.t == t


def test_adam_first_update_has_the_size_of_the_rate() -> None:
    # Kingma & Ba 2015, section 2.1: at the first step, m^/sqrt(v^) = g/|g|, so
    # every parameter moves by (almost exactly) the rate, against its slope.
    g = np.array([3.0, -0.02, 1e-3, -400.0])
    delta, _ = compute_update(fresh_state("adam", 4), g, 0.01)
    np.testing.assert_allclose(delta, -0.01 * np.sign(g), rtol=1e-5)


# -- several steps through the Session ----------------------------------------------------------


@pytest.mark.parametrize("rule, rate", [("gd", 0.8), ("momentum", 0.3), ("adam", 0.05)])
def test_several_steps_match_the_published_rule(rule: str, rate: float) -> None:
    s = kiln(rule, rate)
    slopes_of = kiln_cost_slopes(s)
    theta = s.setup.theta0.copy()
    n = theta.size
    velocity, m, v = np.zeros(n), np.zeros(n), np.zeros(n)
    for t in range(1, 26):
        g = slopes_of(theta)
        if rule == "gd":
            delta = -rate * g
        elif rule == "momentum":
            delta, velocity = momentum_reference(g, velocity, rate)
        else:
            delta, m, v = adam_reference(g, m, v, t, rate)
        theta = theta + delta
    s.step(25)
    np.testing.assert_allclose(s.theta, theta, rtol=1e-11, atol=1e-14)
    if rule == "momentum":
        np.testing.assert_allclose(s.rule_state.arrays["velocity"], velocity, rtol=1e-10, atol=1e-15)
    if rule == "adam":
        np.testing.assert_allclose(s.rule_state.arrays["m"], m, rtol=1e-10, atol=1e-15)
        np.testing.assert_allclose(s.rule_state.arrays["v"], v, rtol=1e-10, atol=1e-18)
    assert s.rule_state.t == 25
    assert s.step_count == 25


# -- frozen parameters ----------------------------------------------------------------------------


@pytest.mark.parametrize("rule", RULES)
def test_frozen_parameters_and_their_state_never_move(rule: str) -> None:
    s = kiln(rule, 0.2)
    s.step(3)  # some memory in the rule before freezing
    s.freeze_matching("L1.*")
    s.freeze([s.net.layout.index_of["L2.W[1,0]"]])
    frozen = s.frozen.copy()
    theta_before = s.theta.copy()
    state_before = s.rule_state.copy()
    s.step(20)
    assert np.array_equal(s.theta[frozen], theta_before[frozen])
    assert not np.array_equal(s.theta[~frozen], theta_before[~frozen])
    for key, array in s.rule_state.arrays.items():
        assert np.array_equal(array[frozen], state_before.arrays[key][frozen]), key
        assert not np.array_equal(array[~frozen], state_before.arrays[key][~frozen]), key


@pytest.mark.parametrize("rule", RULES)
def test_frozen_parameters_do_not_move_with_numeric_slopes_either(rule: str) -> None:
    s = kiln(rule, 0.2)
    s.set_slope_source("numeric")
    s.freeze_matching("*.b[*]")
    theta0 = s.theta.copy()
    s.step(5)
    assert np.array_equal(s.theta[s.frozen], theta0[s.frozen])


def test_adam_parameter_let_go_after_a_freeze_starts_from_its_first_step() -> None:
    # Kingma & Ba 2015, algorithm 1 starts each parameter with m = v = 0 and
    # t = 1 at its first update, so that first update moves it by the rate
    # (section 2.1). A parameter frozen for 200 steps and then let go must
    # make that same first move, not one scaled by the bias correction of step 201.
    s = kiln("adam", 0.01)
    i = s.net.layout.index_of["L2.W[0,1]"]
    s.freeze([i])
    s.step(200)
    s.unfreeze([i])
    g = kiln_cost_slopes(s)(s.theta.copy())[i]
    before = s.theta[i]
    s.step()
    assert s.theta[i] - before == pytest.approx(-0.01 * g / (abs(g) + EPS), rel=1e-9)
    assert s.rule_state.arrays["count"][i] == 1
    assert s.rule_state.t == 201
