"""Rate schedules against their published equations, evaluated by hand at chosen steps.

- step decay ``g ** floor(t / s)`` and exponential decay ``g ** (t / s)``: the
  formula of TensorFlow's ``ExponentialDecay`` (``decay_rate ^ (step /
  decay_steps)``, floored with ``staircase=True``);
- cosine: Loshchilov & Hutter 2017, "SGDR: Stochastic Gradient Descent with Warm
  Restarts", eq. 5, ``eta_t = eta_min + (eta_max - eta_min)(1 + cos(pi T_cur / T_i)) / 2``;
- linear warm-up to the full rate: Goyal et al. 2017, "Accurate, Large
  Minibatch SGD", section 2.2 (gradual warm-up).

The expected numbers are worked out in the comments, not computed by the code
under test.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from stepper.core.schedules import KINDS, Schedule, ScheduleError, from_dict, parse_schedule
from stepper.formats.model_file import load_setup
from stepper.session import Session

KILN = Path(__file__).resolve().parents[1] / "scenarios" / "kiln-tiny" / "model.toml"


def test_constant_is_one_everywhere() -> None:
    s = Schedule()
    assert [s.factor_at(t) for t in (0, 1, 10**6)] == [1.0, 1.0, 1.0]


def test_step_decay_at_chosen_steps() -> None:
    s = Schedule("step", every=100, factor=0.5)
    # floor(t / 100): 0 for t < 100, 1 at 100..199, 2 at 250.
    assert s.factor_at(0) == 1.0
    assert s.factor_at(99) == 1.0
    assert s.factor_at(100) == 0.5
    assert s.factor_at(250) == 0.25


def test_exponential_decay_at_chosen_steps() -> None:
    s = Schedule("exponential", every=100, factor=0.25)
    # 0.25 ** (50 / 100) = 0.5; 0.25 ** (150 / 100) = 0.125; continuous between.
    assert s.factor_at(50) == pytest.approx(0.5, rel=1e-15)
    assert s.factor_at(150) == pytest.approx(0.125, rel=1e-15)
    assert s.factor_at(100) == pytest.approx(0.25, rel=1e-15)


def test_cosine_follows_sgdr_eq_5() -> None:
    s = Schedule("cosine", steps=100, floor=0.1)
    # eta_min = 0.1, eta_max = 1, T_i = 100.
    assert s.factor_at(0) == pytest.approx(1.0)                      # cos 0 = 1
    assert s.factor_at(50) == pytest.approx(0.55)                    # 0.1 + 0.9 * (1 + 0) / 2
    assert s.factor_at(25) == pytest.approx(0.1 + 0.45 * (1 + math.sqrt(0.5)))  # cos(pi/4) = sqrt(1/2)
    assert s.factor_at(100) == pytest.approx(0.1)                    # the end of the period
    assert s.factor_at(400) == pytest.approx(0.1)                    # stays at the floor without restarts


def test_cosine_warm_up_then_descent() -> None:
    s = Schedule("cosine", steps=100, warmup=10)
    # Warm-up: (t + 1) / 10 for t = 0..9, reaching the full rate at the tenth step.
    assert s.factor_at(0) == pytest.approx(0.1)
    assert s.factor_at(4) == pytest.approx(0.5)
    assert s.factor_at(9) == pytest.approx(1.0)
    # Then SGDR eq. 5 with T_cur = t - 10 and eta_min = 0: at t = 60, T_cur = 50, factor 1/2.
    assert s.factor_at(10) == pytest.approx(1.0)
    assert s.factor_at(60) == pytest.approx(0.5)


def test_cosine_restarts_every_period() -> None:
    s = Schedule("cosine", steps=40, restart=True)
    # SGDR with T_mult = 1: T_cur resets every 40 steps, so t = 50 is t = 10 again.
    assert s.factor_at(50) == pytest.approx(s.factor_at(10))
    assert s.factor_at(40) == pytest.approx(1.0)
    assert s.factor_at(10) == pytest.approx(0.5 * (1 + math.cos(math.pi / 4)))


@pytest.mark.parametrize("text", ["constant", "step:every=100,factor=0.5", "exponential:every=30,factor=0.9",
                                  "cosine:steps=1000,warmup=50,floor=0.01,restart=yes"])
def test_text_and_dict_round_trip(text: str) -> None:
    s = parse_schedule(text)
    assert s.text() == text
    assert from_dict(s.as_dict()) == s
    assert s.kind in KINDS


@pytest.mark.parametrize("text,words", [
    ("cosine", "needs steps"),
    ("step:every=0,factor=0.5", "every = 0"),
    ("step:every=10,factor=1.5", "must be in (0, 1]"),
    ("cosine:steps=10,floor=1", "floor"),
    ("cosine:steps=10,every=3", "takes no such key"),
    ("wavy", "unknown schedule 'wavy'"),
    ("cosine:steps=ten", "is not a number"),
    ("cosine:steps=2.5", "whole number"),
    ("exponential:every=10,factor=nan", "not a finite number"),
])
def test_bad_schedules_are_named(text: str, words: str) -> None:
    with pytest.raises(ScheduleError, match=None) as info:
        parse_schedule(text)
    assert words in str(info.value)


def test_steps_use_the_scheduled_rate() -> None:
    # Plain descent, theta <- theta - rate * factor(t) * g(theta), with a step schedule halving
    # the rate every 2 steps: rates 0.4, 0.4, 0.2, 0.2, 0.1 for the first five steps.
    setup = load_setup(KILN)
    s = Session(setup, rate=0.4)
    s.set_schedule(Schedule("step", every=2, factor=0.5))
    theta = setup.theta0.copy()
    X, Y = setup.data.X, setup.data.Y
    for rate in (0.4, 0.4, 0.2, 0.2, 0.1):
        theta = theta - rate * setup.network.cost_and_slopes(theta, X, Y)[1]
    s.step(5)
    np.testing.assert_allclose(s.theta, theta, rtol=0, atol=1e-15)
    assert s.scheduled_rate() == pytest.approx(0.1)  # step 5: floor(5 / 2) = 2 halvings
