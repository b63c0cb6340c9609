"""Why one weight's slope is what it is: its factors, sample by sample.

For the weight ``W[i, j]`` of a dense layer, carrying unit ``i`` of the layer
before (or input column ``i``) to unit ``j``, backpropagation gives

    dC/dW[i, j] = sum over samples s of  e[s] * f[s] * a[s]

where ``e[s] = dC/dA[s, j]`` is the error signal arriving at unit ``j`` (the
slope of the cost w.r.t. the unit's output; the cost averages over samples,
so this already carries the ``1/n``), ``f[s] = act'(Z[s, j])`` is the slope of
the unit's activation at its input, and ``a[s]`` is the activation of unit
``i`` (the input value for the first layer). For a bias ``b[j]``, ``a[s] = 1``.

Units whose activation does not act elementwise are broken down at ``Z``
instead: ``e[s] = dC/dZ[s, j]`` and ``f[s] = 1``. That is the case of the
output layer when its activation is fused with its loss (sigmoid with binary
cross-entropy, softmax with categorical cross-entropy: the cost is computed
from ``Z``), and of softmax anywhere (its units are coupled).

The flags name the usual causes of a vanishing slope (saturated unit, dead
ReLU, input near zero, error signal shrunk on the way back, samples pulling
both ways) and of an exploding one (large inputs, error signal grown).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.health import MOST, SATURATED_BELOW, error_at_inputs
from stepper.core.layers import Builtin, Dense, DenseCache
from stepper.core.network import Network

Array = NDArray[np.float64]

#: An input with ``|a|`` below this is "near zero" (common practice, no published source).
NEAR_ZERO = 1e-3
#: An input averaging ``|a|`` above this is large; inputs of order one are advised
#: (LeCun, Bottou, Orr & Mueller, "Efficient BackProp", 1998, section 4.3 on
#: normalizing the inputs; recalled from memory). The level itself is common practice.
LARGE_INPUT = 100.0
#: Error signal at a hidden unit over the output layer's, below / above which it
#: has vanished / exploded on the way back (common practice, no published source).
VANISHED_BELOW = 1e-3
EXPLODED_ABOVE = 1e3
#: The per-sample parts cancel when ``|sum| < CANCEL * sum |part|`` (common practice).
CANCEL = 0.01


@dataclass(frozen=True)
class Flag:
    """One reason a slope may be small or large.

    Attributes:
        code: ``saturated``, ``dead``, ``input_near_zero``, ``input_large``,
            ``signal_vanished``, ``signal_exploded`` or ``cancelling``.
        text: one sentence for people.
    """

    code: str
    text: str


@dataclass(frozen=True)
class Breakdown:
    """The factors of one dense-layer parameter's slope.

    Attributes:
        index: flat index of the parameter.
        layer: 0-based layer index.
        kind: ``weight`` or ``bias``.
        source: for a weight, the unit ``i`` (or input column) it carries from; None for a bias.
        unit: the unit ``j`` it feeds.
        activation: the unit's activation name.
        through_z: True when ``error`` is ``dC/dZ`` and ``act_slope`` is all ones
            (fused output, or softmax); see the module docstring.
        error: error signal at the unit per sample, ``(n_samples,)``.
        act_slope: activation slope per sample, ``(n_samples,)``.
        inputs: input factor per sample, ``(n_samples,)`` (ones for a bias).
        products: ``error * act_slope * inputs``, ``(n_samples,)``.
        analytic: the slope of this parameter from the network's backward pass.
        sample: the sample shown on its own.
        flags: possible causes of a vanishing or exploding slope.
        penalty: the L2 term's part of the slope, ``l2 * w`` (0 for a bias or without the term);
            it belongs to no sample.
    """

    index: int
    layer: int
    kind: str
    source: int | None
    unit: int
    activation: str
    through_z: bool
    error: Array
    act_slope: Array
    inputs: Array
    products: Array
    analytic: float
    sample: int
    flags: tuple[Flag, ...]
    penalty: float = 0.0

    @property
    def n_samples(self) -> int:
        return int(self.products.size)

    @property
    def total(self) -> float:
        """Sum of the per-sample products and the L2 term's part: the slope, rebuilt from its factors."""
        return float(np.sum(self.products)) + self.penalty

    def means(self) -> tuple[float, float, float, float]:
        """Mean over samples of the error signal, activation slope, input and product."""
        return (float(np.mean(self.error)), float(np.mean(self.act_slope)),
                float(np.mean(self.inputs)), float(np.mean(self.products)))

    def at(self, sample: int) -> tuple[float, float, float, float]:
        """Error signal, activation slope, input and product for one sample."""
        return (float(self.error[sample]), float(self.act_slope[sample]),
                float(self.inputs[sample]), float(self.products[sample]))


def slope_breakdown(
    net: Network, theta: Array, X: Array, Y: Array, index: int, sample: int | None = None
) -> Breakdown:
    """Break down the slope of parameter ``index`` of a dense layer.

    Args:
        net: the network; theta: parameters ``(n_params,)``.
        X: inputs ``(n_samples, n_inputs)``; Y: targets ``(n_samples, n_outputs)``.
        index: flat index of a dense layer's weight or bias.
        sample: the sample to show on its own; default the one with the largest ``|product|``.

    Raises:
        ValueError: the parameter belongs to a layer other than a dense one (a
            custom layer, a convolution, a norm, an embedding); the message says why.
        IndexError: ``index`` or ``sample`` is out of range.
    """
    if not 0 <= index < net.n_params:
        raise IndexError(index)
    block = net.layout.block_of(index)
    lay = net.layers[block.layer]
    if isinstance(lay, Builtin) and not isinstance(lay, Dense):
        raise ValueError(f"{net.layout.names[index]} belongs to layer {block.layer + 1} ({lay.label}): "
                         f"{lay.why_no_breakdown()}")
    if not isinstance(lay, Dense):
        raise ValueError(f"{net.layout.names[index]} belongs to a custom layer ({lay.label}), "
                         "which has no units to break its slope down by")
    trace = net.forward(theta, X)
    _, grads, output_slopes = net.backward(theta, trace, Y)
    cache: DenseCache = trace[block.layer][1]
    local = index - block.start
    if block.key == "W":
        source: int | None
        source, unit = divmod(local, lay.n_out)
        inputs = cache.X[:, source].astype(np.float64, copy=True)
    else:
        source, unit = None, local
        inputs = np.ones(cache.X.shape[0])
    act = lay.activation
    last = block.layer == len(net.layers) - 1
    through_z = not act.elementwise or (last and net.fused is not None)
    if through_z:
        dZ, _ = error_at_inputs(net, block.layer, cache, output_slopes[block.layer], Y)
        error = dZ[:, unit].copy()
        act_slope = np.ones_like(error)
    else:
        assert act.derivative is not None
        error = output_slopes[block.layer][:, unit].copy()
        act_slope = act.derivative(cache.Z[:, unit], cache.A[:, unit])
    products = error * act_slope * inputs
    n = products.size
    if sample is None:
        sample = int(np.argmax(np.abs(products)))
    elif not 0 <= sample < n:
        raise IndexError(sample)

    out_dZ, _ = error_at_inputs(net, len(net.layers) - 1, trace[-1][1], output_slopes[-1], Y)
    out_rms = float(np.sqrt(np.mean(out_dZ**2)))
    flags = _flags(block.layer, block.kind, source, unit, act.name, act.saturates and not through_z,
                   cache, error, act_slope, inputs, products, out_rms, last)
    return Breakdown(index, block.layer, block.kind, source, unit, act.name, through_z, error,
                     act_slope, inputs, products, float(grads[index]), sample, flags,
                     net.l2 * float(theta[index]) if net.penalized[index] else 0.0)


def _flags(
    layer: int,
    kind: str,
    source: int | None,
    unit: int,
    act_name: str,
    can_saturate: bool,
    cache: DenseCache,
    error: Array,
    act_slope: Array,
    inputs: Array,
    products: Array,
    out_rms: float,
    last: bool,
) -> tuple[Flag, ...]:
    flags: list[Flag] = []
    where = f"unit {unit} of layer {layer + 1}"
    if can_saturate:
        frac = float(np.mean(act_slope < SATURATED_BELOW))
        if frac >= MOST:
            flags.append(Flag("saturated", f"{where} is saturated on {frac:.0%} of the samples "
                                           f"(its {act_name} slope is below {SATURATED_BELOW:g})"))
    if act_name == "relu" and not np.any(cache.Z[:, unit] > 0.0):
        flags.append(Flag("dead", f"{where} is a dead ReLU: its input is not positive on any sample, "
                                  "so its activation slope is 0 everywhere"))
    if kind == "weight" and source is not None:
        origin = f"input column {source}" if layer == 0 else f"unit {source} of layer {layer}"
        size = np.abs(inputs)
        near = float(np.mean(size < NEAR_ZERO))
        if near >= MOST:
            flags.append(Flag("input_near_zero", f"the input factor ({origin}) is near zero "
                                                 f"(|a| < {NEAR_ZERO:g}) on {near:.0%} of the samples"))
        mean_size = float(np.mean(size))
        if mean_size > LARGE_INPUT:
            flags.append(Flag("input_large", f"the input factor ({origin}) averages |a| = {mean_size:.3g}: "
                                             "inputs far from order one make slopes large and uneven "
                                             "(standardize the inputs)"))
    if not last and out_rms > 0:
        ratio = float(np.sqrt(np.mean(error**2))) / out_rms
        if ratio < VANISHED_BELOW:
            flags.append(Flag("signal_vanished", f"the error signal reaching {where} is {ratio:.2g} times "
                                                 "the output layer's: it shrank on the way back"))
        elif ratio > EXPLODED_ABOVE:
            flags.append(Flag("signal_exploded", f"the error signal reaching {where} is {ratio:.2g} times "
                                                 "the output layer's: it grew on the way back"))
    spread = float(np.sum(np.abs(products)))
    total = float(np.sum(products))
    if spread > 0 and abs(total) < CANCEL * spread:
        flags.append(Flag("cancelling", f"the samples pull this weight both ways: the slope is "
                                        f"{abs(total) / spread:.2%} of the summed sizes of its per-sample parts"))
    return tuple(flags)
