"""Activation functions and their slopes, keyed by the names used in model files.

Each entry maps pre-activations ``Z`` of shape ``(..., n_units)`` to
activations ``A`` of the same shape. Elementwise activations also give their
elementwise derivative ``dA/dZ``; every activation gives the vector-Jacobian
product ``vjp(Z, A, dA) -> dZ``, which is what backpropagation needs (softmax
couples the units of a row, so it has no elementwise derivative).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

#: Slope of leaky ReLU for negative inputs (Maas, Hannun & Ng 2013,
#: "Rectifier Nonlinearities Improve Neural Network Acoustic Models", use 0.01).
LEAKY_SLOPE = 0.01


@dataclass(frozen=True)
class Activation:
    """One activation function.

    Attributes:
        name: the key used in model files.
        fn: ``Z -> A``, any shape ``(..., n_units)``.
        derivative: ``(Z, A) -> dA/dZ`` elementwise, or None when units are coupled.
        kink: True when the function has a point where it is not differentiable
            (at ``Z == 0``); finite differences across it are unreliable.
        saturates: True for squashing functions whose slope can vanish (sigmoid, tanh).
        in_place: optional ``Z -> None`` that overwrites ``Z`` with ``fn(Z)``, bit for
            bit; the numeric slopes use it to avoid allocating large stacked arrays.
        constants: the function's own constants by name (leaky ReLU's ``alpha``), for
            writers of other formats (ONNX) that must spell them out.
    """

    name: str
    fn: Callable[[Array], Array]
    derivative: Callable[[Array, Array], Array] | None
    kink: bool = False
    saturates: bool = False
    in_place: Callable[[Array], object] | None = None
    constants: tuple[tuple[str, float], ...] = ()

    @property
    def elementwise(self) -> bool:
        return self.derivative is not None

    def vjp(self, Z: Array, A: Array, dA: Array) -> Array:
        """Slope of the cost with respect to ``Z`` given its slope ``dA`` w.r.t. ``A``.

        All three arrays have shape ``(..., n_units)``.
        """
        if self.derivative is not None:
            return dA * self.derivative(Z, A)
        # softmax: J = diag(a) - a a^T, so J^T dA = a * (dA - <dA, a>).
        return A * (dA - np.sum(dA * A, axis=-1, keepdims=True))

    def apply_in_place(self, Z: Array) -> Array:
        """Overwrite ``Z`` (any shape ``(..., n_units)``) with ``fn(Z)`` and return it."""
        if self.in_place is not None:
            self.in_place(Z)
        else:
            Z[...] = self.fn(Z)
        return Z


def _sigmoid(Z: Array) -> Array:
    # With e = exp(-|z|) (never overflows): 1 / (1 + e) for z >= 0 and e / (1 + e) for
    # z < 0. Both forms keep full relative precision in their tail; the form
    # 0.5 * (1 + tanh(z / 2)) loses it for z below about -20 and gives 0 below -37.
    e = np.exp(-np.abs(Z))
    return np.where(Z < 0.0, e, 1.0) / (1.0 + e)


def _sigmoid_in_place(Z: Array) -> None:
    # The same operations as _sigmoid, so the same bits.
    negative = Z < 0.0
    np.abs(Z, out=Z)
    np.negative(Z, out=Z)
    np.exp(Z, out=Z)
    denominator = Z + 1.0
    np.divide(np.where(negative, Z, 1.0), denominator, out=Z)


def _sigmoid_slope(Z: Array, A: Array) -> Array:
    # s (1 - s) = e / (1 + e)^2 with e = exp(-|z|): precise in both tails, where
    # A (1 - A) loses 1 - A to rounding once A is within a few ulps of 1.
    e = np.exp(-np.abs(Z))
    return e / ((1.0 + e) * (1.0 + e))


def _leaky(alpha: float) -> Activation:
    """Leaky ReLU with slope ``alpha`` for negative inputs."""

    def in_place(Z: Array) -> None:
        np.multiply(Z, alpha, out=Z, where=~(Z > 0.0))

    name = "leaky_relu" if alpha == LEAKY_SLOPE else f"leaky_relu(alpha={alpha:.7g})"
    return Activation(
        name,
        lambda Z: np.where(Z > 0.0, Z, alpha * Z),
        lambda Z, A: np.where(Z > 0.0, 1.0, alpha),
        kink=True,
        in_place=in_place,
        constants=(("alpha", alpha),),
    )


def _softplus(Z: Array) -> Array:
    # log(1 + e^z) = max(z, 0) + log1p(e^-|z|): no overflow for large |z|.
    return np.maximum(Z, 0.0) + np.log1p(np.exp(-np.abs(Z)))


#: Up to this many units, a row's maximum is taken column by column (see :func:`row_max`).
COLUMNWISE_MAX = 32


def row_max(Z: Array) -> Array:
    """The maximum over the last axis, keeping it: ``(..., n_units) -> (..., 1)``; exactly ``np.max``'s.

    numpy reduces a short last axis slowly (for 3 units about 30 times slower
    than one elementwise ``maximum`` per unit, tests/benchmarks/bench_rows.py),
    so a few units are compared column by column.
    """
    if not 0 < Z.shape[-1] <= COLUMNWISE_MAX:
        return np.max(Z, axis=-1, keepdims=True)
    out = Z[..., 0].copy()
    for k in range(1, Z.shape[-1]):
        np.maximum(out, Z[..., k], out=out)
    return out[..., None]


def softmax(Z: Array) -> Array:
    """Row-wise softmax over the last axis, shifted by the row maximum for stability."""
    e = Z - row_max(Z)
    np.exp(e, out=e)  # in place: a fresh array, and large ones cost page faults to allocate again
    e /= np.sum(e, axis=-1, keepdims=True)
    return e


def log_softmax(Z: Array) -> Array:
    """``log(softmax(Z))`` over the last axis by the log-sum-exp trick."""
    shifted = Z - row_max(Z)
    return shifted - np.log(np.sum(np.exp(shifted), axis=-1, keepdims=True))


ACTIVATIONS: dict[str, Activation] = {
    a.name: a
    for a in (
        Activation("identity", lambda Z: Z.copy(), lambda Z, A: np.ones_like(Z), in_place=lambda Z: None),
        Activation("sigmoid", _sigmoid, _sigmoid_slope, saturates=True, in_place=_sigmoid_in_place),
        Activation("tanh", np.tanh, lambda Z, A: 1.0 - A * A, saturates=True,
                   in_place=lambda Z: np.tanh(Z, out=Z)),
        Activation(
            "relu",
            lambda Z: np.maximum(Z, 0.0),
            lambda Z, A: (Z > 0.0).astype(np.float64),
            kink=True,
            in_place=lambda Z: np.maximum(Z, 0.0, out=Z),
        ),
        _leaky(LEAKY_SLOPE),
        Activation("softplus", _softplus, lambda Z, A: _sigmoid(Z)),
        Activation("softmax", softmax, None, saturates=True),
    )
}


def get_activation(name: str) -> Activation:
    """The activation called ``name``; KeyError if there is none."""
    return ACTIVATIONS[name]


def leaky_relu(alpha: float) -> Activation:
    """Leaky ReLU with negative slope ``alpha`` (the registry's own entry for :data:`LEAKY_SLOPE`).

    Model files name only the registry's entries; other slopes come from
    formats that carry the constant, such as ONNX's ``LeakyRelu``.
    """
    return ACTIVATIONS["leaky_relu"] if alpha == LEAKY_SLOPE else _leaky(float(alpha))
