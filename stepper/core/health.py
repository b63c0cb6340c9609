"""Layer health: sizes of weights and slopes, saturated and dead units, how slopes travel back.

Per layer (see :class:`LayerHealth`):

- the norms of its weights and of their slopes (weight arrays only: biases
  start at zero, so a ratio against them says little);
- the update-to-weight ratio one plain step at rate ``r`` would make,
  ``r * |slope| / |weights|``. A ratio near 1e-3 per step is a rule of thumb
  (common practice, no published source); much lower suggests the rate is too
  small for this layer, much higher that the step rewrites the layer;
- for sigmoid and tanh layers, the fraction of saturated units: units whose
  activation slope is below :data:`SATURATED_BELOW` on at least
  :data:`MOST` of the samples. Not for an output layer whose sigmoid is fused
  with its cross-entropy: its slope at ``Z`` is ``a - y``, which a saturated
  unit does not shrink (it is then merely confident);
- for ReLU layers, the fraction of dead units: output zero on every sample,
  so no slope reaches their incoming weights;
- for convolutions the same per output channel: a channel is saturated when
  its activation slope is below :data:`SATURATED_BELOW` on at least
  :data:`MOST` of its entries (samples times positions), dead when its ReLU
  output is zero at every position of every sample (no slope then reaches any
  of its kernel weights);
- the root mean square of the error signal at the units' inputs
  (``dCost/dZ`` for a dense layer or a convolution, ``dCost/dOut`` for the
  others), and its
  ratio to the next layer's, which shows whether slopes shrink or grow on the
  way back from the output (the effect studied by Glorot & Bengio, 2010,
  "Understanding the difficulty of training deep feedforward neural networks";
  recalled from memory).

Thresholds without a published source are common practice and named here.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import ActivationLayer, Conv, ConvCache, Dense, DenseCache
from stepper.core.network import Network

Array = NDArray[np.float64]

#: An activation slope below this counts as saturated (common practice, no published source).
SATURATED_BELOW = 0.01
#: "Most samples": a unit saturated on at least this fraction of samples is a saturated unit.
MOST = 0.9
#: Rule-of-thumb update-to-weight ratio per step (common practice, no published source).
RATIO_TYPICAL = 1e-3
#: Below / above these the ratio is called low / high (a factor 10 around the rule of thumb).
RATIO_LOW = 1e-4
RATIO_HIGH = 1e-2
#: Slopes "shrink" / "grow" on the way back when the first layer's error signal is
#: below / above the last layer's by this factor (common practice, no published source).
TREND_FACTOR = 10.0


@dataclass(frozen=True)
class LayerHealth:
    """Health figures of one layer.

    Attributes:
        index: 0-based layer index.
        label: the layer's label, e.g. ``dense 4->6 tanh``.
        weight_norm: Euclidean norm of the layer's weight arrays.
        slope_norm: Euclidean norm of the slopes of those arrays.
        update_ratio: ``rate * slope_norm / weight_norm`` (NaN when the weights are all zero
            or the layer has none).
        saturation: per unit (per channel for a convolution), fraction of samples (times
            positions) with activation slope below :data:`SATURATED_BELOW`, ``(n_out,)``
            or ``(channels,)``; None when the activation cannot saturate.
        active: per unit (or channel), fraction of samples (times positions) with a positive
            pre-activation; None unless the activation is ReLU.
        signal_rms: root mean square of the error signal at the units' inputs.
        signal_change: ``signal_rms`` over the next layer's (NaN for the last layer).
        per: ``"unit"``, or ``"channel"`` for a convolution.
        unit_weights, unit_slopes: per unit (or channel), the norm of its incoming weights
            (a dense layer's column ``W[:, j]``, a convolution's kernel ``K[o]``) and of
            their slopes, ``(n_out,)`` or ``(channels,)``; None for other layers.
        unit_signal: per unit (or channel), the root mean square of the error signal at
            its inputs ``Z`` (over samples, and positions for a channel); None for other layers.
    """

    index: int
    label: str
    weight_norm: float
    slope_norm: float
    update_ratio: float
    saturation: Array | None
    active: Array | None
    signal_rms: float
    signal_change: float
    per: str = "unit"
    unit_weights: Array | None = None
    unit_slopes: Array | None = None
    unit_signal: Array | None = None

    @property
    def saturated_units(self) -> NDArray[np.int64]:
        """Indices of units saturated on at least :data:`MOST` of the samples."""
        if self.saturation is None:
            return np.empty(0, dtype=np.int64)
        return np.flatnonzero(self.saturation >= MOST)

    @property
    def dead_units(self) -> NDArray[np.int64]:
        """Indices of ReLU units that are zero on every sample."""
        if self.active is None:
            return np.empty(0, dtype=np.int64)
        return np.flatnonzero(self.active == 0.0)

    @property
    def saturated_fraction(self) -> float:
        """Fraction of units saturated; NaN when the activation cannot saturate."""
        if self.saturation is None:
            return float("nan")
        return self.saturated_units.size / self.saturation.size

    @property
    def dead_fraction(self) -> float:
        """Fraction of ReLU units dead on every sample; NaN for other activations."""
        if self.active is None:
            return float("nan")
        return self.dead_units.size / self.active.size

    @property
    def ratio_verdict(self) -> str:
        """``low``, ``typical``, ``high`` against the rule of thumb, or ``""`` when not defined."""
        r = self.update_ratio
        if not np.isfinite(r):
            return ""
        if r < RATIO_LOW:
            return "low"
        if r > RATIO_HIGH:
            return "high"
        return "typical"


@dataclass(frozen=True)
class HealthReport:
    """Layer health of a whole network at one point.

    Attributes:
        rate: the rate the update ratios refer to.
        layers: one entry per layer, input side first.
        travel: first layer's error signal over the last layer's (NaN for one layer).
    """

    rate: float
    layers: tuple[LayerHealth, ...]
    travel: float

    @property
    def trend(self) -> str:
        """``shrinking``, ``growing`` or ``steady`` on the way back.

        ``single layer`` when there is nothing to compare, ``no signal`` when
        the output's error signal is zero (a perfect fit).
        """
        if len(self.layers) < 2:
            return "single layer"
        t = self.travel
        if not np.isfinite(t):
            return "no signal"
        if t < 1.0 / TREND_FACTOR:
            return "shrinking"
        if t > TREND_FACTOR:
            return "growing"
        return "steady"


def error_at_inputs(net: Network, layer: int, cache: Any, output_slope: Array, Y: Array) -> tuple[Array, bool]:
    """Error signal at the units' inputs of ``layer``, ``(n, n_out)``, and whether it is ``dCost/dZ``.

    For a dense layer this is ``dCost/dZ``: the fused output (sigmoid or
    softmax with its cross-entropy) gives it directly, other activations through
    their vector-Jacobian product. A custom layer has no ``Z``: its
    ``dCost/dOut`` is returned and the flag is False.
    """
    lay = net.layers[layer]
    if isinstance(lay, Conv) and isinstance(cache, ConvCache):
        dZ = lay.activation.vjp(cache.Z, cache.A, output_slope.reshape(cache.Z.shape))
        return dZ.reshape(output_slope.shape), True
    if not isinstance(lay, (Dense, ActivationLayer)) or not isinstance(cache, DenseCache):
        return output_slope, False
    fused = net.fused
    if fused is not None and layer == len(net.layers) - 1:
        return fused.grad_z(cache.Z, Y), True
    return lay.activation.vjp(cache.Z, cache.A, output_slope), True


def layer_health(net: Network, theta: Array, X: Array, Y: Array, rate: float) -> HealthReport:
    """Health figures of every layer for parameters ``theta`` ``(n_params,)`` on ``X``, ``Y``."""
    trace = net.forward(theta, X)
    _, grads, output_slopes = net.backward(theta, trace, Y)
    errors = [error_at_inputs(net, i, trace[i][1], output_slopes[i], Y)[0] for i in range(len(net.layers))]
    signals = [float(np.sqrt(np.mean(e**2))) for e in errors]
    out: list[LayerHealth] = []
    for i, lay in enumerate(net.layers):
        blocks = [b for b in net.layout.blocks if b.layer == i and b.kind == "weight"]
        w = np.concatenate([theta[b.start : b.stop] for b in blocks]) if blocks else np.empty(0)
        g = np.concatenate([grads[b.start : b.stop] for b in blocks]) if blocks else np.empty(0)
        w_norm = float(np.linalg.norm(w))
        g_norm = float(np.linalg.norm(g))
        ratio = rate * g_norm / w_norm if w_norm > 0 else float("nan")
        saturation: Array | None = None
        active: Array | None = None
        cache = trace[i][1]
        per = "unit"
        units: tuple[Array, Array, Array] | tuple[None, None, None] = (None, None, None)
        if isinstance(lay, (Dense, Conv)) and isinstance(cache, (DenseCache, ConvCache)):
            act = lay.activation
            fused_output = i == len(net.layers) - 1 and net.fused is not None
            # Dense: (n, units), reduced over samples; convolution: (n, channels, positions),
            # reduced over samples and positions.
            axes = (0,) if isinstance(cache, DenseCache) else (0, 2)
            per = "unit" if isinstance(cache, DenseCache) else "channel"
            if act.saturates and act.derivative is not None and not fused_output:
                saturation = np.mean(act.derivative(cache.Z, cache.A) < SATURATED_BELOW, axis=axes)
            if act.name == "relu":
                active = np.mean(cache.Z > 0.0, axis=axes)
            units = _per_unit(net, theta, grads, i, errors[i])
        elif isinstance(lay, ActivationLayer) and isinstance(cache, DenseCache):
            saturation, active, per = _entry_health(lay, cache, i == len(net.layers) - 1 and net.fused is not None)
        change = signals[i] / signals[i + 1] if i + 1 < len(signals) and signals[i + 1] > 0 else float("nan")
        out.append(LayerHealth(i, lay.label, w_norm, g_norm, ratio, saturation, active, signals[i], change, per,
                               *units))
    travel = signals[0] / signals[-1] if len(signals) > 1 and signals[-1] > 0 else float("nan")
    return HealthReport(float(rate), tuple(out), travel)


def _entry_health(lay: ActivationLayer, cache: DenseCache, fused_output: bool) -> tuple[Array | None, Array | None, str]:
    """Saturated and active shares of an activation layer: per entry of a flat row, per channel of a shaped one.

    No weights, so no per-unit norms: a dead ReLU here is an entry (or channel) that the
    layer before (a norm, a pooling) leaves at or below zero on every sample.
    """
    act = lay.activation
    n = cache.Z.shape[0]
    shaped = len(lay.in_shape) > 1
    Z = cache.Z.reshape(n, lay.in_shape[0], -1) if shaped else cache.Z
    axes = (0, 2) if shaped else (0,)
    saturation = None
    if act.saturates and act.derivative is not None and not fused_output:
        saturation = np.mean(act.derivative(Z, cache.A.reshape(Z.shape)) < SATURATED_BELOW, axis=axes)
    active = np.mean(Z > 0.0, axis=axes) if act.name == "relu" else None
    return saturation, active, "channel" if shaped else "unit"


def _per_unit(net: Network, theta: Array, grads: Array, layer: int,
              error: Array) -> tuple[Array, Array, Array]:
    """Per unit of a dense layer (or channel of a convolution): norms of its incoming weights and of
    their slopes, and the root mean square of its error signal ``error`` ``(n, n_out)``."""
    lay = net.layers[layer]
    block = net.layout.find_block(layer, "K" if isinstance(lay, Conv) else "W")
    w = theta[block.start : block.stop].reshape(block.shape)
    g = grads[block.start : block.stop].reshape(block.shape)
    if isinstance(lay, Conv):
        # K is (out, in, *window): one row per channel.
        weights = np.linalg.norm(w.reshape(lay.channels, -1), axis=1)
        slopes = np.linalg.norm(g.reshape(lay.channels, -1), axis=1)
        signal = np.sqrt(np.mean(error.reshape(error.shape[0], lay.channels, -1) ** 2, axis=(0, 2)))
    else:
        # W is (n_in, n_out): one column per unit.
        weights, slopes = np.linalg.norm(w, axis=0), np.linalg.norm(g, axis=0)
        signal = np.sqrt(np.mean(error**2, axis=0))
    return weights, slopes, signal


@dataclass(frozen=True)
class UnitHealth:
    """The health of one unit of a dense layer, or one channel of a convolution.

    Attributes:
        layer: 0-based layer index; unit: the unit's (or channel's) index.
        per: ``"unit"`` or ``"channel"``.
        positions: window positions per channel (1 for a unit).
        active: share of samples (times positions) where its ReLU passes; None unless ReLU.
        saturated: share where its activation slope is below :data:`SATURATED_BELOW`; None
            unless the activation saturates.
        weights, slopes: norms of its incoming weights and of their slopes.
        update_ratio: ``rate * slopes / weights`` (NaN when the weights are zero).
        signal_rms: root mean square of its error signal at ``Z``.
    """

    layer: int
    unit: int
    per: str
    positions: int
    active: float | None
    saturated: float | None
    weights: float
    slopes: float
    update_ratio: float
    signal_rms: float

    @property
    def dead(self) -> bool:
        return self.active == 0.0

    @property
    def saturated_most(self) -> bool:
        return self.saturated is not None and self.saturated >= MOST


def unit_of(net: Network, index: int) -> tuple[int, int] | None:
    """``(layer, unit)`` whose incoming weight or bias is parameter ``index``: the unit ``j`` of a
    dense ``W[i,j]`` or ``b[j]``, the channel ``o`` of a convolution's ``K[o,...]`` or ``b[o]``;
    None for other parameters."""
    block = net.layout.block_of(index)
    lay = net.layers[block.layer]
    if not isinstance(lay, (Dense, Conv)) or block.key not in ("W", "K", "b"):
        return None
    where = net.layout.indices(index)
    return block.layer, int(where[1] if block.key == "W" else where[0])


def unit_health(report: HealthReport, net: Network, layer: int, unit: int) -> UnitHealth | None:
    """Unit (or channel) ``unit`` of layer ``layer`` from ``report``; None when the layer has no units."""
    e = report.layers[layer]
    if e.unit_weights is None or e.unit_slopes is None or e.unit_signal is None:
        return None
    lay = net.layers[layer]
    positions = lay.grid.positions if isinstance(lay, Conv) else 1
    w, g = float(e.unit_weights[unit]), float(e.unit_slopes[unit])
    return UnitHealth(layer, unit, e.per, positions, None if e.active is None else float(e.active[unit]),
                      None if e.saturation is None else float(e.saturation[unit]), w, g,
                      report.rate * g / w if w > 0 else float("nan"), float(e.unit_signal[unit]))
