"""``activation``: an activation function on its own, applied to every entry of a row.

Dense layers and convolutions carry an activation of their own. This layer is
for the places where one comes after something else: the order "dense (or
convolution) without activation, then batch norm or layer norm, then ReLU"
(Ioffe & Szegedy 2015, section 3.2, normalize the pre-activations ``x = Wu + b``
before the nonlinearity), or a ReLU after a pooling or a dropout. It has no
weights and keeps the shape of its input, shaped or flat: entry ``i`` of the
output is ``f(x_i)``, its slope ``f'(x_i)`` times the output's slope.

Every activation of :data:`stepper.core.activations.ACTIVATIONS` except
softmax, which couples the entries of a row and belongs to a dense output layer.
Its cache is a :class:`stepper.core.layers.dense.DenseCache` whose ``Z`` is the
layer's input: so a sigmoid last layer is paired with binary cross-entropy
exactly as a dense one is (:attr:`stepper.core.network.Network.fused`), and its
kinks are found as a dense layer's are (:class:`stepper.core.layers.base.Activated`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation
from stepper.core.layers.base import Activated, Array, Flags, Params, Shaped, shape_text
from stepper.core.layers.dense import DenseCache

_NOTHING = np.empty(0)


@dataclass(frozen=True)
class ActivationLayer(Shaped, Activated):
    """An elementwise activation of shaped or flat rows; no weights.

    Attributes:
        in_shape: the shape of a row (kept as is).
        activation: any elementwise activation (not softmax).
    """

    in_shape: tuple[int, ...]
    activation: Activation

    type_name = "activation"

    def __post_init__(self) -> None:
        if not self.activation.elementwise:
            raise ValueError(f"an activation layer applies an elementwise function, not {self.activation.name}")

    @property
    def out_shape(self) -> tuple[int, ...]:
        return self.in_shape

    @property
    def label(self) -> str:
        return f"activation {shape_text(self.in_shape)} {self.activation.name}"

    @property
    def kind(self) -> str:
        return f"{self.activation.name} {shape_text(self.in_shape)}"

    def why_no_breakdown(self) -> str:
        return "it has no weights"

    def forward(self, params: Params, X: Array) -> tuple[Array, DenseCache]:
        """``(..., n, n_in) -> (..., n, n_in)``; the cache holds the input as ``Z`` and the output as ``A``."""
        A = self.activation.fn(X)
        return A, DenseCache(_NOTHING, X, A)

    def backward(self, params: Params, cache: DenseCache, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        if not need_dx:
            return {}, np.empty((0, self.n_in))
        return {}, self.activation.vjp(cache.Z, cache.A, dOut)

    def backward_from_z(self, dZ: Array) -> tuple[Params, Array]:
        """Slopes when the loss gave the slope w.r.t. the input ``Z`` directly (a fused output): passed on."""
        return {}, dZ

    def channel_width(self, width: int) -> int | None:
        return width if self.n_in % width == 0 else None

    def channel_forward(self, params: Params, A: Array, channels: NDArray[np.int64], base: DenseCache) -> tuple[Array, Flags]:
        k, n, width = A.shape
        out = self.activation.fn(A)
        if not self.activation.kink:
            return out, np.zeros(k, dtype=bool)
        before = base.Z.reshape(n, -1, width)[:, channels].swapaxes(0, 1)  # (k, n, width)
        return out, np.any((A > 0.0) != (before > 0.0), axis=(1, 2))
