"""The dense (fully connected) layer.

Shapes: inputs ``X`` of shape ``(n_samples, n_in)`` to outputs of shape
``(n_samples, n_out)``; extra leading axes, ``(k, n_samples, n_in)``, are
accepted so that many perturbed copies of a network run in one numpy call.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation
from stepper.core.layers.base import Activated, Array, Flags, ParamSpec, Params


def dense_specs(n_in: int, n_out: int, bias: bool) -> tuple[ParamSpec, ...]:
    """The arrays of a layer ``Z = X W + b``: ``W`` ``(n_in, n_out)`` and, with ``bias``, ``b`` ``(n_out,)``."""
    specs = [ParamSpec("W", (n_in, n_out), "weight", fans=(n_in, n_out))]
    if bias:
        specs.append(ParamSpec("b", (n_out,), "bias"))
    return tuple(specs)


@dataclass(frozen=True)
class DenseCache:
    """What a dense layer keeps from its forward pass.

    Attributes:
        X: input, ``(..., n, n_in)``.
        Z: pre-activation ``X @ W + b``, ``(..., n, n_out)``.
        A: output ``activation(Z)``, ``(..., n, n_out)``.
    """

    X: Array
    Z: Array
    A: Array


@dataclass(frozen=True)
class Dense(Activated):
    """A fully connected layer ``A = activation(X @ W + b)``.

    ``W`` has shape ``(n_in, n_out)``: ``W[i, j]`` carries input ``i`` to unit ``j``.
    ``b`` has shape ``(n_out,)`` and is present only when ``bias`` is True.
    """

    n_in: int
    n_out: int
    activation: Activation
    bias: bool = True

    type_name = "dense"

    @property
    def in_shape(self) -> tuple[int, ...]:
        return (self.n_in,)

    @property
    def out_shape(self) -> tuple[int, ...]:
        return (self.n_out,)

    @property
    def label(self) -> str:
        return f"dense {self.n_in}->{self.n_out} {self.activation.name}"

    @property
    def kind(self) -> str:
        return f"{self.activation.name} {self.n_in}->{self.n_out}"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return dense_specs(self.n_in, self.n_out, self.bias)

    def pre_activation(self, params: Params, X: Array) -> Array:
        """``X @ W (+ b)`` for ``X`` of shape ``(..., n, n_in)``."""
        W = params["W"]
        if X.ndim > 2:
            # One BLAS call for all stacked copies instead of one per copy.
            Z = (X.reshape(-1, X.shape[-1]) @ W).reshape(X.shape[:-1] + (W.shape[1],))
        else:
            Z = X @ W
        if self.bias:
            Z += params["b"]  # Z is a fresh array: add in place
        return Z

    def forward(self, params: Params, X: Array) -> tuple[Array, DenseCache]:
        Z = self.pre_activation(params, X)
        A = self.activation.fn(Z)
        return A, DenseCache(X, Z, A)

    def backward(self, params: Params, cache: DenseCache, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        dZ = self.activation.vjp(cache.Z, cache.A, dOut)
        return self.backward_from_z(params, cache, dZ, need_dx)

    def backward_from_z(
        self, params: Params, cache: DenseCache, dZ: Array, input_slopes: bool = True
    ) -> tuple[Params, Array]:
        """Slopes given ``dZ`` (``(n, n_out)``): ``dW = X^T dZ``, ``db = sum dZ``, ``dX = dZ W^T``.

        With ``input_slopes=False`` the (often largest) product ``dX`` is skipped and
        an empty array returned in its place: the first layer's ``dX`` is not needed.
        """
        grads: Params = {"W": cache.X.T @ dZ}
        if self.bias:
            grads["b"] = dZ.sum(axis=0)
        return grads, (dZ @ params["W"].T if input_slopes else np.empty((0, self.n_in)))

    def perturbed(
        self, params: Params, X: Array, cache: Any, key: str, local: NDArray[np.int64], delta: Array
    ) -> tuple[Array, Flags]:
        """Each copy changes one column of ``Z``: by ``delta * X[:, i]`` for ``W[i, j]``, ``delta`` for ``b[j]``."""
        k = local.size
        if key == "W":
            rows, units = np.divmod(local, self.n_out)
            column = X.T[rows] * delta[:, None]  # (k, n)
        else:
            units = local
            column = np.broadcast_to(delta[:, None], (k, X.shape[0]))
        Z = np.broadcast_to(cache.Z, (k,) + cache.Z.shape).copy()  # (k, n, n_out)
        copies = np.arange(k)
        z_base = Z[copies, :, units]  # (k, n)
        z_col = z_base + column
        Z[copies, :, units] = z_col
        kinked = np.zeros(k, dtype=bool)
        if self.activation.kink:
            kinked = np.any((z_col > 0.0) != (z_base > 0.0), axis=1)
        return self.activation.apply_in_place(Z), kinked
