"""``flatten``: shaped data seen as one flat row per sample.

Between layers, data is already flat per sample in C order (see
:mod:`stepper.core.layers.base`), so a flatten only changes how the next layer
reads a row: ``(channels, height, width)`` becomes ``(channels * height * width,)``,
entry ``(c, i, j)`` at position ``(c * height + i) * width + j``, as the ONNX
``Flatten`` operator with ``axis = 1`` orders it (ONNX operator documentation).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers.base import Array, Flags, Params, Shaped


@dataclass(frozen=True)
class Flatten(Shaped):
    """Shaped rows to flat rows; the numbers pass unchanged."""

    in_shape: tuple[int, ...]

    type_name = "flatten"

    @property
    def out_shape(self) -> tuple[int, ...]:
        return (math.prod(self.in_shape),)

    @property
    def kind(self) -> str:
        return f"flatten {self.n_out}"

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]:
        return X, None

    def backward(self, params: Params, cache: Any, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        return {}, (dOut if need_dx else np.empty((0, self.n_in)))

    def channel_width(self, width: int) -> int | None:
        return width

    def channel_forward(self, params: Params, A: Array, channels: NDArray[np.int64], base: Any) -> tuple[Array, Flags]:
        return A, np.zeros(A.shape[0], dtype=bool)
