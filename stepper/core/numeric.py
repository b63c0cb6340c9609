"""Numeric slopes of the cost by finite differences.

The cost is the whole cost, with the network's L2 term when it has one
(:meth:`Network.penalty_at` gives the term at each perturbed point), so these
slopes check the same thing backpropagation computes.

For parameter ``w`` and step ``h``:

- central: ``(C(w + h) - C(w - h)) / (2 h)``, error ``O(h^2)``;
- forward: ``(C(w + h) - C(w)) / h``, error ``O(h)``.

Default steps balance truncation against rounding error: with machine epsilon
``u`` (about 2.2e-16 for float64) the total error is smallest near
``h = u^(1/2)`` for forward and ``h = u^(1/3)`` for central differences, for
parameters and slopes of order one (Press, Teukolsky, Vetterling & Flannery,
*Numerical Recipes*, 3rd ed., 2007, section 5.7; Nocedal & Wright, *Numerical
Optimization*, 2nd ed., 2006, section 8.1).

Speed. A perturbation of dense weight ``W[i, j]`` of layer ``l`` changes only
column ``j`` of that layer's pre-activation, by ``h * X[:, i]``. So the layers
before ``l`` are never recomputed (their outputs are cached), layer ``l`` is
updated one column at a time, the next dense layer receives a rank-one change,
and only the layers after that are run in full -- for a whole chunk of
perturbations at once, stacked on a leading axis. Parameters of other built-in
layers (convolutions, norms, embeddings) and of dense layers followed by them
take the general stacked path of :mod:`stepper.core.stacked`: the layers before
are never recomputed either, the perturbed layer makes all copies' outputs at
once, and every later layer runs once per chunk. Parameters of custom layers
fall back to re-running the network from that layer on, one at a time.

Memory. The stacked arrays of a chunk live in two buffers that are reused from
chunk to chunk, and activations are applied in place: fresh multi-megabyte
arrays for every chunk are handed back to the system when freed, and touching
new pages again costs more than the arithmetic (it doubled the time of a pass
over a 10-64-64-1 network).
"""

from __future__ import annotations

import contextvars
import math
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Callable, Generator, Iterable, Iterator, TypeVar

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import Builtin, Dense, DenseCache
from stepper.core.network import Network
from stepper.core.stacked import chunk_size as stacked_chunk_size
from stepper.core.stacked import stacked_costs

Array = NDArray[np.float64]
T = TypeVar("T")

METHODS = ("central", "forward")

_U = float(np.finfo(np.float64).eps)
DEFAULT_STEP = {"central": _U ** (1.0 / 3.0), "forward": _U**0.5}

#: Bytes one chunk of stacked perturbations may take (a working-set bound). With
#: the buffers reused, 4 MiB was fastest on a 2-core machine for the networks of
#: tests/benchmarks/bench_numeric.py (1 to 12 MiB tried).
CHUNK_BYTES = 4 * 1024 * 1024

Progress = Generator[tuple[int, int], None, T]


@dataclass(frozen=True)
class NumericSlopes:
    """Result of a finite-difference pass.

    Attributes:
        slopes: numeric slope per parameter, ``(n_params,)``; NaN where not computed.
        kink: True where a ReLU-like unit changed side of its kink between the
            evaluations of that parameter, ``(n_params,)``.
        method: ``"central"`` or ``"forward"``.
        h: the step used.
        computed: True for the parameters the pass computed, ``(n_params,)``;
            None means all. A computed slope can still be NaN (cost not finite).
    """

    slopes: Array
    kink: NDArray[np.bool_]
    method: str
    h: float
    computed: NDArray[np.bool_] | None = None


@dataclass
class _Workspace:
    """What one pass keeps between chunks.

    Attributes:
        reach: per layer, :func:`_kink_reach` of the next (kinked) layer.
        positive: per layer, ``Z > 0`` of its unperturbed pre-activation ``(n, units)``.
        buffers: two flat float64 buffers the stacked arrays of a chunk live in.
    """

    reach: dict[int, Array] = field(default_factory=dict)
    positive: dict[int, NDArray[np.bool_]] = field(default_factory=dict)
    transposed: dict[tuple[int, str], Array] = field(default_factory=dict)
    buffers: list[Array] = field(default_factory=lambda: [np.empty(0), np.empty(0)])

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


def default_step(method: str) -> float:
    return DEFAULT_STEP[method]


def run_to_end(
    job: Progress[T],
    on_progress: Callable[[int, int], None] | None = None,
    cancelled: Callable[[], bool] | None = None,
) -> T | None:
    """Drive a progress generator; returns its value, or None if cancelled."""
    try:
        while True:
            done, total = next(job)
            if on_progress is not None:
                on_progress(done, total)
            if cancelled is not None and cancelled():
                job.close()
                return None
    except StopIteration as stop:
        return stop.value


def numeric_slopes(
    net: Network,
    theta: Array,
    X: Array,
    Y: Array,
    method: str = "central",
    h: float | None = None,
    which: Iterable[int] | None = None,
) -> NumericSlopes:
    """Numeric slopes of all parameters (or those in ``which``); see :func:`iter_numeric_slopes`."""
    result = run_to_end(iter_numeric_slopes(net, theta, X, Y, method, h, which))
    assert result is not None
    return result


def iter_numeric_slopes(
    net: Network,
    theta: Array,
    X: Array,
    Y: Array,
    method: str = "central",
    h: float | None = None,
    which: Iterable[int] | None = None,
) -> Progress[NumericSlopes]:
    """Finite-difference slopes, yielding ``(done, total)`` after each chunk.

    Args:
        net: the network.
        theta: parameters, ``(n_params,)``; not modified.
        X: inputs ``(n_samples, n_inputs)``; Y: targets ``(n_samples, n_outputs)``.
        method: ``"central"`` or ``"forward"``.
        h: step; the default is :data:`DEFAULT_STEP` for the method.
        which: flat indices to compute; all when None.

    Returns (as the generator's value) a :class:`NumericSlopes`.
    """
    if method not in METHODS:
        raise ValueError(method)
    step = default_step(method) if h is None else float(h)
    if not (math.isfinite(step) and step > 0.0):
        raise ValueError(f"step {h!r} is not a positive number")
    wanted = np.arange(net.n_params) if which is None else np.unique(np.fromiter(which, dtype=np.int64))
    slopes = np.full(net.n_params, np.nan)
    kink = np.zeros(net.n_params, dtype=bool)
    computed = np.zeros(net.n_params, dtype=bool)
    computed[wanted] = True
    total = int(wanted.size)
    done = 0
    yield done, total
    if total == 0:
        return NumericSlopes(slopes, kink, method, step, computed)

    theta = np.array(theta, dtype=np.float64, copy=True)
    trace = net.forward(theta, X)
    base_penalty = net.penalty(theta)
    base_cost = float(net.output_cost(trace[-1][0], trace[-1][1], Y)) + base_penalty
    inputs = [X] + [out for out, _ in trace[:-1]]
    params = net.views(theta)
    work = _Workspace()
    spaces = [work] + [_Workspace(reach=work.reach) for _ in range(_WORKERS - 1)]

    # The array with the most weights to compute first: a pass stopped early (the app's
    # automatic pass at its time budget) estimates the whole from what it did, and the
    # largest array's cost per weight is most of the whole (a convolution's few kernel
    # entries cost far more each than a dense layer's many weights).
    parts = [(block, wanted[(wanted >= block.start) & (wanted < block.stop)]) for block in net.layout.blocks]
    for block, in_block in sorted(parts, key=lambda part: -part[1].size):
        if in_block.size == 0:
            continue
        layer = net.layers[block.layer]
        later = net.layers[block.layer :]
        if isinstance(layer, Builtin):
            # Several threads only where no custom layer follows: a user's
            # layer is never run from two threads at once.
            parallel = all(isinstance(lay, Builtin) for lay in later)
            if all(isinstance(lay, Dense) for lay in later):
                if block.layer + 1 < len(net.layers):
                    _prepare_reach(net, params, trace, block.layer, work.reach)
                chunk = _chunk_size(net, block.layer, X.shape[0])
                one_piece = _dense_piece(net, params, trace, block, step, method, base_cost, Y, theta, base_penalty)
            else:
                chunk = stacked_chunk_size(net, block.layer, X.shape[0])
                one_piece = _stacked_piece(net, params, trace, inputs, block, step, method, base_cost, Y, theta,
                                           base_penalty)
            pieces = [in_block[lo : lo + chunk] for lo in range(0, in_block.size, chunk)]
            for idx, values, kinks in _pieces(one_piece, pieces, spaces if parallel else spaces[:1]):
                slopes[idx] = values
                kink[idx] = kinks
                done += idx.size
                yield done, total
        else:
            for flat in in_block:
                plus, kink_p = _rerun_cost(net, theta, inputs[block.layer], block.layer, int(flat), +step,
                                           Y, trace)
                if method == "central":
                    minus, kink_m = _rerun_cost(net, theta, inputs[block.layer], block.layer, int(flat), -step,
                                                Y, trace)
                    slopes[flat] = (plus - minus) / (2.0 * step)
                    kink[flat] = kink_p or kink_m
                else:
                    slopes[flat] = (plus - base_cost) / step
                    kink[flat] = kink_p
                done += 1
                if done % 16 == 0 or done == total:
                    yield done, total
    del params
    return NumericSlopes(slopes, kink, method, step, computed)


Piece = Callable[[NDArray[np.int64], "_Workspace"], tuple[NDArray[np.int64], Array, NDArray[np.bool_]]]


def _dense_piece(net: Network, params: list[dict[str, Array]], trace: list[tuple[Array, Any]], block: Any,
                 step: float, method: str, base_cost: float, Y: Array, theta: Array, base_penalty: float) -> Piece:
    """Slopes of one chunk of a dense block followed only by dense layers (the rank-one path).

    The costs include the L2 term at each moved point (``base_penalty`` is its value at ``theta``).
    """

    def one_piece(idx: NDArray[np.int64], space: _Workspace) -> tuple[NDArray[np.int64], Array, NDArray[np.bool_]]:
        plus, kink_p = _dense_costs(net, params, trace, block, idx, +step, Y, space)
        plus = plus + net.penalty_at(theta, base_penalty, idx, +step)
        if method == "central":
            minus, kink_m = _dense_costs(net, params, trace, block, idx, -step, Y, space)
            minus = minus + net.penalty_at(theta, base_penalty, idx, -step)
            return idx, (plus - minus) / (2.0 * step), kink_p | kink_m
        return idx, (plus - base_cost) / step, kink_p

    return one_piece


def _stacked_piece(net: Network, params: list[dict[str, Array]], trace: list[tuple[Array, Any]],
                   inputs: list[Array], block: Any, step: float, method: str, base_cost: float,
                   Y: Array, theta: Array, base_penalty: float) -> Piece:
    """Slopes of one chunk of any other built-in block (:mod:`stepper.core.stacked`), with the L2 term."""

    def one_piece(idx: NDArray[np.int64], space: _Workspace) -> tuple[NDArray[np.int64], Array, NDArray[np.bool_]]:
        local = idx - block.start
        moves = np.full(idx.size, step)
        plus, kink_p = stacked_costs(net, params, trace, inputs, block.layer, block.key, local, moves, Y)
        plus = plus + net.penalty_at(theta, base_penalty, idx, +step)
        if method == "central":
            minus, kink_m = stacked_costs(net, params, trace, inputs, block.layer, block.key, local, -moves, Y)
            minus = minus + net.penalty_at(theta, base_penalty, idx, -step)
            return idx, (plus - minus) / (2.0 * step), kink_p | kink_m
        return idx, (plus - base_cost) / step, kink_p

    return one_piece


#: Threads that evaluate chunks of perturbations side by side (see :func:`set_workers`).
_WORKERS = 1
_POOL: ThreadPoolExecutor | None = None


def set_workers(n: int) -> None:
    """Evaluate up to ``n`` chunks of perturbations at once, on threads (default 1).

    numpy releases the GIL inside its array loops, so this uses several cores.
    It pays only when the BLAS library itself runs one thread per call: with
    OpenBLAS's default of one thread per core the two kinds of threads compete
    and a 2-core machine got slower (tests/benchmarks/bench_numeric.py). The
    ``stepper`` command sets both.
    """
    global _WORKERS, _POOL
    n = max(1, int(n))
    if n != _WORKERS:
        if _POOL is not None:
            _POOL.shutdown(wait=True)
        _POOL = ThreadPoolExecutor(max_workers=n, thread_name_prefix="stepper-slopes") if n > 1 else None
        _WORKERS = n


def parallel_map(fn: Callable[[int], T], count: int) -> list[T]:
    """``[fn(0), ..., fn(count - 1)]``, spread over the threads of :func:`set_workers` when there are several.

    Each call runs in a copy of the caller's context (its ``np.errstate`` holds
    there too). ``fn`` must not share writable state between calls, and must
    never run a user's custom layer (those run on the caller's thread only).
    """
    pool = _POOL
    if pool is None or count < 2:
        return [fn(i) for i in range(count)]
    futures = [pool.submit(contextvars.copy_context().run, fn, i) for i in range(count)]
    return [future.result() for future in futures]


def _pieces(
    fn: Callable[[NDArray[np.int64], "_Workspace"], T],
    pieces: list[NDArray[np.int64]],
    spaces: list["_Workspace"],
) -> Iterator[T]:
    """``fn(piece, space)`` for each piece, results in order.

    With several workspaces, as many pieces as workspaces run at once on the
    pool; piece ``i`` uses workspace ``i % len(spaces)``, and it is submitted only
    after piece ``i - len(spaces)`` (the same workspace's last user) has
    finished, so no two threads share buffers. Stopping the iteration (a cancel)
    leaves at most that many pieces to finish.
    """
    pool = _POOL
    width = len(spaces) if pool is not None else 1
    if width == 1:
        for piece in pieces:
            yield fn(piece, spaces[0])
        return
    assert pool is not None
    pending: deque[Future[T]] = deque()
    try:
        for i, piece in enumerate(pieces):
            if len(pending) == width:
                yield pending.popleft().result()
            # In the caller's context, so its numpy error state (np.errstate) holds there too.
            context = contextvars.copy_context()
            pending.append(pool.submit(context.run, fn, piece, spaces[i % width]))
        while pending:
            yield pending.popleft().result()
    finally:
        for future in pending:
            future.cancel()
        for future in pending:
            if not future.cancelled():
                future.exception()  # wait: the workspace must be free before anyone reuses it


def _prepare_reach(
    net: Network, params: list[dict[str, Array]], trace: list[tuple[Array, Any]], layer: int, memo: dict[int, Array]
) -> None:
    """Fill ``memo[layer]`` with :func:`_kink_reach` when the next layer is a kinked dense one."""
    nxt = net.layers[layer + 1]
    if layer not in memo and isinstance(nxt, Dense) and nxt.activation.kink:
        memo[layer] = _kink_reach(trace[layer + 1][1].Z, params[layer + 1]["W"])


def _chunk_size(net: Network, layer: int, n_samples: int) -> int:
    """Perturbations per chunk, so that a chunk's stacked arrays fit in :data:`CHUNK_BYTES`."""
    this = net.layers[layer]
    rank_one = (isinstance(this, Dense) and this.activation.elementwise and layer + 1 < len(net.layers)
                and isinstance(net.layers[layer + 1], Dense))
    # With the rank-one update this layer's full output is never stacked.
    widest = max(l.n_out for l in net.layers[layer + 1 if rank_one else layer :])
    per_item = 8 * n_samples * max(widest, 1) * 4  # two buffers and temporaries per perturbation
    return int(max(1, min(4096, CHUNK_BYTES // per_item)))


def _kink_reach(Z: Array, W: Array) -> Array:
    """``min_m |Z[s, m]| / |W[u, m]|`` for every unit ``u`` of the layer before and sample ``s``.

    ``Z`` is ``(n, n_next)``, ``W`` is ``(n_units, n_next)``; returns ``(n_units, n)``.
    A change ``c`` of unit ``u``'s output on sample ``s`` can move some unit of the
    next layer across zero only if ``|c| >= reach[u, s]``; a zero weight never
    moves a unit (its ratio is infinite), a unit sitting at zero is reached by any
    change. Computed a block of units at a time so the temporary stays within
    :data:`CHUNK_BYTES`.
    """
    abs_Z = np.abs(Z)
    abs_W = np.abs(W)
    n_units = W.shape[0]
    reach = np.empty((n_units, Z.shape[0]))
    per_unit = max(8 * abs_Z.size, 1)
    step = int(max(1, CHUNK_BYTES // per_unit))
    for lo in range(0, n_units, step):
        w = abs_W[lo : lo + step, None, :]  # (block, 1, n_next)
        ratio = np.full((w.shape[0],) + abs_Z.shape, np.inf)
        np.divide(abs_Z[None, :, :], w, out=ratio, where=w != 0.0)
        reach[lo : lo + step] = np.min(ratio, axis=2)
    return reach


def _rerun_cost(
    net: Network, theta: Array, X_in: Array, layer: int, flat: int, delta: float, Y: Array,
    trace: list[tuple[Array, Any]],
) -> tuple[float, bool]:
    """Cost with ``theta[flat] += delta``, running the network from ``layer`` on.

    Also whether a unit of a later ReLU-like dense layer changed side of its kink
    against the unperturbed ``trace`` (as for dense parameters).
    """
    saved = theta[flat]
    theta[flat] = saved + delta
    try:
        run = net.forward(theta, X_in, start=layer)
        crossed = False
        for index in range(layer + 1, len(net.layers)):
            later = net.layers[index]
            if isinstance(later, Dense) and later.activation.kink:
                crossed = crossed or bool(np.any((run[index - layer][1].Z > 0.0) != (trace[index][1].Z > 0.0)))
        A, cache = run[-1]
        return float(net.output_cost(A, cache, Y)) + net.penalty(theta), crossed
    finally:
        theta[flat] = saved


def _dense_costs(
    net: Network,
    params: list[dict[str, Array]],
    trace: list[tuple[Array, Any]],
    block: Any,
    idx: NDArray[np.int64],
    delta: float,
    Y: Array,
    work: _Workspace,
) -> tuple[Array, NDArray[np.bool_]]:
    """Costs ``(k,)`` with each parameter in ``idx`` (all in one dense block) moved by ``delta``.

    Also returns, per parameter, whether any kinked unit came within the change
    of its kink. ``work`` keeps look-ups and buffers between chunks.
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
        column = work.rows_of(layer_index, "X", cache)[rows]  # (k, n): the input that multiplies each weight
    else:
        units = local
        column = np.ones((k, n))
    z_base = work.rows_of(layer_index, "Z", cache)[units]  # (k, n)
    z_col = z_base + delta * column
    kinked = np.zeros(k, dtype=bool)
    act = layer.activation
    if act.kink:
        kinked |= np.any((z_col > 0.0) != (z_base > 0.0), axis=1)

    n_layers = len(net.layers)
    next_layer = net.layers[layer_index + 1] if layer_index + 1 < n_layers else None
    slot = 0
    if act.elementwise and isinstance(next_layer, Dense):
        # Only column `unit` of this layer's output changes: a rank-one update
        # of the next layer's pre-activation.
        change = act.fn(z_col) - work.rows_of(layer_index, "A", cache)[units]  # (k, n)
        nxt: DenseCache = trace[layer_index + 1][1]
        W_next = params[layer_index + 1]["W"]
        Z = work.array(slot, (k, n, next_layer.n_out))
        np.multiply(change[:, :, None], W_next[units][:, None, :], out=Z)
        Z += nxt.Z
        if next_layer.activation.kink:
            # Unit m of sample s sits within this change of its kink when
            # |Z[s, m]| <= |change[s]| * |W_next[unit, m]|.
            reach = work.reach[layer_index][units]  # (k, n)
            kinked |= np.any(np.abs(change) >= reach, axis=1)
        index = layer_index + 1
    else:
        Z = work.array(slot, (k,) + cache.Z.shape)
        Z[...] = cache.Z
        Z[np.arange(k), :, units] = z_col
        index = layer_index

    # Z holds the pre-activations of dense layer `index` for every copy, (k, n, units).
    while True:
        dense = net.layers[index]
        assert isinstance(dense, Dense)
        if index == n_layers - 1:
            # The last layer: its Z is needed afterwards only by a fused loss.
            A = Z if net.fused is not None else dense.activation.apply_in_place(Z)
            return net.output_cost(A, DenseCache(_NOTHING, Z, A), Y), kinked
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
