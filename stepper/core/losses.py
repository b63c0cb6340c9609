"""Cost functions, keyed by the names used in model files.

Every loss reduces outputs ``A`` and targets ``Y`` of shape ``(..., n_samples,
n_outputs)`` to a cost of shape ``(...)``: leading axes are kept, so one call
can score many perturbed copies of a network at once. The cost is always an
average over samples; what happens across the outputs of one sample is part of
each loss's definition:

- ``half_squared_error``: per sample ``1/2 * sum_k (a_k - y_k)^2``, averaged over samples.
- ``mean_squared_error``: ``(a - y)^2`` averaged over samples and outputs.
- ``binary_cross_entropy``: ``-(y log a + (1-y) log(1-a))`` averaged over samples and outputs.
- ``categorical_cross_entropy``: per sample ``-sum_k y_k log a_k``, averaged over samples.

Two pairs of output activation and loss are computed from the pre-activations
``Z`` instead (sigmoid with binary cross-entropy, softmax with categorical
cross-entropy): the cost is then finite for any ``Z`` (log-sum-exp), and the
slope is the familiar ``(a - y)`` scaled by the averaging (for categorical
cross-entropy ``a * sum_k y_k - y``, which is ``a - y`` when each target row
sums to one).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import _sigmoid, _softplus, log_softmax, softmax

Array = NDArray[np.float64]

#: Outputs are clipped to [EPS, 1 - EPS] before a logarithm when a cross-entropy
#: is not paired with its own output activation, so log(0) never happens.
EPS = 1e-12


@dataclass(frozen=True)
class Loss:
    """One loss.

    Attributes:
        name: key used in model files.
        value: ``(A, Y) -> cost`` with shapes ``(..., n, m), (n, m) -> (...)``.
        grad: ``(A, Y) -> dCost/dA`` of shape ``(..., n, m)``.
    """

    name: str
    value: Callable[[Array, Array], Array]
    grad: Callable[[Array, Array], Array]


@dataclass(frozen=True)
class FusedLoss:
    """A loss computed from the output layer's pre-activations ``Z``.

    Attributes:
        value: ``(Z, Y) -> cost``, shapes ``(..., n, m), (n, m) -> (...)``.
        grad_z: ``(Z, Y) -> dCost/dZ`` of shape ``(..., n, m)``.
    """

    value: Callable[[Array, Array], Array]
    grad_z: Callable[[Array, Array], Array]


def _count(A: Array) -> tuple[int, int]:
    return A.shape[-2], A.shape[-1]


def _half_se(A: Array, Y: Array) -> Array:
    n, _ = _count(A)
    return 0.5 * np.sum((A - Y) ** 2, axis=(-2, -1)) / n


def _half_se_grad(A: Array, Y: Array) -> Array:
    n, _ = _count(A)
    return (A - Y) / n


def _mse(A: Array, Y: Array) -> Array:
    n, m = _count(A)
    return np.sum((A - Y) ** 2, axis=(-2, -1)) / (n * m)


def _mse_grad(A: Array, Y: Array) -> Array:
    n, m = _count(A)
    return 2.0 * (A - Y) / (n * m)


def _bce(A: Array, Y: Array) -> Array:
    n, m = _count(A)
    P = np.clip(A, EPS, 1.0 - EPS)
    return -np.sum(Y * np.log(P) + (1.0 - Y) * np.log1p(-P), axis=(-2, -1)) / (n * m)


def _bce_grad(A: Array, Y: Array) -> Array:
    n, m = _count(A)
    inside = (A > EPS) & (A < 1.0 - EPS)
    P = np.clip(A, EPS, 1.0 - EPS)
    return np.where(inside, (P - Y) / (P * (1.0 - P)), 0.0) / (n * m)


def _cce(A: Array, Y: Array) -> Array:
    n, _ = _count(A)
    return -np.sum(Y * np.log(np.clip(A, EPS, None)), axis=(-2, -1)) / n


def _cce_grad(A: Array, Y: Array) -> Array:
    n, _ = _count(A)
    return np.where(A > EPS, -Y / np.clip(A, EPS, None), 0.0) / n


LOSSES: dict[str, Loss] = {
    loss.name: loss
    for loss in (
        Loss("half_squared_error", _half_se, _half_se_grad),
        Loss("mean_squared_error", _mse, _mse_grad),
        Loss("binary_cross_entropy", _bce, _bce_grad),
        Loss("categorical_cross_entropy", _cce, _cce_grad),
    )
}


def _bce_logits(Z: Array, Y: Array) -> Array:
    # -(y log s(z) + (1-y) log(1-s(z))) = softplus(z) - y z
    n, m = _count(Z)
    return np.sum(_softplus(Z) - Y * Z, axis=(-2, -1)) / (n * m)


def _bce_logits_grad(Z: Array, Y: Array) -> Array:
    n, m = _count(Z)
    return (_sigmoid(Z) - Y) / (n * m)


def _cce_logits(Z: Array, Y: Array) -> Array:
    n, _ = _count(Z)
    return -np.sum(Y * log_softmax(Z), axis=(-2, -1)) / n


def _cce_logits_grad(Z: Array, Y: Array) -> Array:
    # d/dz_j of -sum_k y_k log p_k is p_j * sum_k y_k - y_j; the familiar p - y
    # holds only when the target row sums to one (exactly so for one-hot rows).
    n, _ = _count(Z)
    return (softmax(Z) * np.sum(Y, axis=-1, keepdims=True) - Y) / n


#: (output activation, loss) pairs computed from the logits.
FUSED: dict[tuple[str, str], FusedLoss] = {
    ("sigmoid", "binary_cross_entropy"): FusedLoss(_bce_logits, _bce_logits_grad),
    ("softmax", "categorical_cross_entropy"): FusedLoss(_cce_logits, _cce_logits_grad),
}
