"""The cost along one weight: a sweep, the tangent, the curvature and what it says about the rate.

Hold every parameter but one, ``w``, fixed, and look at the cost as a function
of that one, ``C(w)``, around its current value ``w0``:

- the tangent at ``w0`` has the analytic slope ``g = dC/dw`` (backpropagation);
- the curvature ``c = d2C/dw2`` is estimated numerically by the second central
  difference ``(C(w0 + h) - 2 C(w0) + C(w0 - h)) / h^2``. Its truncation error
  is ``O(h^2)`` and its rounding error ``O(u C / h^2)`` for machine epsilon
  ``u``; balancing the two gives ``h`` near ``u^(1/4)`` for weights and costs of
  order one (the same argument as for first differences in Press et al.,
  *Numerical Recipes*, 3rd ed., 2007, section 5.7; recalled from memory);
- the quadratic model ``C(w) ~ C0 + g d + c d^2 / 2`` with ``d = w - w0``.
  One plain descent step ``w1 = w0 - r g`` at rate ``r`` multiplies the distance
  to the model's minimum by ``1 - r c``. With ``c > 0`` the step lands short of
  the minimum when ``r c < 1``, on it when ``r c = 1`` (the best rate along this
  weight is ``1 / c``; "at the minimum" within :data:`LANDS_WITHIN`, the
  curvature's own accuracy), beyond it (overshoots, oscillating steps) when
  ``1 < r c < 2``, and farther from it than it started (repeated steps diverge)
  when ``r c > 2``. (LeCun, Bottou, Orr & Mueller, "Efficient BackProp", 1998,
  section 5.1 on the optimal learning rate; recalled from memory.) With
  ``c <= 0`` the model has no minimum along this weight and sets no limit.

All sweep points are evaluated together: for a weight of a dense layer only
that layer's pre-activation column changes, so the layers before it run once
and the layers after it run on all points stacked on a leading axis; the other
built-in layers do the same through :mod:`stepper.core.stacked`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import Builtin, Dense, DenseCache
from stepper.core.network import Block, Network
from stepper.core.stacked import chunk_size, stacked_costs

Array = NDArray[np.float64]

#: Sweep points used when the caller gives none (odd, so ``w0`` is the middle one).
DEFAULT_POINTS = 41

#: Step of the second difference relative to ``max(1, |w0|)``: ``u^(1/4)``, see the module docstring.
CURVATURE_STEP = float(np.finfo(np.float64).eps) ** 0.25

#: Bytes the stacked sweep copies may take at once.
CHUNK_BYTES = 16 * 1024 * 1024

REGIMES = ("short", "at the minimum", "overshoots", "diverges", "no minimum")

#: ``rate x curvature`` this close to 1 counts as landing at the minimum. The second
#: difference's rounding error is about ``u |C| / h^2 = u^(1/2) |C|`` (about 1.5e-8 for a
#: cost of order one, with ``h = u^(1/4)``), so a step at exactly ``1 / curvature`` shows
#: as 1 plus a few 1e-9 (the README's own example gives 1.0000000075); 1e-6 leaves room
#: for that (our choice, no published source).
LANDS_WITHIN = 1e-6


@dataclass(frozen=True)
class CostSlice:
    """The cost along one weight, with every other weight fixed.

    Attributes:
        index: flat index of the weight in ``theta``.
        value: its current value ``w0``.
        cost: the cost at ``w0``.
        slope: analytic slope ``dC/dw`` at ``w0``.
        curvature: numeric second derivative ``d2C/dw2`` at ``w0``.
        curvature_step: the step ``h`` of the second difference.
        rate: the descent rate the step and the verdict refer to.
        points: swept weight values, ``(n_points,)``, increasing.
        costs: cost at each point, ``(n_points,)``.
        tangent: ``cost + slope * (points - value)``, ``(n_points,)``.
        landing: where one plain step lands, ``value - rate * slope``.
        landing_cost: the cost actually found there.
        model_cost: the cost the quadratic model predicts there.
    """

    index: int
    value: float
    cost: float
    slope: float
    curvature: float
    curvature_step: float
    rate: float
    points: Array
    costs: Array
    tangent: Array
    landing: float
    landing_cost: float
    model_cost: float

    @property
    def rate_curvature(self) -> float:
        """``rate * curvature``: the number the verdict is read from."""
        return self.rate * self.curvature

    @property
    def best_rate(self) -> float:
        """``1 / curvature``, the rate that lands on the model's minimum; inf when ``curvature <= 0``."""
        return 1.0 / self.curvature if self.curvature > 0 else float("inf")

    @property
    def regime(self) -> str:
        """``short``, ``at the minimum``, ``overshoots``, ``diverges`` or ``no minimum``.

        See the module docstring; ``at the minimum`` means within :data:`LANDS_WITHIN` of 1.
        """
        if not self.curvature > 0:
            return "no minimum"
        rc = self.rate_curvature
        if abs(rc - 1.0) <= LANDS_WITHIN:
            return "at the minimum"
        if rc < 1.0:
            return "short"
        if rc <= 2.0:
            return "overshoots"
        return "diverges"

    @property
    def lowest(self) -> tuple[float, float]:
        """``(weight, cost)`` of the lowest swept point."""
        k = int(np.argmin(self.costs))
        return float(self.points[k]), float(self.costs[k])


def default_span(value: float, slope: float, rate: float) -> float:
    """Half-width of the default sweep: ``max(1, |w0|, 1.5 |rate * slope|)``.

    Wide enough to show the landing point of one step, and at least the
    order of a typical weight (common practice, no published source).
    """
    return float(max(1.0, abs(value), 1.5 * abs(rate * slope)))


def cost_slice(
    net: Network,
    theta: Array,
    X: Array,
    Y: Array,
    index: int,
    rate: float,
    span: float | None = None,
    n_points: int = DEFAULT_POINTS,
) -> CostSlice:
    """Sweep weight ``index`` over ``value +- span`` and describe the cost there.

    Args:
        net: the network.
        theta: parameters ``(n_params,)``; not modified.
        X: inputs ``(n_samples, n_inputs)``; Y: targets ``(n_samples, n_outputs)``.
        index: flat index of the weight.
        rate: descent rate for the step and the verdict.
        span: half-width of the sweep; :func:`default_span` when None.
        n_points: number of sweep points (at least 2).
    """
    if not 0 <= index < net.n_params:
        raise IndexError(index)
    if n_points < 2:
        raise ValueError("a sweep needs at least 2 points")
    theta = np.array(theta, dtype=np.float64, copy=True)
    value = float(theta[index])
    cost, grads = net.cost_and_slopes(theta, X, Y)
    slope = float(grads[index])
    half = default_span(value, slope, rate) if span is None else float(span)
    if not half > 0:
        raise ValueError("the span must be positive")
    h = CURVATURE_STEP * max(1.0, abs(value))
    step = -rate * slope
    sweep = np.linspace(-half, half, n_points)
    offsets = np.concatenate([sweep, [0.0, h, -h, step]])
    found = costs_at_offsets(net, theta, X, Y, index, offsets)
    costs, (c0, c_plus, c_minus, c_step) = found[:n_points], found[n_points:]
    curvature = float((c_plus - 2.0 * c0 + c_minus) / (h * h))
    return CostSlice(
        index=index,
        value=value,
        cost=float(cost),
        slope=slope,
        curvature=curvature,
        curvature_step=h,
        rate=float(rate),
        points=value + sweep,
        costs=costs,
        tangent=float(cost) + slope * sweep,
        landing=value + step,
        landing_cost=float(c_step),
        model_cost=float(cost) + slope * step + 0.5 * curvature * step * step,
    )


def costs_at_offsets(
    net: Network, theta: Array, X: Array, Y: Array, index: int, offsets: Array
) -> Array:
    """Cost with ``theta[index] += offset`` for each offset ``(k,)``; returns ``(k,)``.

    For a dense layer's weight or bias the layers before it run once, its
    pre-activation changes in one column by ``offset * input`` (or ``offset``
    for a bias); when its activation is elementwise and a dense layer follows,
    that layer's pre-activation gets a rank-one change; the rest of the network
    runs on all offsets stacked.
    Parameters of other built-in layers, or of a dense layer followed by them,
    go through :func:`stepper.core.stacked.stacked_costs`; parameters of custom
    layers are moved one offset at a time. The costs include the network's L2
    term at each moved point.
    """
    offsets = np.asarray(offsets, dtype=np.float64).ravel()
    data = _data_costs_at_offsets(net, theta, X, Y, index, offsets)
    return data + net.penalty_at(theta, net.penalty(theta), np.full(offsets.size, index), offsets)


def _data_costs_at_offsets(
    net: Network, theta: Array, X: Array, Y: Array, index: int, offsets: Array
) -> Array:
    """The data term of :func:`costs_at_offsets`, ``(k,)``."""
    block = net.layout.block_of(index)
    layer = net.layers[block.layer]
    trace = net.forward(theta, X)
    inputs = X if block.layer == 0 else trace[block.layer - 1][0]
    if not isinstance(layer, Builtin):
        return _costs_one_by_one(net, theta, inputs, Y, block.layer, index, offsets)
    if not (isinstance(layer, Dense) and all(isinstance(lay, Dense) for lay in net.layers[block.layer:])):
        return _stacked(net, theta, X, trace, block, index, offsets, Y)
    cache: DenseCache = trace[block.layer][1]
    local = index - block.start
    if block.key == "W":
        row, unit = divmod(local, layer.n_out)
        column = cache.X[:, row]
    else:
        unit = local
        column = np.ones(cache.X.shape[0])
    widest = max(lay.n_out for lay in net.layers[block.layer :])
    per_point = 8 * X.shape[0] * max(widest, 1) * 3
    chunk = int(max(1, CHUNK_BYTES // per_point))
    params = net.views(theta)
    out = np.empty(offsets.size)
    nxt = block.layer + 1
    rank_one = layer.activation.elementwise and nxt < len(net.layers) and isinstance(net.layers[nxt], Dense)
    for lo in range(0, offsets.size, chunk):
        part = offsets[lo : lo + chunk]
        last: DenseCache | None
        if rank_one:
            # Only column `unit` of this layer's output changes, so the next dense
            # layer's pre-activation changes by that column's change times one row of its W.
            after = net.layers[nxt]
            assert isinstance(after, Dense)
            z_col = cache.Z[:, unit][None, :] + part[:, None] * column[None, :]  # (k, n)
            change = layer.activation.fn(z_col) - cache.A[:, unit][None, :]
            Z = np.multiply.outer(change, params[nxt]["W"][unit])  # (k, n, n_next)
            Z += trace[nxt][1].Z
            A = after.activation.fn(Z)
            last = DenseCache(np.empty(0), Z, A)
            start = nxt + 1
        else:
            Z = np.broadcast_to(cache.Z, (part.size,) + cache.Z.shape).copy()  # (k, n, n_out)
            Z[:, :, unit] += part[:, None] * column[None, :]
            A = layer.activation.fn(Z)
            last = DenseCache(np.empty(0), Z, A)
            start = nxt
        for later in range(start, len(net.layers)):
            lay = net.layers[later]
            assert isinstance(lay, Dense)
            Z = lay.pre_activation(params[later], A)
            A = lay.activation.fn(Z)
            last = DenseCache(np.empty(0), Z, A)
        out[lo : lo + part.size] = net.output_cost(A, last, Y)
    return out


def _stacked(net: Network, theta: Array, X: Array, trace: list[tuple[Array, Any]], block: Block, index: int,
             offsets: Array, Y: Array) -> Array:
    """Costs at every offset of one parameter of a built-in layer, a chunk of offsets at a time."""
    params = net.views(theta)
    inputs = [X] + [out for out, _ in trace[:-1]]
    chunk = chunk_size(net, block.layer, X.shape[0])
    out = np.empty(offsets.size)
    for lo in range(0, offsets.size, chunk):
        part = offsets[lo : lo + chunk]
        local = np.full(part.size, index - block.start, dtype=np.int64)
        out[lo : lo + part.size] = stacked_costs(net, params, trace, inputs, block.layer, block.key, local, part, Y)[0]
    return out


def _costs_one_by_one(
    net: Network, theta: Array, inputs: Array, Y: Array, layer: int, index: int, offsets: Array
) -> Array:
    """Costs for a parameter of a non-dense layer: rerun the network from that layer per offset."""
    work = theta.copy()
    base = work[index]
    out = np.empty(offsets.size)
    for k, offset in enumerate(offsets):
        work[index] = base + offset
        A, cache = net.forward(work, inputs, start=layer)[-1]
        out[k] = float(net.output_cost(A, cache, Y))
    return out
