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

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

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
        out, where = self._pool(X.reshape((batch,) + self.in_shape))
        cache = PoolCache(None if where is None else where.reshape(lead + where.shape[1:]), batch)
        return out.reshape(lead + (self.n_out,)), cache

    def _pool(self, shaped: Array) -> tuple[Array, NDArray[np.intp] | None]:
        """Pooled ``(B, C, *out)`` of ``shaped`` ``(B, C, *size)``, and for a max where each maximum sat.

        One pass per window offset over every window at once (a window has a
        handful of cells), never a copy of the windows laid out side by side.
        """
        cells = [shaped[self.grid.at_offset(offset)] for offset in self.grid.offsets()]  # (B, C, *out) views
        if self.how == "avg":
            total = cells[0].copy()
            for part in cells[1:]:
                total += part
            total /= len(cells)
            return total, None
        best = cells[0].copy()
        for part in cells[1:]:
            np.maximum(best, part, out=best)  # NaN spreads, as in a maximum over the window
        # The first offset in C order holding the maximum takes it (numpy's argmax rule): the
        # offsets are visited last to first, so the earliest match is written last.
        where = np.zeros(best.shape, dtype=np.intp)
        for index in range(len(cells) - 1, 0, -1):
            where[cells[index] == best] = index
        where[cells[0] == best] = 0
        return best, where

    def channel_width(self, width: int) -> int | None:
        return math.prod(self.grid.out) if width == math.prod(self.in_shape[1:]) else None

    def channel_forward(self, params: Params, A: Array, channels: NDArray[np.int64], base: Any) -> tuple[Array, Flags]:
        k, n = A.shape[:2]
        out, where = self._pool(A.reshape((k * n, 1) + self.in_shape[1:]))
        if where is None or base.where is None:
            return out.reshape(k, n, -1), np.zeros(k, dtype=bool)
        before = base.where[:, channels].swapaxes(0, 1)  # (k, n, *out)
        return out.reshape(k, n, -1), np.any((where.reshape(before.shape) != before).reshape(k, -1), axis=1)

    def backward(self, params: Params, cache: PoolCache, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        """Each window's slope goes back to its largest entry (max) or in equal parts to all (average)."""
        if not need_dx:
            return {}, np.empty((0, self.n_in))
        n = dOut.shape[0]
        channels = self.in_shape[0]
        d = dOut.reshape((n, channels) + self.grid.out)
        where = None if cache.where is None else cache.where.reshape(d.shape)
        dX = np.zeros((n,) + self.in_shape)
        share = d / self.grid.cells
        for index, offset in enumerate(self.grid.offsets()):
            target = dX[self.grid.at_offset(offset)]
            target += share if where is None else np.where(where == index, d, 0.0)
        return {}, dX.reshape(n, self.n_in)

    def crossed(self, base: PoolCache, moved: PoolCache, k: int) -> Flags:
        if base.where is None or moved.where is None:
            return np.zeros(k, dtype=bool)
        return differs(base.where, moved.where, k)
