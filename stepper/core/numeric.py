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
perturbations at once, stacked on a leading axis, both sides of a central
difference in the same stack (:mod:`stepper.core.numeric_dense`, which also
passes a ReLU-like layer by one matrix made per pass, for moves that reach
none of its kinks). Parameters of other built-in
layers (convolutions, norms, embeddings) and of dense layers followed by them
take the general stacked path of :mod:`stepper.core.stacked`: the layers before
are never recomputed either, the perturbed layer makes all copies' outputs at
once, and every later layer runs once per chunk. Parameters of custom layers
fall back to re-running the network from that layer on, one at a time.

Memory. The stacked arrays of a chunk live in two buffers that are reused from
chunk to chunk, and activations are applied in place: fresh multi-megabyte
arrays for every chunk are handed back to the system when freed, and touching
new pages again costs more than the arithmetic (it doubled the time of a pass
over a 10-64-64-1 network). The rank-one path runs a chunk's later layers a
sub-block of copies at a time (about 1 MiB of stack), so its chunks can be
large (the per-chunk work is shared by more moves) while the stack stays in
the L2 cache.
"""

from __future__ import annotations

import contextvars
import math
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, Callable, Generator, Iterable, Iterator, TypeVar

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import Builtin, Dense
from stepper.core.network import Network
from stepper.core.numeric_dense import Workspace as _Workspace
from stepper.core.numeric_dense import dense_costs as _dense_costs
from stepper.core.numeric_dense import prepare as _prepare
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
    spaces = [work] + [work.sibling() for _ in range(_WORKERS - 1)]

    signs = 2 if method == "central" else 1  # moves per weight
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
                _prepare(net, params, trace, block.layer, int(in_block.size), work)
                chunk = _chunk_size(net, block.layer, X.shape[0], block.layer in work.through) // signs
                one_piece = _dense_piece(net, params, trace, block, step, method, base_cost, Y, theta, base_penalty)
            else:
                chunk = stacked_chunk_size(net, block.layer, X.shape[0])
                one_piece = _stacked_piece(net, params, trace, inputs, block, step, method, base_cost, Y, theta,
                                           base_penalty)
            chunk = max(1, chunk)
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
        k = idx.size
        if method == "central":
            # Both sides in one stack: idx moved up, then idx moved down.
            costs, kinks = _dense_costs(net, params, trace, block, np.concatenate([idx, idx]),
                                        np.repeat([step, -step], k), Y, space)
            plus = costs[:k] + net.penalty_at(theta, base_penalty, idx, +step)
            minus = costs[k:] + net.penalty_at(theta, base_penalty, idx, -step)
            return idx, (plus - minus) / (2.0 * step), kinks[:k] | kinks[k:]
        plus, kink_p = _dense_costs(net, params, trace, block, idx, np.full(k, step), Y, space)
        plus = plus + net.penalty_at(theta, base_penalty, idx, +step)
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
    It pays only when the BLAS library itself runs one thread per call (with
    OpenBLAS's default of one thread per core the two kinds of threads compete),
    and only on an otherwise idle machine: on a shared 2-core machine two
    workers took 0.58x to 0.87x the speed of one at load averages of 2.8 to 4.6
    (10-64-64-1 and 10-310-310-1, tanh and ReLU), and gained 1.02x to 1.1x near
    idle (tests/benchmarks/bench_numeric.py). So the ``stepper`` command keeps
    one; a program that owns its machine may ask for more.
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


def _chunk_size(net: Network, layer: int, n_samples: int, through: bool = False) -> int:
    """Moves per chunk, so that a chunk's stacked arrays fit in :data:`CHUNK_BYTES`.

    ``through``: the moves pass the next layer by :mod:`stepper.core.numeric_dense`'s ``G``.
    Otherwise the rank-one path runs the later layers a sub-block of the chunk at a time
    (:data:`stepper.core.numeric_dense.SUB_BYTES`), so only its moved columns ``(k, n)``
    grow with the chunk.
    """
    this = net.layers[layer]
    rank_one = (isinstance(this, Dense) and this.activation.elementwise and layer + 1 < len(net.layers)
                and isinstance(net.layers[layer + 1], Dense))
    if rank_one and not through:
        widest = 1  # only the moved columns (k, n); the stack is bounded by SUB_BYTES
    else:
        # Through the next layer, neither this layer's output nor the next one's is stacked.
        widest = max(l.n_out for l in net.layers[layer + (2 if through else 0) :])
    per_item = 8 * n_samples * max(widest, 1) * 4  # two buffers and temporaries per perturbation
    return int(max(1, min(4096, CHUNK_BYTES // per_item)))


def _rerun_cost(
    net: Network, theta: Array, X_in: Array, layer: int, flat: int, delta: float, Y: Array,
    trace: list[tuple[Array, Any]],
) -> tuple[float, bool]:
    """Cost with ``theta[flat] += delta``, running the network from ``layer`` on.

    Also whether a later built-in layer crossed a kink against the unperturbed
    ``trace`` (a ReLU-like unit changed side, a max-pool window's largest entry changed).
    """
    saved = theta[flat]
    theta[flat] = saved + delta
    try:
        run = net.forward(theta, X_in, start=layer)
        crossed = False
        for index in range(layer + 1, len(net.layers)):
            later = net.layers[index]
            if isinstance(later, Builtin) and later.has_kinks:
                crossed = crossed or bool(later.crossed(trace[index][1], run[index - layer][1], 1)[0])
        A, cache = run[-1]
        return float(net.output_cost(A, cache, Y)) + net.penalty(theta), crossed
    finally:
        theta[flat] = saved
