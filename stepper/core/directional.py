"""Directional checks: the whole of each parameter array tested in a few cost evaluations.

For an array ``w`` (``L2.W``, say) and a unit vector ``d`` of its shape, the
slope of the cost along ``d`` is the projection of the gradient on it,
``g . d`` (the directional derivative; e.g. Nocedal & Wright, *Numerical
Optimization*, 2nd ed., 2006, section A.2). Finite differences give the same
number from two costs, ``(C(w + h d) - C(w - h d)) / (2 h)``, however many
entries ``w`` has. So ``K`` random directions per array check a model of a
million weights in ``2 K`` cost evaluations per array, where a check weight
by weight needs two per weight.

Directions are drawn from an isotropic Gaussian and normalised (a uniform
direction on the sphere; Muller, "A note on a method for generating points
uniformly on N-dimensional spheres", 1959), from
``numpy.random.default_rng(seed)``, array by array in network order.

What it finds and what it may miss: a backward pass that is wrong across an
array shows in every direction. A mistake confined to a few entries of a large
array is diluted: its share of ``g . d`` is about ``1 / sqrt(size)`` of the
array's, so it may stay inside the tolerances; check such entries weight by
weight (``--weights``).

Each direction gets a verdict as a single weight does (:mod:`stepper.core.compare`);
an array's verdict is its worst direction's, in the order disagree, doubtful,
kink, agree. Only the array's own layer and the layers after it are run again;
the layers before are taken from one forward pass.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.compare import Thresholds, judge, noise_level
from stepper.core.layers import Dense, DenseCache
from stepper.core.network import Block, Network
from stepper.core.numeric import METHODS, Progress, default_step

Array = NDArray[np.float64]

#: Severity of a direction's verdict, for an array's verdict (its worst direction's).
SEVERITY = {"agree": 0, "kink": 1, "unresolved": 2, "doubtful": 3, "disagree": 4}


@dataclass(frozen=True)
class ArrayDirections:
    """The directions drawn for one parameter array; arrays are ``(k,)``.

    Attributes:
        block: the array.
        analytic: projections ``g . d`` of the backpropagated slopes on each direction.
        numeric: finite-difference slopes of the cost along each direction.
        rel_error: relative error of each pair (see :mod:`stepper.core.compare`).
        verdicts: per direction.
    """

    block: Block
    analytic: Array
    numeric: Array
    rel_error: Array
    verdicts: NDArray[np.str_]

    @property
    def verdict(self) -> str:
        """The worst of the directions' verdicts."""
        return str(max(self.verdicts, key=lambda v: SEVERITY.get(str(v), 4)))

    @property
    def worst_error(self) -> float:
        rel = self.rel_error
        return float(np.nanmax(rel)) if rel.size and not np.all(np.isnan(rel)) else float("nan")


@dataclass(frozen=True)
class DirectionalCheck:
    """Directional checks of every parameter array.

    Attributes:
        cost: the cost at the checked parameters.
        arrays: one entry per array, in network order.
        k: directions per array; seed: their generator's seed.
        method, h: finite-difference settings.
    """

    cost: float
    arrays: tuple[ArrayDirections, ...]
    k: int
    seed: int
    method: str
    h: float

    @property
    def passed(self) -> bool:
        return all(a.verdict not in ("disagree", "unresolved") for a in self.arrays)

    @property
    def counts(self) -> dict[str, int]:
        """How many arrays got each verdict."""
        out = {name: 0 for name in SEVERITY}
        for a in self.arrays:
            out[a.verdict] = out.get(a.verdict, 0) + 1
        return out


def unit_direction(rng: np.random.Generator, size: int) -> Array:
    """A random unit vector of ``size`` entries, uniform on the sphere."""
    d = rng.standard_normal(size)
    norm = float(np.linalg.norm(d))
    while norm == 0.0:  # probability zero; drawn again rather than divided by zero
        d = rng.standard_normal(size)
        norm = float(np.linalg.norm(d))
    d /= norm
    return d


def iter_directional_check(
    net: Network,
    theta: Array,
    X: Array,
    Y: Array,
    k: int,
    seed: int = 0,
    method: str = "central",
    h: float | None = None,
    analytic: Array | None = None,
    limits: Thresholds = Thresholds(),
) -> Progress[DirectionalCheck]:
    """Check every array along ``k`` random directions, yielding ``(done, total)`` per direction.

    Args:
        net: the network; theta: parameters ``(n_params,)`` (not modified).
        X: inputs ``(n_samples, n_inputs)``; Y: targets ``(n_samples, n_outputs)``.
        k: directions per array (at least 1); seed: their generator's seed.
        method: ``"central"`` or ``"forward"``; h: the step (default as for weights).
        analytic: the backpropagated slopes ``(n_params,)`` when the caller has them.
    """
    if method not in METHODS:
        raise ValueError(method)
    if k < 1:
        raise ValueError(f"{k} directions: at least one is needed")
    step = default_step(method) if h is None else float(h)
    theta = np.array(theta, dtype=np.float64, copy=True)
    trace = net.forward(theta, X)
    cost = float(net.output_cost(trace[-1][0], trace[-1][1], Y))
    if analytic is None:
        _, analytic, _ = net.backward(theta, trace, Y)
    noise = noise_level(cost, step)
    rng = np.random.default_rng(seed)
    total = k * len(net.layout.blocks)
    done = 0
    yield done, total
    out: list[ArrayDirections] = []
    for block in net.layout.blocks:
        a = np.empty(k)
        n = np.empty(k)
        kink = np.zeros(k, dtype=bool)
        for j in range(k):
            d = unit_direction(rng, block.size)
            a[j] = float(analytic[block.start : block.stop] @ d)
            costs, kink[j] = _costs_along(net, theta, X, Y, trace, block, d, step, method)
            n[j] = (costs[0] - costs[1]) / (2.0 * step) if method == "central" else (costs[0] - cost) / step
            done += 1
            yield done, total
        rel, verdicts = judge(a, n, kink, noise, limits)
        out.append(ArrayDirections(block, a, n, rel, verdicts))
    return DirectionalCheck(cost, tuple(out), k, seed, method, step)


def _costs_along(
    net: Network,
    theta: Array,
    X: Array,
    Y: Array,
    trace: list[tuple[Array, Any]],
    block: Block,
    d: Array,
    h: float,
    method: str,
) -> tuple[Array, bool]:
    """Costs at ``theta + h d`` (and ``theta - h d`` for central), and whether a kink was crossed.

    ``d`` has ``block.size`` entries. For a dense layer the change of its
    pre-activation is linear in the move, ``h (X D)`` for its weights and
    ``h d`` for its biases, so the copies start from the cached ``Z``.
    """
    signs = np.array([1.0, -1.0] if method == "central" else [1.0])
    index = block.layer
    layer = net.layers[index]
    X_in = X if index == 0 else trace[index - 1][0]
    kinked = False
    if isinstance(layer, Dense):
        base: DenseCache = trace[index][1]
        change = X_in @ d.reshape(block.shape) if block.key == "W" else d
        Z = base.Z + (h * signs)[:, None, None] * change  # (copies, n, units)
        A = layer.activation.fn(Z)
        if layer.activation.kink:
            kinked |= bool(np.any((Z > 0.0) != (base.Z > 0.0)))
        last: tuple[Array, Any] = (A, DenseCache(X_in, Z, A))
        costs, crossed = _run_rest(net, theta, Y, trace, index + 1, A, last)
        return costs, kinked or crossed
    # Any other layer: run it on the moved parameters, one copy at a time.
    moved = theta.copy()
    costs = np.empty(signs.size)
    for c, sign in enumerate(signs):
        moved[block.start : block.stop] = theta[block.start : block.stop] + sign * h * d
        out = net.forward(moved, X_in, start=index)
        rest = out[1:] if len(out) > 1 else []
        crossed = _crossed(net, trace, index + 1, [cache for _, cache in rest])
        kinked |= crossed
        costs[c] = float(net.output_cost(out[-1][0], out[-1][1], Y))
    return costs, kinked


def _run_rest(
    net: Network,
    theta: Array,
    Y: Array,
    trace: list[tuple[Array, Any]],
    start: int,
    A: Array,
    last: tuple[Array, Any],
) -> tuple[Array, bool]:
    """Costs ``(copies,)`` of running layers ``start..`` on stacked inputs ``A`` ``(copies, n, width)``.

    ``last`` is the output and cache of the layer before ``start``, used when it
    is the network's last layer. Dense layers take the copies in one call; any
    other layer gets them one at a time.
    """
    if start == len(net.layers):
        return np.asarray(net.output_cost(last[0], last[1], Y), dtype=np.float64), False
    if all(isinstance(later, Dense) for later in net.layers[start:]):
        out = net.forward(theta, A, start=start)
        crossed = _crossed(net, trace, start, [cache for _, cache in out])
        return np.asarray(net.output_cost(out[-1][0], out[-1][1], Y), dtype=np.float64), crossed
    costs = np.empty(A.shape[0])
    crossed = False
    for c in range(A.shape[0]):
        out = net.forward(theta, A[c], start=start)
        crossed |= _crossed(net, trace, start, [cache for _, cache in out])
        costs[c] = float(net.output_cost(out[-1][0], out[-1][1], Y))
    return costs, crossed


def _crossed(net: Network, trace: list[tuple[Array, Any]], start: int, caches: list[Any]) -> bool:
    """Whether a kinked dense layer from ``start`` on has a unit on another side of its kink than at ``theta``."""
    for offset, cache in enumerate(caches):
        index = start + offset
        layer = net.layers[index]
        base = trace[index][1]
        if (isinstance(layer, Dense) and layer.activation.kink and isinstance(cache, DenseCache)
                and isinstance(base, DenseCache)):
            if np.any((cache.Z > 0.0) != (base.Z > 0.0)):
                return True
    return False
