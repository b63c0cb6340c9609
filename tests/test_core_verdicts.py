"""Verdicts that never mislead: the logistic function's tails, unresolved slopes, kinks behind custom layers.

References: SciPy's ``scipy.special.expit`` (the logistic function, computed to
full precision over the whole float64 range) for the tails; the rounding
error of a finite difference, about ``u |C| / h`` (Press et al., Numerical
Recipes, 3rd ed., section 5.7), for the unresolved verdict.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from scipy.special import expit

from stepper import cli
from stepper.core.activations import ACTIVATIONS
from stepper.core.compare import judge
from stepper.core.gradcheck import iter_check
from stepper.core.layers import Dense, ParamSpec, Params
from stepper.core.network import Network
from stepper.core.numeric import numeric_slopes, run_to_end

Array = np.ndarray


# -- the logistic function in both tails --------------------------------------------------------


def test_sigmoid_matches_scipy_expit_over_the_whole_range() -> None:
    z = np.concatenate([np.linspace(-700.0, 700.0, 200_001), [-30.0, -37.5, -40.0, 0.0, 36.0, 40.0]])
    ours = ACTIVATIONS["sigmoid"].fn(z)
    reference = expit(z)
    # A few units in the last place everywhere, in both tails (z = -30 lost 2e-4 of its
    # value with 0.5 (1 + tanh(z / 2)), and every z below about -37 gave exactly 0).
    np.testing.assert_allclose(ours, reference, rtol=4 * np.finfo(float).eps, atol=0)
    assert ours[np.searchsorted(z[:200_001], -700.0)] > 0.0


def test_sigmoid_slope_matches_expit_in_both_tails() -> None:
    z = np.linspace(-700.0, 700.0, 20_001)
    act = ACTIVATIONS["sigmoid"]
    slope = act.derivative(z, act.fn(z))  # type: ignore[misc]
    # s'(z) = s(z) s(-z), each factor from SciPy.
    np.testing.assert_allclose(slope, expit(z) * expit(-z), rtol=1e-14, atol=0)


def test_sigmoid_in_place_gives_the_same_bits() -> None:
    z = np.random.default_rng(0).normal(0, 50, (7, 11))
    act = ACTIVATIONS["sigmoid"]
    assert act.apply_in_place(z.copy()).tobytes() == act.fn(z).tobytes()


# -- unresolved: the rounding allowance exceeds both slopes ---------------------------------------


def test_a_sign_error_below_the_rounding_allowance_is_unresolved_not_agree() -> None:
    # Cost near 1e6 with h = u^(1/3): allowance 16 u 1e6 / h is about 5.9e-4; slopes of 4e-6
    # with opposite signs have relative error 2 yet differ by less than the allowance.
    h = np.finfo(float).eps ** (1 / 3)
    noise = 16 * np.finfo(float).eps * 1e6 / h
    a = np.array([4e-6, 1e-3, 4e-6])
    n = np.array([-4e-6, 1e-3 * (1 + 1e-7), 4e-6 + 0.02])
    rel, verdict = judge(a, n, np.zeros(3, dtype=bool), noise)
    assert rel[0] == pytest.approx(2.0)  # |a - n| / max(|a|, |n|) for opposite signs
    assert list(verdict) == ["unresolved", "agree", "disagree"]


def test_slopes_below_the_floor_are_still_zero_not_unresolved() -> None:
    # With an allowance under the floor of 1e-8, slopes that small count as zero (agree).
    _, verdict = judge(np.array([7e-11]), np.array([0.0]), np.zeros(1, dtype=bool), 1.3e-9)
    assert list(verdict) == ["agree"]


def test_check_of_a_huge_cost_says_not_resolved_and_exits_1(write_model: Any,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    # Targets near 1000 make the cost about 1e6; input 'tiny' is about 1e-12, so its
    # weight's slope (about 2e-9) sits far below the allowance (about 6e-4).
    rows = ["big,tiny,y"] + [f"{0.1 * k:.1f},{1e-12 * (k % 3 + 1):.1e},{1000 + k}" for k in range(12)]
    model = write_model('''
loss = "half_squared_error"
[data]
file = "data.csv"
inputs = ["big", "tiny"]
targets = ["y"]
[[layers]]
units = 1
activation = "identity"
weights = [[0.5], [0.25]]
biases = [0.0]
''', "\n".join(rows) + "\n")
    code = cli.main(["check", str(model)])
    out = capsys.readouterr().out
    assert code == 1
    assert "L1.W[1,0]" in out and "unresolved" in out
    assert "NOT RESOLVED: 1 slope(s)" in out and "PASS" not in out


# -- kinks behind a custom layer -------------------------------------------------------------------


class Scale:
    """A stand-in for a user's layer: out = X * s (s one per unit); not a Dense layer."""

    def __init__(self, n: int) -> None:
        self.n_in = self.n_out = n

    @property
    def label(self) -> str:
        return "scale"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return (ParamSpec("s", (self.n_in,)),)

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]:
        return X * params["s"], X

    def backward(self, params: Params, cache: Any, dOut: Array) -> tuple[Params, Array]:
        return {"s": np.sum(dOut * cache, axis=0)}, dOut * params["s"]


def test_a_relu_at_its_kink_after_a_custom_layer_marks_the_custom_weights_kink() -> None:
    X = np.array([[1.0, 2.0], [0.5, -1.0]])
    Y = np.array([[0.3], [0.1]])
    net = Network(2, [Scale(2), Dense(2, 2, ACTIVATIONS["relu"]), Dense(2, 1, ACTIVATIONS["identity"])],
                  "half_squared_error")
    theta = np.array([1.0, 1.0, 0.6, -0.2, -0.4, 0.7, 0.0, 0.0, 1.0, -1.5, 0.0])
    # Unit 0 of the ReLU layer sits exactly at zero on sample 0: 1*0.6 + 2*(-0.3) = 0.
    theta[net.layout.find_block(1, "W").start + 2] = -0.3
    Z = net.forward(theta, X)[1][1].Z
    assert Z[0, 0] == 0.0
    numeric = numeric_slopes(net, theta, X, Y)
    scale = net.layout.find_block(0, "s")
    assert numeric.kink[scale.start : scale.stop].all()
    result = run_to_end(iter_check(net, theta, X, Y))
    assert result is not None
    verdicts = set(result.verdict[scale.start : scale.stop])
    assert "disagree" not in verdicts and "kink" in verdicts
    assert result.passed
