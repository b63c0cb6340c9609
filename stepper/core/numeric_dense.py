"""Costs of many moved copies of a dense network at once: the rank-one path of numeric slopes.

Moving weight ``W[i, j]`` of dense layer ``l`` by ``d`` changes only column ``j`` of
its pre-activation, by ``d * X[:, i]`` (a bias ``b[j]`` by ``d``), so only unit
``j``'s output changes, by ``c = f(Z[:, j] + d X[:, i]) - A[:, j]`` ``(n,)``. The next
dense layer's pre-activation takes the rank-one change ``c W_next[j, :]``
``(n, n_next)``, and only the layers after that run in full, for a chunk of moves
stacked on a leading axis ``(k, n, units)``, a sub-block of :data:`SUB_BYTES` at a time. Each move has its own ``d``, so
the two sides of a central difference run in one chunk.

Through a piecewise-linear layer. When that next layer is piecewise linear
(ReLU, leaky ReLU, identity) and a move brings none of its units to a kink (the
look-up of :func:`kink_reach`), the layer stays on the same linear piece, its
output changes by exactly ``D * (c W_next[j, :])`` (``D`` the slope of each unit's
piece, ``(n, n_next)``), and the pre-activation of the layer after it by
``c[s] * G[j, s, :]`` with ``G[j, s, :] = sum_q D[s, q] W_next[j, q] W_after[q, :]``.
``G`` ``(n_units, n, n_after)`` is made once per pass (:func:`prepare`); a move
then costs ``n * n_after`` instead of ``n * n_next`` numbers. The pieces' slopes come
from the activation's own function (its derivative is never used), and a move
that does come near a kink runs the full way, so the costs are those of the
moved network up to rounding.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation
from stepper.core.layers import Dense, DenseCache
from stepper.core.network import Network

Array = NDArray[np.float64]
Trace = list[tuple[Array, Any]]

#: Bytes of the temporaries one block of :func:`kink_reach` may take.
BLOCK_BYTES = 4 * 1024 * 1024
#: Bytes of the stacked pre-activations of one sub-block of the rank-one path: a chunk's
#: copies run the later layers this many at a time, so the stack stays in the L2 cache
#: (2 MiB per core on the machine it was tuned on) while the per-chunk work is shared
#: by many more copies (tests/benchmarks/bench_numeric.py, 10-64-64-1 tanh).
SUB_BYTES = 1024 * 1024
#: Largest ``G`` a pass keeps (per layer), in bytes.
THROUGH_BYTES = 64 * 1024 * 1024
#: Activations that are linear on each side of zero (their slopes are read off the function).
PIECEWISE_LINEAR = ("identity", "relu", "leaky_relu")


@dataclass
class Workspace:
    """What one pass keeps between chunks.

    Attributes:
        reach: per layer, :func:`kink_reach` of the next (kinked) layer, ``(n_units, n)``;
            shared by the workspaces of one pass (read only once made).
        through: per layer, ``G`` ``(n_units, n, n_after)`` (module docstring); shared too.
        positive: per layer, ``Z > 0`` of its unmoved pre-activation ``(n, units)``.
        transposed: per layer and name, ``X``, ``Z`` or ``A`` transposed, ``(width, n)``.
        buffers: two flat float64 buffers the stacked arrays of a chunk live in.
    """

    reach: dict[int, Array] = field(default_factory=dict)
    through: dict[int, Array] = field(default_factory=dict)
    positive: dict[int, NDArray[np.bool_]] = field(default_factory=dict)
    transposed: dict[tuple[int, str], Array] = field(default_factory=dict)
    buffers: list[Array] = field(default_factory=lambda: [np.empty(0), np.empty(0)])

    def sibling(self) -> "Workspace":
        """A workspace for another thread of the same pass: shared look-ups, buffers of its own."""
        return Workspace(reach=self.reach, through=self.through)

    def array(self, slot: int, shape: tuple[int, ...]) -> Array:
        """An uninitialised array of ``shape`` in buffer ``slot`` (0 or 1), grown when too small."""
        size = math.prod(shape)
        if self.buffers[slot].size < size:
            self.buffers[slot] = np.empty(size)
        return self.buffers[slot][:size].reshape(shape)

    def rows_of(self, index: int, name: str, cache: DenseCache) -> Array:
        """``X``, ``Z`` or ``A`` of layer ``index`` transposed and contiguous, ``(width, n)``.

        Gathering rows of these is much faster than gathering strided columns.
        """
        key = (index, name)
        if key not in self.transposed:
            self.transposed[key] = np.ascontiguousarray(getattr(cache, name).T)
        return self.transposed[key]

    def is_positive(self, index: int, Z: Array) -> NDArray[np.bool_]:
        if index not in self.positive:
            self.positive[index] = Z > 0.0
        return self.positive[index]


def piece_slopes(act: Activation) -> tuple[float, float] | None:
    """Slopes ``(below zero, above zero)`` of a piecewise-linear activation, else None.

    Read off the function itself at -2, -1, 0, 1, 2 (both differences on a side must agree).
    """
    if act.name.split("(")[0] not in PIECEWISE_LINEAR:
        return None
    v = act.fn(np.array([-2.0, -1.0, 0.0, 1.0, 2.0]))
    below, above = float(v[2] - v[1]), float(v[4] - v[3])
    if float(v[1] - v[0]) != below or float(v[3] - v[2]) != above:
        return None
    return below, above


def through_pays(net: Network, layer: int, n_samples: int, moves: int) -> bool:
    """Whether moves of dense ``layer`` go through the next layer by ``G`` (module docstring).

    Needs: an elementwise activation here, a piecewise-linear dense layer next and a
    dense layer after it at most half as wide, ``G`` and the product's other factor
    (:func:`_through_matrix`) each within :data:`THROUGH_BYTES`, and at least as many
    moves as this layer has units (making ``G`` costs about one move per unit).
    """
    layers = net.layers
    if layer + 2 >= len(layers):
        return False
    this, nxt, after = layers[layer], layers[layer + 1], layers[layer + 2]
    if not (isinstance(this, Dense) and isinstance(nxt, Dense) and isinstance(after, Dense)):
        return False
    return (this.activation.elementwise and piece_slopes(nxt.activation) is not None
            and 2 * after.n_out <= nxt.n_out and moves >= this.n_out
            and 8 * n_samples * max(this.n_out, nxt.n_out) * after.n_out <= THROUGH_BYTES)


def prepare(net: Network, params: list[dict[str, Array]], trace: Trace, layer: int, moves: int,
            work: Workspace) -> None:
    """Make the look-ups the moves of dense ``layer`` need: the kink reach and ``G``."""
    if layer + 1 >= len(net.layers):
        return
    nxt = net.layers[layer + 1]
    if layer not in work.reach and isinstance(nxt, Dense) and nxt.activation.kink:
        work.reach[layer] = kink_reach(trace[layer + 1][1].Z, params[layer + 1]["W"])
    if layer not in work.through and through_pays(net, layer, trace[0][0].shape[0], moves):
        assert isinstance(nxt, Dense)
        slopes = piece_slopes(nxt.activation)
        assert slopes is not None
        work.through[layer] = _through_matrix(trace[layer + 1][1].Z, params[layer + 1]["W"],
                                              params[layer + 2]["W"], slopes)


def _through_matrix(Z: Array, W: Array, W_after: Array, slopes: tuple[float, float]) -> Array:
    """``G[u, s, :] = sum_q D[s, q] W[u, q] W_after[q, :]``, ``(n_units, n, n_after)``.

    ``Z`` ``(n, n_next)`` is the piecewise-linear layer's pre-activation, ``W``
    ``(n_units, n_next)`` its weights, ``W_after`` ``(n_next, n_after)`` the next ones.
    One matrix product: ``W @ M`` with ``M[q, s, :] = D[s, q] W_after[q, :]``.
    """
    n, width = Z.shape
    D = np.where(Z > 0.0, slopes[1], slopes[0])  # (n, n_next)
    M = D.T[:, :, None] * W_after[:, None, :]  # (n_next, n, n_after)
    return (W @ M.reshape(width, -1)).reshape(W.shape[0], n, W_after.shape[1])


def kink_reach(Z: Array, W: Array) -> Array:
    """``min_m |Z[s, m]| / |W[u, m]|`` for every unit ``u`` of the layer before and sample ``s``.

    ``Z`` is ``(n, n_next)``, ``W`` is ``(n_units, n_next)``; returns ``(n_units, n)``.
    A change ``c`` of unit ``u``'s output on sample ``s`` can move some unit of the
    next layer across zero only if ``|c| >= reach[u, s]``; a zero weight never
    moves a unit (its ratio is infinite), a unit sitting at zero is reached by any
    change. Computed a block of units at a time so the temporary stays within
    :data:`BLOCK_BYTES`.
    """
    abs_Z = np.abs(Z)
    abs_W = np.abs(W)
    n_units = W.shape[0]
    reach = np.empty((n_units, Z.shape[0]))
    per_unit = max(8 * abs_Z.size, 1)
    step = int(max(1, BLOCK_BYTES // per_unit))
    ratio = np.empty((min(step, n_units),) + abs_Z.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        for lo in range(0, n_units, step):
            w = abs_W[lo : lo + step, None, :]  # (block, 1, n_next)
            part = ratio[: w.shape[0]]
            # |Z| / 0 is inf; 0 / 0 is NaN, which fmin passes over (as if inf).
            np.divide(abs_Z[None, :, :], w, out=part)
            np.fmin.reduce(part, axis=2, out=reach[lo : lo + step])
    return reach


def dense_costs(
    net: Network,
    params: list[dict[str, Array]],
    trace: Trace,
    block: Any,
    idx: NDArray[np.int64],
    delta: Array,
    Y: Array,
    work: Workspace,
    through: bool = True,
) -> tuple[Array, NDArray[np.bool_]]:
    """Costs ``(k,)`` with parameter ``idx[j]`` (all in one dense block) moved by ``delta[j]``.

    Also returns, per move, whether any kinked unit came within the change of its
    kink. ``work`` keeps look-ups and buffers between chunks; ``through`` allows
    the path through a piecewise-linear layer when :func:`prepare` made its ``G``.
    """
    layer_index = block.layer
    layer = net.layers[layer_index]
    assert isinstance(layer, Dense)
    cache: DenseCache = trace[layer_index][1]
    local = idx - block.start
    k = idx.size
    n = cache.X.shape[0]
    if block.key == "W":
        rows, units = np.divmod(local, layer.n_out)
        z_col = work.rows_of(layer_index, "X", cache)[rows]  # (k, n): the input that multiplies each weight
        z_col *= delta[:, None]
    else:
        units = local
        z_col = np.repeat(delta[:, None], n, axis=1)
    z_base = work.rows_of(layer_index, "Z", cache)[units]  # (k, n)
    z_col += z_base
    kinked = np.zeros(k, dtype=bool)
    act = layer.activation
    if act.kink:
        kinked |= np.any((z_col > 0.0) != (z_base > 0.0), axis=1)

    next_layer = net.layers[layer_index + 1] if layer_index + 1 < len(net.layers) else None
    if not (act.elementwise and isinstance(next_layer, Dense)):
        Z = work.array(0, (k,) + cache.Z.shape)
        Z[...] = cache.Z
        Z[np.arange(k), :, units] = z_col
        return _run(net, params, trace, Z, layer_index, 0, Y, work, kinked), kinked
    # Only column `unit` of this layer's output changes: a rank-one update of
    # the next layer's pre-activation.
    change = act.apply_in_place(z_col)
    change -= work.rows_of(layer_index, "A", cache)[units]  # (k, n)
    near: NDArray[np.bool_] | None = None
    if next_layer.activation.kink:
        # Unit m of sample s sits within this change of its kink when
        # |Z[s, m]| <= |change[s]| * |W_next[unit, m]|.
        near = np.any(np.abs(change) >= work.reach[layer_index][units], axis=1)
        kinked |= near
    G = work.through.get(layer_index) if through else None
    if G is not None:
        return _through(net, params, trace, block, idx, delta, Y, work, change, units, near, G, kinked)
    W_next = params[layer_index + 1]["W"][units]  # (k, n_next)
    widest = max(later.n_out for later in net.layers[layer_index + 1 :])
    sub = max(1, SUB_BYTES // (8 * n * widest))
    costs = np.empty(k)
    for lo in range(0, k, sub):
        part = slice(lo, lo + sub)
        Z = work.array(0, (W_next[part].shape[0], n, next_layer.n_out))
        # einsum's outer products: the same products as a broadcast multiply, in less time.
        np.einsum("ks,kq->ksq", change[part], W_next[part], out=Z)
        Z += trace[layer_index + 1][1].Z
        # kinked[part] is a view: _run marks the copies of this sub-block in place.
        costs[part] = _run(net, params, trace, Z, layer_index + 1, 0, Y, work, kinked[part])
    return costs, kinked


def _through(net: Network, params: list[dict[str, Array]], trace: Trace, block: Any, idx: NDArray[np.int64],
             delta: Array, Y: Array, work: Workspace, change: Array, units: NDArray[np.int64],
             near: NDArray[np.bool_] | None, G: Array, kinked: NDArray[np.bool_]) -> tuple[Array, NDArray[np.bool_]]:
    """The costs of :func:`dense_costs` by ``G`` for the moves not ``near`` a kink of the next layer."""
    costs = np.empty(idx.size)
    far = np.arange(idx.size) if near is None else np.flatnonzero(~near)
    if far.size < idx.size:
        assert near is not None
        close = np.flatnonzero(near)
        costs[close], kinked[close] = dense_costs(net, params, trace, block, idx[close], delta[close], Y, work,
                                                  through=False)
    if far.size == 0:
        return costs, kinked
    index = block.layer + 2
    if far.size < idx.size:
        change, units = change[far], units[far]
    Z = work.array(0, (far.size,) + trace[index][1].Z.shape)
    np.multiply(change[:, :, None], G[units], out=Z)
    Z += trace[index][1].Z
    after = net.layers[index]
    assert isinstance(after, Dense)
    crossed = kinked[far]
    if after.activation.kink:
        crossed |= np.any((Z > 0.0) != work.is_positive(index, trace[index][1].Z), axis=(1, 2))
    costs[far] = _run(net, params, trace, Z, index, 0, Y, work, crossed)
    kinked[far] = crossed
    return costs, kinked


def _run(net: Network, params: list[dict[str, Array]], trace: Trace, Z: Array, index: int, slot: int, Y: Array,
         work: Workspace, kinked: NDArray[np.bool_]) -> Array:
    """Costs ``(k,)`` from the stacked pre-activations ``Z`` ``(k, n, units)`` of dense layer ``index`` on.

    ``Z`` lives in buffer ``slot``; marks in ``kinked`` the copies where a later
    kinked layer's unit changed side.
    """
    n_layers = len(net.layers)
    k, n = Z.shape[:2]
    while True:
        dense = net.layers[index]
        assert isinstance(dense, Dense)
        if index == n_layers - 1:
            # The last layer: its Z is needed afterwards only by a fused loss.
            A = Z if net.fused is not None else dense.activation.apply_in_place(Z)
            return np.asarray(net.output_cost(A, DenseCache(_NOTHING, Z, A), Y), dtype=np.float64)
        A = dense.activation.apply_in_place(Z)
        index += 1
        dense = net.layers[index]
        assert isinstance(dense, Dense)
        slot = 1 - slot
        Z = work.array(slot, (k, n, dense.n_out))
        np.matmul(A.reshape(k * n, dense.n_in), params[index]["W"], out=Z.reshape(k * n, dense.n_out))
        if dense.bias:
            Z += params[index]["b"]
        if dense.activation.kink:
            positive = work.is_positive(index, trace[index][1].Z)
            kinked |= np.any((Z > 0.0) != positive, axis=(1, 2))


_NOTHING = np.empty(0)
