"""Clipping and decoupled weight decay against their published algorithms, written out again in numpy.

- Clipping by the global norm of the slopes: Pascanu, Mikolov & Bengio 2013,
  "On the difficulty of training recurrent neural networks", algorithm 1:
  ``if ||g|| >= c: g <- c g / ||g||``.
- AdamW: Loshchilov & Hutter 2019, "Decoupled Weight Decay Regularization",
  algorithm 2 (lines 6-12, without the L2 term in g): with the schedule
  multiplier ``eta_t``, ``theta_t = theta_{t-1} - eta_t (alpha m^_t / (sqrt(v^_t)
  + eps) + lambda theta_{t-1})``; Adam's constants from Kingma & Ba 2015.
- SGD with momentum and decoupled decay (SGDW): the same paper, algorithm 1:
  ``m_t = beta1 m_{t-1} + eta_t alpha g_t``, ``theta_t = theta_{t-1} - m_t - eta_t lambda theta_{t-1}``.

Stepper decays the weights and not the biases (common practice; the paper
decays every parameter), so the references below apply lambda through the same
mask of weights, and a test checks that biases are left alone. The slopes come
from ``autograd`` on the kiln-tiny cost written out again (test_session_rules).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stepper.core.descent import Descent, clip_by_norm, descent_update, decoupled_decay
from stepper.core.optimizers import fresh_state
from stepper.core.schedules import Schedule
from stepper.formats.model_file import load_setup
from stepper.session import Session
from test_session_rules import BETA1, BETA2, EPS, MU, kiln_cost_slopes

KILN = Path(__file__).resolve().parents[1] / "scenarios" / "kiln-tiny" / "model.toml"


def test_clipping_scales_a_long_slope_to_the_limit() -> None:
    g = np.array([3.0, 4.0, 0.0])  # norm 5
    clipped, norm = clip_by_norm(g, 1.0)
    assert norm == 5.0
    np.testing.assert_allclose(clipped, [0.6, 0.8, 0.0], rtol=1e-15)  # c g / ||g|| = g / 5


def test_clipping_leaves_a_short_slope_alone() -> None:
    g = np.array([0.3, -0.4])  # norm 0.5 < 1
    clipped, norm = clip_by_norm(g, 1.0)
    assert clipped is g and norm == pytest.approx(0.5)


def test_clipping_norm_leaves_frozen_slopes_out() -> None:
    g = np.array([3.0, 4.0, 100.0])
    moving = np.array([True, True, False])
    clipped, norm = clip_by_norm(g, 2.5, moving)
    assert norm == 5.0  # the frozen entry does not count
    np.testing.assert_allclose(clipped[:2], [1.5, 2.0], rtol=1e-15)


def test_decay_acts_on_weights_only() -> None:
    theta = np.array([2.0, -1.0, 4.0])
    mask = np.array([True, False, True])
    np.testing.assert_allclose(decoupled_decay(theta, 0.1, 0.5, mask), [-0.1, 0.0, -0.2], rtol=1e-15)


def test_clipped_update_of_plain_descent() -> None:
    state = fresh_state("gd", 2)
    g = np.array([6.0, 8.0])
    frozen = np.zeros(2, dtype=bool)
    up = descent_update(state, g, np.zeros(2), 0.1, 0, Descent(clip_norm=2.0), frozen, ~frozen)
    # g clipped to norm 2: [1.2, 1.6]; delta = -0.1 g.
    np.testing.assert_allclose(up.delta, [-0.12, -0.16], rtol=1e-15)
    assert up.clipped and up.slope_norm == 10.0


def adamw_reference(theta: np.ndarray, mask: np.ndarray, slopes_of, alpha: float, lam: float,
                    schedule: Schedule, steps: int) -> np.ndarray:
    """Loshchilov & Hutter 2019, algorithm 2 (AdamW), ``steps`` passes of its loop."""
    m = np.zeros_like(theta)
    v = np.zeros_like(theta)
    for t in range(1, steps + 1):
        g = slopes_of(theta)                                  # line 6, without the L2 term
        m = BETA1 * m + (1 - BETA1) * g                       # line 7
        v = BETA2 * v + (1 - BETA2) * g * g                   # line 8
        m_hat = m / (1 - BETA1**t)                            # line 9
        v_hat = v / (1 - BETA2**t)                            # line 10
        eta = schedule.factor_at(t - 1)                       # line 11: the schedule multiplier
        theta = theta - eta * (alpha * m_hat / (np.sqrt(v_hat) + EPS) + lam * mask * theta)  # line 12
    return theta


@pytest.mark.parametrize("schedule", [Schedule(), Schedule("cosine", steps=6, warmup=2)])
def test_adamw_matches_algorithm_2(schedule: Schedule) -> None:
    setup = load_setup(KILN)
    s = Session(setup, rate=0.05, rule="adam")
    s.set_weight_decay(0.3)
    s.set_schedule(schedule)
    expected = adamw_reference(setup.theta0.copy(), s.net.penalized, kiln_cost_slopes(s), 0.05, 0.3, schedule, 6)
    s.step(6)
    np.testing.assert_allclose(s.theta, expected, rtol=1e-12, atol=1e-15)


def test_sgdw_matches_algorithm_1() -> None:
    setup = load_setup(KILN)
    s = Session(setup, rate=0.2, rule="momentum")
    s.set_weight_decay(0.05)
    schedule = Schedule("exponential", every=2, factor=0.5)
    s.set_schedule(schedule)
    slopes_of = kiln_cost_slopes(s)
    theta = setup.theta0.copy()
    mask = s.net.penalized
    m = np.zeros_like(theta)
    for t in range(1, 5):
        eta = schedule.factor_at(t - 1)
        m = MU * m + eta * 0.2 * slopes_of(theta)            # algorithm 1, line 9 (beta1 = mu)
        theta = theta - m - eta * 0.05 * mask * theta         # line 12
    s.step(4)
    np.testing.assert_allclose(s.theta, theta, rtol=1e-12, atol=1e-15)


def test_decay_leaves_biases_and_frozen_weights_alone() -> None:
    setup = load_setup(KILN)
    s = Session(setup, rate=1e-12)  # a rate so small that only the decay moves anything visibly
    s.set_weight_decay(0.5)
    s.freeze([0])
    before = s.theta.copy()
    s.step()
    bias = setup.network.layout.is_bias
    moved = np.abs(s.theta - before)
    assert moved[0] == 0.0
    assert np.all(moved[bias] < 1e-10)
    weights = ~bias
    weights[0] = False
    # theta <- theta - 0.5 theta: every other weight halves (up to the tiny descent step).
    np.testing.assert_allclose(s.theta[weights], 0.5 * before[weights], rtol=1e-9)
