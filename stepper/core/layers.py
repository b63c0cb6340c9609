"""Layers: the dense layer, and the interface every layer (built-in or custom) meets.

Shapes: a layer maps inputs ``X`` of shape ``(n_samples, n_in)`` to outputs of
shape ``(n_samples, n_out)``. The dense layer also accepts extra leading axes,
``(k, n_samples, n_in)``, which the numeric slopes use to push many perturbed
copies through the network in one numpy call.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation

Array = NDArray[np.float64]
Params = dict[str, Array]


@dataclass(frozen=True)
class ParamSpec:
    """One named parameter array of a layer.

    Attributes:
        key: short name inside the layer, e.g. ``"W"`` or ``"b"``.
        shape: array shape.
        kind: ``"weight"`` or ``"bias"``.
    """

    key: str
    shape: tuple[int, ...]
    kind: str = "weight"


class Layer(Protocol):
    """What the network needs from a layer.

    ``forward`` returns the output and an opaque cache; ``backward`` takes that
    cache and the slope of the cost w.r.t. the output, and returns the slopes
    w.r.t. each parameter (same shapes as the parameters) and w.r.t. the input.
    """

    @property
    def n_in(self) -> int: ...

    @property
    def n_out(self) -> int: ...

    @property
    def label(self) -> str: ...

    def param_specs(self) -> tuple[ParamSpec, ...]: ...

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]: ...

    def backward(self, params: Params, cache: Any, dOut: Array) -> tuple[Params, Array]: ...


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
class Dense:
    """A fully connected layer ``A = activation(X @ W + b)``.

    ``W`` has shape ``(n_in, n_out)``: ``W[i, j]`` carries input ``i`` to unit ``j``.
    ``b`` has shape ``(n_out,)`` and is present only when ``bias`` is True.
    """

    n_in: int
    n_out: int
    activation: Activation
    bias: bool = True

    @property
    def label(self) -> str:
        return f"dense {self.n_in}->{self.n_out} {self.activation.name}"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        specs = [ParamSpec("W", (self.n_in, self.n_out), "weight")]
        if self.bias:
            specs.append(ParamSpec("b", (self.n_out,), "bias"))
        return tuple(specs)

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

    def backward(self, params: Params, cache: DenseCache, dOut: Array) -> tuple[Params, Array]:
        dZ = self.activation.vjp(cache.Z, cache.A, dOut)
        return self.backward_from_z(params, cache, dZ)

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
