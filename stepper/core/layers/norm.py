"""Normalization layers: ``layer_norm`` and ``batch_norm``, each with a learnable scale and shift.

Both compute ``y = scale * (x - mean) / sqrt(var + epsilon) + shift`` and differ
in what the mean and the (biased, divide-by-count) variance are taken over:

- layer norm: over all entries of one sample (Ba, Kiros & Hinton, "Layer
  Normalization", 2016, equations 3-4), so ``scale`` and ``shift`` have one entry
  per input entry (``in_shape``), as ONNX ``LayerNormalization`` with ``axis = 1``;
- batch norm: per channel, over the samples of the batch and, for shaped data,
  over every position (Ioffe & Szegedy, "Batch Normalization", 2015,
  Algorithm 1 and section 3.2 for convolutions), so ``scale`` and ``shift`` have
  one entry per channel (per feature for flat rows).

Batch norm in training uses the statistics of the batch it is given: the
training cost and its slopes, analytic and numeric, are those of that batch.
It also keeps running statistics, updated after each training step as
``running = momentum * running + (1 - momentum) * batch statistic`` (the ONNX
``BatchNormalization`` convention, default momentum 0.9), and the validation
cost uses those instead (Ioffe & Szegedy, Algorithm 2). The running statistics
start at mean 0 and variance 1.

Slopes. With ``xhat = (x - mean) / s``, ``s = sqrt(var + epsilon)``, and ``g = dC/dy * scale``,
over the ``m`` entries that share one mean:

    dC/dx = (g - mean(g) - xhat * mean(g * xhat)) / s

(Ioffe & Szegedy, section 3, the chain rule through the batch statistics; the
same algebra over one sample's entries for layer norm).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers.base import Array, Flags, Mode, ParamSpec, Params, Shaped, update_channels

#: Default epsilon added to the variance (ONNX's default for both operators).
EPSILON = 1e-5
#: Default share of the running statistics kept at each step (ONNX's default).
MOMENTUM = 0.9


@dataclass(frozen=True)
class NormCache:
    """What a norm keeps from its forward pass.

    Attributes:
        xhat: normalized input, ``(..., n, channels, positions)``.
        inv: ``1 / sqrt(var + epsilon)``, broadcastable to ``xhat``.
        mean, var: the statistics used, broadcastable to ``xhat`` (batch norm keeps
            the batch's for its running statistics).
        out: the output, ``(..., n, channels, positions)``.
    """

    xhat: Array
    inv: Array
    mean: Array
    var: Array
    out: Array


def _scaled_params(shape: tuple[int, ...]) -> tuple[ParamSpec, ...]:
    return (ParamSpec("scale", shape, "weight", fill=1.0), ParamSpec("shift", shape, "bias", fill=0.0))


def _grouped_slope(g: Array, xhat: Array, inv: Array, axes: tuple[int, ...]) -> Array:
    """``(g - mean(g) - xhat * mean(g * xhat)) * inv``, means over ``axes`` (see the module docstring)."""
    return (g - g.mean(axis=axes, keepdims=True) - xhat * (g * xhat).mean(axis=axes, keepdims=True)) * inv


class _Norm(Shaped):
    """Shared by both norms: the affine part, its slopes and its perturbations."""

    epsilon: float

    def grouping(self) -> tuple[int, int]:
        """``(channels, positions)``: how a row is split for the scale and shift."""
        raise NotImplementedError

    @property
    def out_shape(self) -> tuple[int, ...]:
        return self.in_shape

    def _affine(self, params: Params, xhat: Array) -> Array:
        channels, _ = self.grouping()
        return xhat * params["scale"].reshape(channels, -1) + params["shift"].reshape(channels, -1)

    def _grouped(self, X: Array) -> Array:
        return X.reshape(X.shape[:-1] + self.grouping())

    def _finish(self, X: Array, xhat: Array, inv: Array, mean: Array, var: Array, params: Params) -> tuple[Array, NormCache]:
        out = self._affine(params, xhat)
        return out.reshape(X.shape), NormCache(xhat, inv, mean, var, out)

    def _param_slopes(self, cache: NormCache, dy: Array) -> Params:
        """Slopes of ``scale`` and ``shift``: sums over samples (and, for batch norm, positions)."""
        shape = self.param_specs()[0].shape
        return {"scale": (dy * cache.xhat).sum(axis=(0, -1)).reshape(shape),
                "shift": dy.sum(axis=(0, -1)).reshape(shape)}

    def backward(self, params: Params, cache: NormCache, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        dy = self._grouped(dOut)
        grads = self._param_slopes(cache, dy)
        if not need_dx:
            return grads, np.empty((0, self.n_in))
        g = dy * params["scale"].reshape(self.grouping()[0], -1)
        return grads, self._input_slope(g, cache).reshape(dOut.shape)

    def _input_slope(self, g: Array, cache: NormCache) -> Array:
        """``dC/dx`` grouped, from ``g = dC/dy * scale`` grouped."""
        raise NotImplementedError

    def perturbed(
        self, params: Params, X: Array, cache: Any, key: str, local: NDArray[np.int64], delta: Array
    ) -> tuple[Array, Flags]:
        """Moving ``scale[c]`` adds ``delta * xhat`` to channel ``c``; moving ``shift[c]`` adds ``delta``."""
        k, n = local.size, X.shape[0]
        _, positions = self.grouping()
        if key == "scale":
            change = cache.xhat[:, local, :].transpose(1, 0, 2) * delta[:, None, None]
        else:
            change = np.broadcast_to(delta[:, None, None], (k, n, positions))
        return update_channels(cache.out, local, change).reshape(k, n, self.n_out), np.zeros(k, dtype=bool)

@dataclass(frozen=True)
class LayerNorm(_Norm):
    """Layer normalization over all entries of each sample; ``scale`` and ``shift`` have the row's shape."""

    in_shape: tuple[int, ...]
    epsilon: float = EPSILON

    type_name = "layer_norm"

    def grouping(self) -> tuple[int, int]:
        return self.n_in, 1

    @property
    def kind(self) -> str:
        return "layer norm"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return _scaled_params(self.in_shape)

    def forward(self, params: Params, X: Array) -> tuple[Array, NormCache]:
        grouped = self._grouped(X)  # (..., n, F, 1)
        mean = grouped.mean(axis=(-2, -1), keepdims=True)
        centred = grouped - mean
        var = (centred * centred).mean(axis=(-2, -1), keepdims=True)
        inv = 1.0 / np.sqrt(var + self.epsilon)
        return self._finish(X, centred * inv, inv, mean, var, params)

    def _input_slope(self, g: Array, cache: NormCache) -> Array:
        return _grouped_slope(g, cache.xhat, cache.inv, (-2, -1))


@dataclass(frozen=True)
class BatchNorm(_Norm):
    """Batch normalization per channel; running statistics for evaluation (see the module docstring).

    Attributes:
        in_shape: ``(features,)``, ``(channels, length)`` or ``(channels, height, width)``.
        momentum: share of the running statistics kept at each step.
        epsilon: added to the variance.
        training: True: the batch's statistics; False: the running ones.
        running: ``(mean, var)`` running statistics, each ``(channels,)``; None: the starting ones.
    """

    in_shape: tuple[int, ...]
    momentum: float = MOMENTUM
    epsilon: float = EPSILON
    training: bool = True
    running: tuple[Array, Array] | None = None

    type_name = "batch_norm"

    @property
    def couples_samples(self) -> bool:  # type: ignore[override]
        return self.training

    @property
    def channels(self) -> int:
        return self.in_shape[0]

    def grouping(self) -> tuple[int, int]:
        return self.channels, math.prod(self.in_shape[1:])

    @property
    def kind(self) -> str:
        return "batch norm"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return _scaled_params((self.channels,))

    def state_specs(self) -> tuple[ParamSpec, ...]:
        return (ParamSpec("running_mean", (self.channels,), "state", fill=0.0),
                ParamSpec("running_var", (self.channels,), "state", fill=1.0))

    def bind(self, mode: Mode, state: Params) -> "BatchNorm":
        running = (state["running_mean"], state["running_var"]) if state else None
        return dataclasses.replace(self, training=mode.training, running=running)

    def next_state(self, cache: NormCache, state: Params) -> Params:
        keep = self.momentum
        return {"running_mean": keep * state["running_mean"] + (1.0 - keep) * cache.mean.ravel(),
                "running_var": keep * state["running_var"] + (1.0 - keep) * cache.var.ravel()}

    def forward(self, params: Params, X: Array) -> tuple[Array, NormCache]:
        grouped = self._grouped(X)  # (..., n, C, P)
        if self.training:
            mean = grouped.mean(axis=(-3, -1), keepdims=True)
            centred = grouped - mean
            var = (centred * centred).mean(axis=(-3, -1), keepdims=True)
        else:
            run_mean, run_var = self.running or (np.zeros(self.channels), np.ones(self.channels))
            mean, var = run_mean[:, None], run_var[:, None]
            centred = grouped - mean
        inv = 1.0 / np.sqrt(var + self.epsilon)
        return self._finish(X, centred * inv, inv, mean, var, params)

    def moved_channels(
        self, params: Params, X: Array, cache: Any, key: str, local: NDArray[np.int64], delta: Array
    ) -> tuple[NDArray[np.int64], Array, Flags]:
        """Moving ``scale[c]`` or ``shift[c]`` changes channel ``c`` alone."""
        base = cache.out[:, local, :].transpose(1, 0, 2)  # (k, n, positions)
        change = cache.xhat[:, local, :].transpose(1, 0, 2) if key == "scale" else 1.0
        return local, base + change * delta[:, None, None], np.zeros(local.size, dtype=bool)

    def channel_width(self, width: int) -> int | None:
        return width if width == self.grouping()[1] else None

    def channel_forward(self, params: Params, A: Array, channels: NDArray[np.int64], base: Any) -> tuple[Array, Flags]:
        """Channel ``channels[j]`` of copy ``j``, normalized with that copy's own batch statistics
        of the channel in training (its mean and variance over samples and positions)."""
        if self.training:
            mean = A.mean(axis=(1, 2), keepdims=True)
            centred = A - mean
            var = (centred * centred).mean(axis=(1, 2), keepdims=True)
        else:
            run_mean, run_var = self.running or (np.zeros(self.channels), np.ones(self.channels))
            mean, var = run_mean[channels][:, None, None], run_var[channels][:, None, None]
            centred = A - mean
        xhat = centred * (1.0 / np.sqrt(var + self.epsilon))  # as forward computes it
        out = xhat * params["scale"][channels][:, None, None] + params["shift"][channels][:, None, None]
        return out, np.zeros(A.shape[0], dtype=bool)

    def _input_slope(self, g: Array, cache: NormCache) -> Array:
        if not self.training:  # fixed statistics: an affine map of each entry
            return g * cache.inv
        return _grouped_slope(g, cache.xhat, cache.inv, (-3, -1))
