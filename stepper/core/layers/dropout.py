"""``dropout``: a random share of the entries set to zero while training.

While training, each entry is kept with probability ``1 - rate`` and scaled by
``1 / (1 - rate)``, so that its expected value is unchanged ("inverted"
dropout; Srivastava, Hinton, Krizhevsky, Sutskever & Salakhutdinov, "Dropout: A
Simple Way to Prevent Neural Networks from Overfitting", JMLR 2014, describe
the equivalent scaling at test time). In evaluation (the validation cost) the
layer passes its input unchanged.

The mask is drawn once per step from ``numpy.random.default_rng([seed, step])``
and held fixed for everything computed at that step: the cost, its analytic
slopes and every finite difference, so the check compares slopes of one and the
same function. The same seed and step give the same mask, so an undo, a replay
of the journal or a resumed checkpoint sees the same masks again.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers.base import Array, Flags, Mode, Params, Shaped


@dataclass(frozen=True)
class Dropout(Shaped):
    """Inverted dropout with a mask per step.

    Attributes:
        in_shape: the shape of a row (kept as is).
        rate: the share of entries dropped, ``0 <= rate < 1``.
        seed: seeds the masks together with the step count.
        training: False in evaluation (the layer then does nothing).
        step: the step whose mask is used.
    """

    in_shape: tuple[int, ...]
    rate: float
    seed: int = 0
    training: bool = True
    step: int = 0
    masks: dict[int, Array] = field(default_factory=dict, compare=False, repr=False)

    type_name = "dropout"

    @property
    def out_shape(self) -> tuple[int, ...]:
        return self.in_shape

    @property
    def kind(self) -> str:
        return f"dropout {self.rate:g}"

    def bind(self, mode: Mode, state: Params) -> "Dropout":
        return dataclasses.replace(self, training=mode.training, step=mode.step, masks={})

    def mask(self, n: int) -> Array:
        """The scaled mask of this step for ``n`` rows, ``(n, n_in)``: 0 or ``1 / (1 - rate)``."""
        if n not in self.masks:
            keep = np.random.default_rng([self.seed, self.step]).random((n, self.n_in)) >= self.rate
            self.masks[n] = keep / (1.0 - self.rate)
        return self.masks[n]

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]:
        if not self.training or self.rate == 0.0:
            return X, None
        mask = self.mask(X.shape[-2])
        return X * mask, mask

    def backward(self, params: Params, cache: Any, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        if not need_dx:
            return {}, np.empty((0, self.n_in))
        return {}, (dOut if cache is None else dOut * cache)

    def channel_width(self, width: int) -> int | None:
        return width if self.n_in % width == 0 else None

    def channel_forward(self, params: Params, A: Array, channels: NDArray[np.int64], base: Any) -> tuple[Array, Flags]:
        k, n, width = A.shape
        if not self.training or self.rate == 0.0:
            return A, np.zeros(k, dtype=bool)
        mask = self.mask(n).reshape(n, -1, width)[:, channels].swapaxes(0, 1)  # (k, n, width)
        return A * mask, np.zeros(k, dtype=bool)
