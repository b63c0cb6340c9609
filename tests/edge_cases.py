"""Small networks built so that one documented threshold sits just inside or just outside a case.

Each builder returns ``(net, theta, X, Y)``. The thresholds themselves are written
out as literals in the tests that use these cases, so a change to a documented
number in the code makes those tests fail.
"""

from __future__ import annotations

import numpy as np

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.network import Network


def tanh_input_with_slope(slope: float) -> float:
    """The pre-activation ``z > 0`` at which ``tanh'(z) = 1 - tanh(z)^2`` equals ``slope`` (calculus)."""
    return float(np.arctanh(np.sqrt(1.0 - slope)))


def saturation_case(fractions: list[float], slope: float, n: int = 100) -> tuple[Network, np.ndarray,
                                                                                  np.ndarray, np.ndarray]:
    """One tanh unit per entry of ``fractions``; unit ``j`` has activation slope ``slope`` on that share
    of the ``n`` samples and slope 1 (``z = 0``) on the rest. ``W = I``, ``b = 0``, so ``Z = X``; an
    identity output with unit weights keeps the error signal non-zero.
    """
    k = len(fractions)
    X = np.zeros((n, k))
    z = tanh_input_with_slope(slope)
    for j, share in enumerate(fractions):
        X[: int(round(share * n)), j] = z
    net = Network(k, [Dense(k, k, ACTIVATIONS["tanh"]), Dense(k, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = np.zeros(net.n_params)
    views = net.views(theta)
    views[0]["W"][...] = np.eye(k)
    views[1]["W"][...] = 1.0
    Y = np.full((n, 1), -1.0)
    return net, theta, X, Y


def signal_ratio_case(ratio: float) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """Two identity layers of one unit, ``out = ratio * (x W1)`` with ``W1 = 1``: backpropagation
    multiplies the error signal by ``W2 = ratio`` on its way to the hidden unit (chain rule), so the
    hidden unit's error signal is exactly ``|ratio|`` times the output's.
    """
    net = Network(1, [Dense(1, 1, ACTIVATIONS["identity"]), Dense(1, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = np.zeros(net.n_params)
    views = net.views(theta)
    views[0]["W"][...] = 1.0
    views[1]["W"][...] = ratio
    rng = np.random.default_rng(7)
    X = rng.normal(size=(20, 1))
    Y = rng.normal(size=(20, 1))
    return net, theta, X, Y
