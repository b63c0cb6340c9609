"""A dense layer whose product and bias are scaled by constants: ``A = f(alpha X W + beta b)``.

ONNX's Gemm operator computes ``alpha * A' B' + beta * C``. When ``alpha`` and
``beta`` are both 1 that is a plain :class:`stepper.core.layers.Dense` layer;
otherwise the weights stay exactly the values the file holds (so that they go
back unchanged) and this layer applies the two constants. It runs through the
general paths of the built-in layers, like any layer that is not ``Dense``: the
numeric slopes run its perturbed copies stacked (:mod:`stepper.core.stacked`),
and the unit-by-unit insight views (which assume ``Z = X W + b``) leave it out.

Shapes: ``X`` ``(n, n_in)``, ``W`` ``(n_in, n_out)``, ``b`` ``(n_out,)``, output ``(n, n_out)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation
from stepper.core.layers import DenseCache, ParamSpec, Params
from stepper.core.layers.base import Activated
from stepper.core.layers.dense import dense_specs

Array = NDArray[np.float64]


@dataclass(frozen=True)
class ScaledDense(Activated):
    """``A = activation(alpha * (X @ W) + beta * b)``; ``b`` only when ``bias``.

    Attributes:
        n_in, n_out: input width and number of units.
        activation: applied to ``Z``.
        alpha: factor of the product ``X @ W``.
        beta: factor of the bias.
        bias: whether the layer has ``b``.
    """

    n_in: int
    n_out: int
    activation: Activation
    alpha: float
    beta: float
    bias: bool = True

    type_name = "dense"

    @property
    def in_shape(self) -> tuple[int, ...]:
        return (self.n_in,)

    @property
    def out_shape(self) -> tuple[int, ...]:
        return (self.n_out,)

    @property
    def kind(self) -> str:
        return f"{self.activation.name} {self.n_in}->{self.n_out} scaled"

    @property
    def label(self) -> str:
        scale = f"alpha {self.alpha:g}" + (f", beta {self.beta:g}" if self.bias else "")
        return f"dense {self.n_in}->{self.n_out} {self.activation.name} ({scale})"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return dense_specs(self.n_in, self.n_out, self.bias)

    def forward(self, params: Params, X: Array) -> tuple[Array, DenseCache]:
        """``X`` ``(..., n, n_in)`` to ``A`` ``(..., n, n_out)``."""
        Z = self.alpha * (X @ params["W"])
        if self.bias:
            Z = Z + self.beta * params["b"]
        A = self.activation.fn(Z)
        return A, DenseCache(X, Z, A)

    def backward(self, params: Params, cache: DenseCache, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        """Slopes from ``dOut`` ``(n, n_out)``: ``dW = alpha X^T dZ``, ``db = beta sum dZ``, ``dX = alpha dZ W^T``."""
        dZ = self.activation.vjp(cache.Z, cache.A, dOut)
        grads: Params = {"W": self.alpha * (cache.X.T @ dZ)}
        if self.bias:
            grads["b"] = self.beta * dZ.sum(axis=0)
        return grads, (self.alpha * (dZ @ params["W"].T) if need_dx else np.empty((0, self.n_in)))
