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

from stepper.core.layers import Conv, ConvCache, Dense, DenseCache
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
    if not isinstance(lay, Dense) or not isinstance(cache, DenseCache):
        return output_slope, False
    fused = net.fused
    if fused is not None and layer == len(net.layers) - 1:
        return fused.grad_z(cache.Z, Y), True
    return lay.activation.vjp(cache.Z, cache.A, output_slope), True


def layer_health(net: Network, theta: Array, X: Array, Y: Array, rate: float) -> HealthReport:
    """Health figures of every layer for parameters ``theta`` ``(n_params,)`` on ``X``, ``Y``."""
    trace = net.forward(theta, X)
    _, grads, output_slopes = net.backward(theta, trace, Y)
    signals = [
        float(np.sqrt(np.mean(error_at_inputs(net, i, trace[i][1], output_slopes[i], Y)[0] ** 2)))
        for i in range(len(net.layers))
    ]
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
        change = signals[i] / signals[i + 1] if i + 1 < len(signals) and signals[i + 1] > 0 else float("nan")
        out.append(LayerHealth(i, lay.label, w_norm, g_norm, ratio, saturation, active, signals[i], change, per))
    travel = signals[0] / signals[-1] if len(signals) > 1 and signals[-1] > 0 else float("nan")
    return HealthReport(float(rate), tuple(out), travel)
