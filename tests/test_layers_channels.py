"""Finite differences one channel at a time agree with whole forward passes.

A convolution's kernel entry (or a batch norm's scale or shift) moves one channel
of that layer's output; where pooling, batch norm, dropout and flatten follow,
each perturbed copy carries only that channel up to the next dense layer
(stepper.core.stacked). Those numbers must be the definition's: central
differences with a whole forward pass per evaluation (Press et al., *Numerical
Recipes*, 3rd ed., 2007, section 5.7), within the rounding of the step; and
backpropagation's slopes (checked against jax in test_layers_jax.py) must agree
with them. A ReLU or max-pool corner crossed on the way is a kink, as on the
general path.
"""

from __future__ import annotations

from typing import Callable

import numpy as np
import pytest

from layer_cases import grid
from stepper.core import stacked
from stepper.core.activations import ACTIVATIONS
from stepper.core.gradcheck import compare
from stepper.core.layers import BatchNorm, Conv, Dense, Dropout, Flatten, Layer, LayerNorm, Pool
from stepper.core.network import Network
from stepper.core.numeric import default_step, numeric_slopes
from test_layers_numeric import by_definition

ACT = ACTIVATIONS


def image_chain() -> list[Layer]:
    return [Conv((2, 6, 6), 3, grid((6, 6), (3, 3), (1, 1), "same"), ACT["relu"]),
            Pool((3, 6, 6), grid((6, 6), (2, 2), (2, 2)), "max"), Flatten((3, 3, 3)),
            Dense(27, 4, ACT["relu"]), Dense(4, 3, ACT["softmax"])]


def signal_chain() -> list[Layer]:
    return [Conv((1, 12), 2, grid((12,), (3,), (1,)), ACT["tanh"]), BatchNorm((2, 10)),
            Pool((2, 10), grid((10,), (2,), (2,)), "avg"), Flatten((2, 5)), Dropout((10,), 0.3, seed=3),
            Dense(10, 3, ACT["tanh"]), Dense(3, 1, ACT["identity"])]


def mixed_chain() -> list[Layer]:
    # A layer norm mixes the channels: the kernel's entries take the general path.
    return [Conv((1, 5, 5), 2, grid((5, 5), (2, 2), (1, 1)), ACT["relu"]), Flatten((2, 4, 4)), LayerNorm((32,)),
            Dense(32, 2, ACT["identity"])]


CHAINS: dict[str, tuple[Callable[[], list[Layer]], str]] = {
    "conv2d relu, max pool, flatten, dense relu, softmax": (image_chain, "categorical_cross_entropy"),
    "conv1d tanh, batch norm, avg pool, flatten, dropout, dense": (signal_chain, "mean_squared_error"),
    "conv2d relu, flatten, layer norm, dense": (mixed_chain, "mean_squared_error"),
}


def build(name: str, training: bool) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    make, loss = CHAINS[name]
    layers = make()
    first = layers[0]
    net = Network(first.n_in, layers, loss, input_shape=first.in_shape)  # type: ignore[attr-defined]
    rng = np.random.default_rng(8)
    state = net.initial_state() + rng.uniform(0.0, 0.5, net.state_layout.size)  # running statistics
    net = net.at(training, 2, state)
    theta = rng.normal(0.0, 0.6, net.n_params)
    X = rng.normal(size=(7, net.n_inputs))
    width = net.n_outputs
    Y = np.eye(width)[rng.integers(0, width, 7)] if loss == "categorical_cross_entropy" else rng.normal(size=(7, 1))
    return net, theta, X, Y


@pytest.mark.parametrize("training", [True, False], ids=["training", "evaluation"])
@pytest.mark.parametrize("name", list(CHAINS))
def test_one_channel_at_a_time_matches_whole_passes(name: str, training: bool) -> None:
    net, theta, X, Y = build(name, training)
    # The kernel's entries take the channel path unless a layer mixes the channels.
    assert (stacked.channel_route(net, 0) is None) == ("layer norm" in name)
    cost, analytic = net.cost_and_slopes(theta, X, Y)
    numeric = numeric_slopes(net, theta, X, Y, "central")
    h = default_step("central")
    np.testing.assert_allclose(numeric.slopes, by_definition(net, theta, X, Y, h), rtol=1e-7, atol=1e-10)
    result = compare(cost, analytic, numeric)
    assert result.counts["disagree"] == 0 and result.counts["doubtful"] == 0, result.counts


def test_the_channel_path_flags_the_same_kinks_as_the_general_one(monkeypatch: pytest.MonkeyPatch) -> None:
    # A step large enough to push many ReLU inputs and max-pool winners across their corners.
    net, theta, X, Y = build("conv2d relu, max pool, flatten, dense relu, softmax", True)
    channel = numeric_slopes(net, theta, X, Y, "central", h=0.05)
    assert channel.kink.sum() > 5
    monkeypatch.setattr(stacked, "channel_route", lambda net, layer: None)
    general = numeric_slopes(net, theta, X, Y, "central", h=0.05)
    np.testing.assert_array_equal(channel.kink, general.kink)
    np.testing.assert_allclose(channel.slopes, general.slopes, rtol=1e-9, atol=1e-12)
