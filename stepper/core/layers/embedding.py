"""``embedding``: category numbers in some input columns become learned vectors.

The layer reads the columns at positions ``columns`` of its input as category
numbers ``0 .. categories - 1`` and puts, for each, row ``E[category]`` of the
table ``E`` (``(categories, size)``, entries named ``L1.E[c,d]``) in its place;
the other input columns pass through unchanged, after the vectors, in their
order. One table serves every listed column. This is a lookup (the ONNX
``Gather`` operator on ``E`` with the category numbers as indices), the same as
a dense layer without bias on one-hot rows of the categories.

Only the table has slopes: a category number is not a quantity, so the slope
of the cost with respect to it is reported as zero.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from stepper.core.layers.base import Array, ParamSpec, Params, Shaped


@dataclass(frozen=True)
class Embedding(Shaped):
    """A lookup table for category columns; the other columns pass through.

    Attributes:
        in_shape: ``(n_in,)``.
        columns: positions of the category columns in the input.
        categories: how many categories (numbers ``0 .. categories - 1``).
        size: length of each learned vector.
    """

    in_shape: tuple[int, ...]
    columns: tuple[int, ...]
    categories: int
    size: int

    type_name = "embedding"

    @property
    def others(self) -> tuple[int, ...]:
        """Positions of the input columns that pass through."""
        return tuple(i for i in range(self.n_in) if i not in self.columns)

    @property
    def out_shape(self) -> tuple[int, ...]:
        return (len(self.columns) * self.size + len(self.others),)

    @property
    def kind(self) -> str:
        return f"embedding {self.categories}x{self.size}"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        # Drawn as the dense layer on one-hot rows it equals would be.
        return (ParamSpec("E", (self.categories, self.size), "weight", fans=(self.categories, self.size)),)

    def categories_of(self, X: Array) -> np.ndarray:
        """The category numbers, ``(..., n, len(columns))`` int64; ValueError if one is not valid."""
        values = X[..., list(self.columns)]
        index = values.astype(np.int64)
        if np.any(index != values) or np.any(index < 0) or np.any(index >= self.categories):
            raise ValueError(f"embedding: a category column holds a value that is not a whole number "
                             f"from 0 to {self.categories - 1}")
        return index

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]:
        index = self.categories_of(X)
        vectors = params["E"][index].reshape(X.shape[:-1] + (len(self.columns) * self.size,))
        out = np.concatenate([vectors, X[..., list(self.others)]], axis=-1)
        return out, index

    def backward(self, params: Params, cache: Any, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        width = len(self.columns) * self.size
        dE = np.zeros((self.categories, self.size))
        np.add.at(dE, cache.ravel(), dOut[:, :width].reshape(-1, self.size))
        if not need_dx:
            return {"E": dE}, np.empty((0, self.n_in))
        dX = np.zeros((dOut.shape[0], self.n_in))
        dX[:, list(self.others)] = dOut[:, width:]
        return {"E": dE}, dX
