"""Pooling over 1-D signals and 2-D images (``max_pool``, ``avg_pool``).

Each channel is pooled on its own: the output at a window position is the
largest entry of the window (max) or the mean of its entries (average), as the
ONNX ``MaxPool`` and ``AveragePool`` operators define them without padding
(ONNX operator documentation).

Slopes. An average sends ``1 / cells`` of the output's slope to every entry of
its window. A maximum sends all of it to the entry that is largest; where two
entries tie, the first in C order takes it, and the maximum has a corner there:
a perturbation that changes which entry is largest makes the finite difference
straddle that corner, so the numeric slopes flag it as a kink (:meth:`Pool.crossed`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stepper.core.layers.base import Array, Flags, Params, Shaped, differs
from stepper.core.layers.grid import Grid

KINDS = ("max", "avg")


@dataclass(frozen=True)
class PoolCache:
    """What a pooling keeps: for a max, the position inside each window of its largest entry.

    Attributes:
        where: ``(..., n, channels, *out)`` integer offsets (C order within the
            window), or None for an average.
        batch: the number of rows with the leading axes merged.
    """

    where: np.ndarray | None
    batch: int


@dataclass(frozen=True)
class Pool(Shaped):
    """Max or average pooling of each channel.

    Attributes:
        in_shape: ``(channels, length)`` or ``(channels, height, width)``.
        grid: the window's size and stride (no padding).
        how: ``"max"`` or ``"avg"``.
    """

    in_shape: tuple[int, ...]
    grid: Grid
    how: str = "max"

    @property
    def type_name(self) -> str:  # type: ignore[override]
        return f"{self.how}_pool"

    @property
    def has_kinks(self) -> bool:  # type: ignore[override]
        return self.how == "max"

    @property
    def out_shape(self) -> tuple[int, ...]:
        return (self.in_shape[0],) + self.grid.out

    @property
    def kind(self) -> str:
        return f"{self.how} pool {'x'.join(str(w) for w in self.grid.window)}"

    def forward(self, params: Params, X: Array) -> tuple[Array, PoolCache]:
        lead = X.shape[:-1]
        batch = int(np.prod(lead))
        shaped = X.reshape((batch,) + self.in_shape)
        windows = self.grid.windows(shaped)  # (B, C, *out, *window), a view
        flat = windows.reshape(windows.shape[: 2 + self.grid.dims] + (self.grid.cells,))
        if self.how == "avg":
            return flat.mean(axis=-1).reshape(lead + (self.n_out,)), PoolCache(None, batch)
        where = np.argmax(flat, axis=-1)
        out = np.take_along_axis(flat, where[..., None], axis=-1)
        return out.reshape(lead + (self.n_out,)), PoolCache(where.reshape(lead + where.shape[1:]), batch)

    def backward(self, params: Params, cache: PoolCache, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        if not need_dx:
            return {}, np.empty((0, self.n_in))
        n = dOut.shape[0]
        channels, dims, cells = self.in_shape[0], self.grid.dims, self.grid.cells
        d = dOut.reshape((n, channels, 1) + self.grid.out)
        if cache.where is None:
            parts = np.broadcast_to(d / cells, (n, channels, cells) + self.grid.out)
        else:
            offsets = np.arange(cells).reshape((cells,) + (1,) * dims)
            parts = (cache.where.reshape(d.shape) == offsets) * d
        parts = parts.reshape((n, channels) + self.grid.window + self.grid.out)
        return {}, self.grid.gather_back(parts, channels).reshape(n, self.n_in)

    def crossed(self, base: PoolCache, moved: PoolCache, k: int) -> Flags:
        if base.where is None or moved.where is None:
            return np.zeros(k, dtype=bool)
        return differs(base.where, moved.where, k)
