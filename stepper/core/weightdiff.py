"""Two sets of weights of one network compared: costs, how far each layer moved, and in which direction.

For weights ``a`` and ``b`` (``b`` the later or current one) and their change
``d = b - a``, all ``(n_params,)``:

- the cost of each (with the network's L2 term) on the training rows and, when
  there are any, the validation rows, each side through its own networks where
  they differ (:data:`Nets`: a dropout mask is the side's step's, batch norm's
  running statistics the side's own);
- per layer, the Euclidean norm of its part of ``d``, of ``a`` and of ``b``, and
  ``||d|| / ||a||`` (NaN when the layer's ``a`` is all zeros);
- the weights that moved most, by ``|d|``;
- the cosine between ``d`` and the slope of the cost at ``b`` and at ``a``:
  ``d . g / (||d|| ||g||)``. Plain descent moves against the slope, so a change
  made by descent has a cosine near -1 with the slope where it started; near 0
  means the change is unrelated to the slope, near +1 that it went uphill.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network

Array = NDArray[np.float64]

#: One side's networks: as it trains (its step's dropout masks, batch statistics) and as
#: the validation cost runs it (no dropout, batch norm's running statistics), from Network.at.
Nets = tuple[Network, Network]


@dataclass(frozen=True)
class LayerMove:
    """How far one layer moved.

    Attributes:
        index: 0-based layer index.
        label: the layer's label.
        change: ``||d||`` over the layer's parameters.
        before, after: ``||a||`` and ``||b||`` over them.
    """

    index: int
    label: str
    change: float
    before: float
    after: float

    @property
    def relative(self) -> float:
        """``change / before``; NaN when ``before`` is 0."""
        return self.change / self.before if self.before > 0 else float("nan")


@dataclass(frozen=True)
class WeightDiff:
    """The comparison (see the module docstring).

    Attributes:
        cost_a, cost_b: training cost at each.
        val_a, val_b: validation cost at each, or None without validation rows.
        layers: one :class:`LayerMove` per layer.
        a, b: the two sets of weights, ``(n_params,)``.
        moved: flat indices of the weights that moved most, largest ``|d|`` first.
        cosine_b, cosine_a: cosine of ``d`` with the slope at ``b`` and at ``a`` (NaN if either is 0).
    """

    cost_a: float
    cost_b: float
    val_a: float | None
    val_b: float | None
    layers: tuple[LayerMove, ...]
    a: Array
    b: Array
    moved: NDArray[np.int64]
    cosine_b: float
    cosine_a: float

    @property
    def change(self) -> Array:
        """``d = b - a``, ``(n_params,)``."""
        return self.b - self.a

    @property
    def change_norm(self) -> float:
        return float(np.linalg.norm(self.change))


def cosine(u: Array, v: Array) -> float:
    """``u . v / (||u|| ||v||)`` for two ``(n,)`` arrays; NaN when either is all zeros."""
    nu = float(np.linalg.norm(u))
    nv = float(np.linalg.norm(v))
    if nu == 0.0 or nv == 0.0 or not (np.isfinite(nu) and np.isfinite(nv)):
        return float("nan")
    return float(np.clip(np.dot(u, v) / (nu * nv), -1.0, 1.0))


def compare_weights(
    net: Network,
    a: Array,
    b: Array,
    X: Array,
    Y: Array,
    X_val: Array | None = None,
    Y_val: Array | None = None,
    top: int = 10,
    *,
    nets_a: Nets | None = None,
    nets_b: Nets | None = None,
) -> WeightDiff:
    """Compare weights ``a`` and ``b`` (``(n_params,)``) of ``net`` on ``X``, ``Y`` (and the validation rows).

    ``nets_a`` and ``nets_b`` are each side's networks (default ``net`` for both roles).
    """
    d = b - a
    train_a, eval_a = nets_a or (net, net)
    train_b, eval_b = nets_b or (net, net)
    cost_a, slope_a = train_a.cost_and_slopes(a, X, Y)
    cost_b, slope_b = train_b.cost_and_slopes(b, X, Y)
    val_a: float | None = None
    val_b: float | None = None
    if X_val is not None and Y_val is not None and X_val.shape[0] > 0:
        val_a, val_b = eval_a.cost(a, X_val, Y_val), eval_b.cost(b, X_val, Y_val)
    layer_of = net.layout.layer_index
    layers = []
    for i, layer in enumerate(net.layers):
        part = layer_of == i
        layers.append(LayerMove(i, layer.label, float(np.linalg.norm(d[part])), float(np.linalg.norm(a[part])),
                                float(np.linalg.norm(b[part]))))
    size = np.abs(d)
    count = max(0, min(int(top), d.size))
    moved = np.lexsort((np.arange(d.size), -size))[:count].astype(np.int64)
    moved = moved[size[moved] > 0]
    return WeightDiff(float(cost_a), float(cost_b), val_a, val_b, tuple(layers), a.copy(), b.copy(), moved,
                      cosine(d, slope_b), cosine(d, slope_a))
