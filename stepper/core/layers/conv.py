"""Convolutions over 1-D signals and 2-D images (``conv1d``, ``conv2d``).

Each output channel ``o`` at window position ``p`` is

    Z[o, p] = b[o] + sum over input channels c and window offsets u of K[o, c, u] * Xpad[c, p * stride + u]
    A = activation(Z)

which is a cross-correlation, the operation deep-learning frameworks and the
ONNX ``Conv`` operator call convolution (the kernel is not flipped; ONNX
operator documentation, Conv). ``K`` has shape ``(out, in, kh, kw)`` for images
and ``(out, in, k)`` for signals, so its entries are named ``L1.K[o,c,i,j]``.

Computed as one matrix product for the whole batch: the input windows are
laid out as columns (:meth:`stepper.core.layers.grid.Grid.columns`), ``(in *
cells, n * positions)``, and ``Z = K.reshape(out, in * cells) @ columns``; the
kernel's slope is one matrix product too, ``dZ @ columns^T``.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation
from stepper.core.layers.base import Activated, Array, Flags, ParamSpec, Params, Shaped, update_channels
from stepper.core.layers.grid import Grid


@dataclass(frozen=True)
class ConvCache:
    """What a convolution keeps from its forward pass.

    Attributes:
        columns: the padded input's windows, ``(in * cells, B * positions)`` with the
            leading axes ``(..., n)`` merged into ``B``.
        Z: pre-activations, ``(..., n, out, positions)``.
        A: outputs, ``(..., n, out, positions)``.
    """

    columns: Array
    Z: Array
    A: Array

    @cached_property
    def by_channel(self) -> Array:
        """``Z`` of a plain ``(n, out, positions)`` run with channels first, ``(out, n, positions)``,
        made once, when the finite differences first ask for single channels."""
        return np.ascontiguousarray(self.Z.swapaxes(0, 1))


@dataclass(frozen=True)
class Conv(Shaped, Activated):
    """A 1-D or 2-D convolution with an elementwise activation.

    Attributes:
        in_shape: ``(channels, length)`` or ``(channels, height, width)``.
        channels: output channels.
        grid: the kernel's size, stride and padding over the input.
        activation: applied to every output entry.
        bias: whether there is one bias per output channel.
    """

    in_shape: tuple[int, ...]
    channels: int
    grid: Grid
    activation: Activation
    bias: bool = True

    @property
    def type_name(self) -> str:  # type: ignore[override]
        return f"conv{self.grid.dims}d"

    @property
    def out_shape(self) -> tuple[int, ...]:
        return (self.channels,) + self.grid.out

    @property
    def kernel_shape(self) -> tuple[int, ...]:
        return (self.channels, self.in_shape[0]) + self.grid.window

    @property
    def label(self) -> str:
        return f"{super().label} {self.activation.name}"

    @property
    def kind(self) -> str:
        return f"conv {self.channels}ch {self.activation.name}"

    @property
    def rows(self) -> int:
        """Entries of one output channel's kernel: input channels x window cells."""
        return self.in_shape[0] * self.grid.cells

    def param_specs(self) -> tuple[ParamSpec, ...]:
        # Fans count the receptive field (input or output channels x window cells),
        # as Glorot & Bengio's rule is applied to convolutions in common practice.
        cells = self.grid.cells
        specs = [ParamSpec("K", self.kernel_shape, "weight", fans=(self.rows, self.channels * cells))]
        if self.bias:
            specs.append(ParamSpec("b", (self.channels,), "bias"))
        return tuple(specs)

    def scratch(self) -> int:
        return self.rows * self.grid.positions + 2 * self.n_out

    def why_no_breakdown(self) -> str:
        return ("a convolution's weight (a kernel entry or a bias) is shared by every window position: its "
                "slope sums error signal x "
                "activation slope x input over every sample and every position, so there is no single "
                "unit to break it down by")

    def pre_activation(self, params: Params, X: Array) -> tuple[Array, Array]:
        """``(columns (rows, B * positions), Z (B, out, positions))`` for ``X`` ``(..., n, n_in)``."""
        batch = int(np.prod(X.shape[:-1]))
        shaped = X.reshape((batch,) + self.in_shape)
        columns = self.grid.columns(self.grid.pad_input(shaped))
        Zc = params["K"].reshape(self.channels, self.rows) @ columns  # (out, B * positions)
        if self.bias:
            Zc += params["b"][:, None]
        Z = np.ascontiguousarray(Zc.reshape(self.channels, batch, self.grid.positions).swapaxes(0, 1))
        return columns, Z

    def forward(self, params: Params, X: Array) -> tuple[Array, ConvCache]:
        columns, Z = self.pre_activation(params, X)
        A = self.activation.fn(Z)
        lead = X.shape[:-1]
        shape = lead + (self.channels, self.grid.positions)
        return A.reshape(lead + (self.n_out,)), ConvCache(columns, Z.reshape(shape), A.reshape(shape))

    def backward(self, params: Params, cache: ConvCache, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        """``dK = dZ @ columns^T`` over every sample and position, ``db = sum of dZ``, ``dX`` by summing windows back."""
        n = dOut.shape[0]
        dZ = self.activation.vjp(cache.Z, cache.A, dOut.reshape(cache.Z.shape))  # (n, out, positions)
        dZc = np.ascontiguousarray(dZ.swapaxes(0, 1)).reshape(self.channels, -1)  # (out, n * positions)
        grads: Params = {"K": (dZc @ cache.columns.T).reshape(self.kernel_shape)}
        if self.bias:
            grads["b"] = dZc.sum(axis=1)
        if not need_dx:
            return grads, np.empty((0, self.n_in))
        parts = params["K"].reshape(self.channels, self.rows).T @ dZc  # (rows, n * positions)
        dims = self.grid.dims
        parts = parts.reshape((self.in_shape[0],) + self.grid.window + (n,) + self.grid.out)
        # (in, *window, n, *out) -> (n, in, *window, *out), a view
        order = (1 + dims, 0) + tuple(range(1, 1 + dims)) + tuple(range(2 + dims, 2 + 2 * dims))
        return grads, self.grid.gather_back(parts.transpose(order), self.in_shape[0]).reshape(n, self.n_in)

    def _change(self, cache: ConvCache, key: str, local: NDArray[np.int64], delta: Array,
                n: int) -> tuple[NDArray[np.int64], Array]:
        """The moved output channel of each copy and its change of ``Z``, ``(k, n, positions)``."""
        if key == "K":
            outs, rows = np.divmod(local, self.rows)
            return outs, cache.columns[rows].reshape(local.size, n, -1) * delta[:, None, None]
        return local, np.broadcast_to(delta[:, None, None], (local.size, n, self.grid.positions))

    def perturbed(
        self, params: Params, X: Array, cache: Any, key: str, local: NDArray[np.int64], delta: Array
    ) -> tuple[Array, Flags]:
        """Each copy changes one output channel of ``Z``: by ``delta`` times one row of the columns for a kernel entry."""
        k = local.size
        n = X.shape[0]
        outs, change = self._change(cache, key, local, delta, n)
        Z = update_channels(cache.Z, outs, change)  # (k, n, out, positions)
        kinked = np.zeros(k, dtype=bool)
        if self.activation.kink:
            copies = np.arange(k)
            kinked = np.any((Z[copies, :, outs] > 0.0) != (cache.Z[:, outs].transpose(1, 0, 2) > 0.0), axis=(1, 2))
        return self.activation.apply_in_place(Z).reshape(k, n, self.n_out), kinked

    def moved_channels(
        self, params: Params, X: Array, cache: Any, key: str, local: NDArray[np.int64], delta: Array
    ) -> tuple[NDArray[np.int64], Array, Flags]:
        k, n = local.size, X.shape[0]
        if key == "K":
            outs, rows = np.divmod(local, self.rows)
            Z = cache.columns[rows].reshape(k, n, -1)  # a new array: the input under each moved entry
            Z *= delta[:, None, None]
        else:
            outs = local
            Z = np.broadcast_to(delta[:, None, None], (k, n, self.grid.positions)).copy()
        base = cache.by_channel[outs]  # (k, n, positions)
        Z += base
        kinked = np.zeros(k, dtype=bool)
        if self.activation.kink:
            kinked = np.any((Z > 0.0) != (base > 0.0), axis=(1, 2))
        return outs, self.activation.apply_in_place(Z), kinked
