"""Numeric slopes through a piecewise-linear layer (stepper.core.numeric_dense) equal the full run.

Moves of a layer before a ReLU, leaky ReLU or identity layer pass that layer by
a per-sample matrix instead of running it; the slopes must be those of running
every moved copy in full, up to rounding, with the same kink marks, whether or
not the move comes near a kink. The reference is the definition of the
central difference, ``(C(w + h) - C(w - h)) / (2 h)`` with the cost evaluated
by a whole forward pass per move (Nocedal & Wright, *Numerical Optimization*,
2nd ed., 2006, section 8.1), and the same pass with the shortcut turned off.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from stepper.core import numeric_dense
from stepper.core.activations import ACTIVATIONS, leaky_relu
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.numeric import numeric_slopes

PIECEWISE = {"relu": ACTIVATIONS["relu"], "leaky_relu": ACTIVATIONS["leaky_relu"],
             "leaky_relu(0.3)": leaky_relu(0.3), "identity": ACTIVATIONS["identity"]}


def problem(middle: str, seed: int = 0) -> tuple[Network, Any, Any, Any]:
    """6 inputs -> 12 tanh -> 10 ``middle`` -> 2 outputs, mean squared error, 40 rows."""
    net = Network(6, [Dense(6, 12, ACTIVATIONS["tanh"]), Dense(12, 10, PIECEWISE[middle]),
                      Dense(10, 2, ACTIVATIONS["identity"])], "mean_squared_error")
    rng = np.random.default_rng(seed)
    theta = rng.normal(0.0, 0.6, net.n_params)
    X = rng.normal(size=(40, 6))
    Y = rng.normal(size=(40, 2))
    return net, theta, X, Y


def by_definition(net: Network, theta: Any, X: Any, Y: Any, h: float, which: range) -> Any:
    out = np.full(net.n_params, np.nan)
    for i in which:
        up, down = theta.copy(), theta.copy()
        up[i] += h
        down[i] -= h
        out[i] = (net.cost(up, X, Y) - net.cost(down, X, Y)) / (2.0 * h)
    return out


@pytest.mark.parametrize("middle", sorted(PIECEWISE))
@pytest.mark.parametrize("h", [None, 0.05])
def test_moves_through_a_piecewise_linear_layer_give_the_full_runs_slopes(
        middle: str, h: float | None, monkeypatch: pytest.MonkeyPatch) -> None:
    net, theta, X, Y = problem(middle)
    made: list[int] = []
    original = numeric_dense._through_matrix

    def spy(*args: Any) -> Any:
        made.append(1)
        return original(*args)

    monkeypatch.setattr(numeric_dense, "_through_matrix", spy)
    fast = numeric_slopes(net, theta, X, Y, "central", h)
    assert made  # the first layer's moves went through the middle layer
    monkeypatch.setattr(numeric_dense, "THROUGH_BYTES", 0)  # every move runs in full
    full = numeric_slopes(net, theta, X, Y, "central", h)
    scale = float(np.max(np.abs(full.slopes)))
    np.testing.assert_allclose(fast.slopes, full.slopes, rtol=0, atol=1e-9 * scale)
    assert np.array_equal(fast.kink, full.kink)
    first = range(net.layout.blocks[0].start, net.layout.blocks[1].stop)  # the first layer's W and b
    step = fast.h
    defined = by_definition(net, theta, X, Y, step, first)
    np.testing.assert_allclose(fast.slopes[first.start:first.stop], defined[first.start:first.stop], rtol=0,
                               atol=1e-8 * scale)
    if middle != "identity" and h is not None:
        # a step this large brings some moves to a kink of the middle layer: those ran in full
        assert fast.kink[first.start:first.stop].any() and not fast.kink[first.start:first.stop].all()


def test_piece_slopes_are_read_off_the_function() -> None:
    assert numeric_dense.piece_slopes(ACTIVATIONS["relu"]) == (0.0, 1.0)
    assert numeric_dense.piece_slopes(leaky_relu(0.25)) == (0.25, 1.0)
    assert numeric_dense.piece_slopes(ACTIVATIONS["identity"]) == (1.0, 1.0)
    assert numeric_dense.piece_slopes(ACTIVATIONS["tanh"]) is None
    assert numeric_dense.piece_slopes(ACTIVATIONS["softplus"]) is None


def test_the_matrices_stay_within_their_memory_bound() -> None:
    # G is (units, rows, after) and the product's other factor (next units, rows, after):
    # a wide middle layer before a half-as-wide one would need gigabytes for the second.
    narrow_first = Network(4, [Dense(4, 10, ACTIVATIONS["tanh"]), Dense(10, 5000, ACTIVATIONS["relu"]),
                               Dense(5000, 2500, ACTIVATIONS["identity"])], "mean_squared_error")
    assert not numeric_dense.through_pays(narrow_first, 0, 256, 10_000)
    small = Network(4, [Dense(4, 10, ACTIVATIONS["tanh"]), Dense(10, 500, ACTIVATIONS["relu"]),
                        Dense(500, 1, ACTIVATIONS["identity"])], "mean_squared_error")
    assert numeric_dense.through_pays(small, 0, 256, 10_000)
    assert not numeric_dense.through_pays(small, 0, 256, 9)  # fewer moves than units: not worth making G
