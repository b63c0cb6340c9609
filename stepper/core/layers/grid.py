"""Windows over 1-D and 2-D data: the geometry shared by convolutions and pooling.

A :class:`Grid` describes windows of size ``window`` moved by ``stride`` over
data of spatial size ``size`` padded with ``pad`` zeros before and after, per
spatial axis (one axis for signals, two for images). Along one axis the number
of window positions is ``(size + before + after - window) // stride + 1``
(the usual formula; e.g. Dumoulin & Visin, "A guide to convolution arithmetic
for deep learning", 2016, relationship 6).

Arrays here are channels first with any leading axes merged into one:
``(B, C, *size)``.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from stepper.core.layers.base import Array


@dataclass(frozen=True)
class Grid:
    """Window positions over the spatial axes (one or two).

    Attributes:
        size: spatial size of the input, per axis.
        window: window (kernel or pool) size, per axis.
        stride: step between window positions, per axis.
        pad: zeros added ``(before, after)``, per axis.
    """

    size: tuple[int, ...]
    window: tuple[int, ...]
    stride: tuple[int, ...]
    pad: tuple[tuple[int, int], ...]

    @property
    def dims(self) -> int:
        return len(self.size)

    @property
    def padded(self) -> tuple[int, ...]:
        return tuple(n + a + b for n, (a, b) in zip(self.size, self.pad))

    @property
    def out(self) -> tuple[int, ...]:
        """Window positions per axis (0 or less when the window does not fit)."""
        return tuple((p - w) // s + 1 for p, w, s in zip(self.padded, self.window, self.stride))

    @property
    def positions(self) -> int:
        return math.prod(self.out)

    @property
    def cells(self) -> int:
        """Entries in one window (per channel)."""
        return math.prod(self.window)

    def pad_input(self, X: Array) -> Array:
        """``X`` ``(B, C, *size)`` with its zeros added, ``(B, C, *padded)`` (``X`` itself without padding)."""
        if not any(a or b for a, b in self.pad):
            return X
        out = np.zeros(X.shape[:2] + self.padded)
        out[(slice(None), slice(None)) + self._inner()] = X
        return out

    def _inner(self) -> tuple[slice, ...]:
        return tuple(slice(a, a + n) for n, (a, _) in zip(self.size, self.pad))

    def windows(self, Xp: Array) -> Array:
        """A strided view ``(B, C, *out, *window)`` of padded data ``Xp`` ``(B, C, *padded)``."""
        axes = tuple(range(2, 2 + self.dims))
        view = sliding_window_view(Xp, self.window, axis=axes)
        picks = (slice(None), slice(None)) + tuple(slice(None, None, s) for s in self.stride)
        return view[picks]

    def columns(self, Xp: Array) -> Array:
        """The windows laid out for one matrix product: ``(C * cells, B * positions)``, a new array.

        Row ``(c, *offset)`` (C order) holds, for every sample and window position,
        the entry of channel ``c`` at that offset inside the window. Filled one
        offset at a time, each a strided copy of every window's entry there.
        """
        B, C = Xp.shape[:2]
        out = np.empty((C, self.cells, B) + self.out)
        for index, offset in enumerate(self.offsets()):
            out[:, index] = Xp[self.at_offset(offset)].swapaxes(0, 1)  # (B, C, *out) -> (C, B, *out)
        return out.reshape(C * self.cells, B * self.positions)

    def offsets(self) -> list[tuple[int, ...]]:
        """Every offset inside a window, in C order (the order of :meth:`columns`' rows)."""
        return list(itertools.product(*(range(w) for w in self.window)))

    def at_offset(self, offset: tuple[int, ...]) -> tuple[slice, ...]:
        """Index into ``(B, C, *padded)`` picking, for every window position, the entry at ``offset``."""
        return (slice(None), slice(None)) + tuple(
            slice(a, a + s * (o - 1) + 1, s) for a, s, o in zip(offset, self.stride, self.out)
        )

    def gather_back(self, parts: Array, channels: int) -> Array:
        """Sum per-window slopes back onto the input: ``(B, C, *window, *out)`` to ``(B, C, *size)``.

        The reverse of :meth:`columns`: each input entry receives the slopes of
        every window position that covers it; padding is cut off again.
        """
        B = parts.shape[0]
        dXp = np.zeros((B, channels) + self.padded)
        for offset in self.offsets():
            dXp[self.at_offset(offset)] += parts[(slice(None), slice(None)) + offset]
        if not any(a or b for a, b in self.pad):
            return dXp
        return dXp[(slice(None), slice(None)) + self._inner()]


def same_padding(size: int, window: int, stride: int) -> tuple[int, int]:
    """Zeros ``(before, after)`` so that ``ceil(size / stride)`` windows fit; the odd one goes after.

    The rule of ONNX's ``auto_pad = "SAME_UPPER"`` (ONNX operator documentation, Conv).
    """
    out = -(-size // stride)
    total = max((out - 1) * stride + window - size, 0)
    return total // 2, total - total // 2
