"""Numeric slopes of the cost w.r.t. a layer's input, against the layer's own backward ``dX``.

The parameter check cannot see a wrong input slope ``dX`` directly: it only
shows up as wrong slopes in the layers before. For a layer with a hand-written
backward pass this module compares ``dX`` entry by entry with finite
differences of the cost, on a few samples.

Each entry ``X_l[s, i]`` of the layer's input is moved by ``+-h`` and the
network is run from that layer on. The cost is the mean of per-sample costs
(every loss in :mod:`stepper.core.losses` averages a per-sample cost), so the
difference of the two costs is taken per sample before it is averaged: samples
that the move does not touch then contribute exactly zero, and the rounding
error is that of one sample's cost rather than of the whole sum, which matters
because one entry of one sample moves the total cost only by about ``1/n``.
Layers that couple samples are still handled correctly, only less precisely.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.compare import Thresholds, judge, noise_level, verdict_counts
from stepper.core.layers import Builtin, DenseCache
from stepper.core.network import Network
from stepper.core.numeric import METHODS, default_step

Array = NDArray[np.float64]

#: Samples checked per layer when the caller gives no number.
DEFAULT_SAMPLES = 8


@dataclass(frozen=True)
class InputSlopeCheck:
    """Input slopes of one layer on a few samples; arrays are ``(n_checked, n_in)``.

    Attributes:
        layer: 0-based index of the layer.
        label: the layer's label.
        samples: the checked samples' rows, ``(n_checked,)``.
        analytic: ``dX`` from the layer's backward pass.
        numeric: finite-difference slopes of the cost w.r.t. the layer's input.
        rel_error: relative error (see :mod:`stepper.core.compare`).
        verdict: per entry, as for parameters.
        method, h: finite-difference settings.
    """

    layer: int
    label: str
    samples: NDArray[np.int64]
    analytic: Array
    numeric: Array
    rel_error: Array
    verdict: NDArray[np.str_]
    method: str
    h: float

    @property
    def passed(self) -> bool:
        return not bool(np.any((self.verdict == "disagree") | (self.verdict == "unresolved")))

    @property
    def counts(self) -> dict[str, int]:
        return verdict_counts(self.verdict)

    def worst(self) -> tuple[int, int]:
        """``(sample row, input index)`` of the largest relative error."""
        rel = np.where(np.isnan(self.rel_error), -1.0, self.rel_error)
        k, i = np.unravel_index(int(np.argmax(rel)), rel.shape)
        return int(self.samples[k]), int(i)

    @property
    def worst_error(self) -> float:
        """The largest relative error; NaN when none could be computed (non-finite slopes)."""
        known = self.rel_error[~np.isnan(self.rel_error)]
        if known.size:
            return float(known.max())
        return math.nan if self.rel_error.size else 0.0


def spread_samples(n_samples: int, count: int) -> NDArray[np.int64]:
    """``count`` sample rows spread evenly over ``0..n_samples-1`` (all if fewer)."""
    if count >= n_samples:
        return np.arange(n_samples, dtype=np.int64)
    return np.unique(np.linspace(0, n_samples - 1, count).round().astype(np.int64))


def per_sample_costs(net: Network, A: Array, cache: Any, Y: Array) -> Array:
    """Each sample's own cost ``(n,)`` from the last layer's output ``A`` ``(n, m)``.

    The cost of the whole set is the mean of these, for every loss.
    """
    rows_A = A[:, None, :]
    rows_Y = Y[:, None, :]
    if isinstance(cache, DenseCache) and cache.Z.ndim == 2:
        cache = DenseCache(np.empty(0), cache.Z[:, None, :], rows_A)
    else:
        cache = None
    return np.asarray(net.output_cost(rows_A, cache, rows_Y), dtype=np.float64)


def check_input_slopes(
    net: Network,
    theta: Array,
    X: Array,
    Y: Array,
    layer: int,
    n_samples: int = DEFAULT_SAMPLES,
    method: str = "central",
    h: float | None = None,
    limits: Thresholds = Thresholds(),
) -> InputSlopeCheck:
    """Compare layer ``layer``'s backward ``dX`` with numeric input slopes.

    Args:
        net: the network; theta: parameters ``(n_params,)``.
        X: inputs ``(n, n_inputs)``; Y: targets ``(n, n_outputs)``.
        layer: 0-based index of the layer whose input slopes are checked.
        n_samples: how many samples (spread over the set) to check.
        method: ``central`` or ``forward`` differences; h: the step (default per method).
    """
    if method not in METHODS:
        raise ValueError(method)
    step = default_step(method) if h is None else float(h)
    trace = net.forward(theta, X)
    _, _, output_slopes = net.backward(theta, trace, Y)
    params = net.views(theta)
    lay = net.layers[layer]
    _, dX = lay.backward(params[layer], trace[layer][1], output_slopes[layer])
    X_in = X if layer == 0 else trace[layer - 1][0]
    rows = spread_samples(X_in.shape[0], n_samples)
    n = X_in.shape[0]
    base = per_sample_costs(net, trace[-1][0], trace[-1][1], Y)
    kinked_layers = [i for i in range(layer + 1, len(net.layers))
                     if isinstance(net.layers[i], Builtin) and net.layers[i].has_kinks]  # type: ignore[attr-defined]
    numeric = np.empty((rows.size, lay.n_in))
    kink = np.zeros((rows.size, lay.n_in), dtype=bool)
    work = np.array(X_in, dtype=np.float64, copy=True)
    for k, s in enumerate(rows):
        for i in range(lay.n_in):
            saved = work[s, i]
            plus, kink_p = _moved(net, theta, work, s, i, saved + step, Y, layer, trace, kinked_layers)
            if method == "central":
                minus, kink_m = _moved(net, theta, work, s, i, saved - step, Y, layer, trace, kinked_layers)
                numeric[k, i] = np.sum(plus - minus) / (2.0 * step * n)
                kink[k, i] = kink_p or kink_m
            else:
                numeric[k, i] = np.sum(plus - base) / (step * n)
                kink[k, i] = kink_p
            work[s, i] = saved
    analytic = np.asarray(dX, dtype=np.float64)[rows]
    # Only sample s's cost moves, so the rounding noise is that of its own cost,
    # divided by the n of the average (see compare.noise_level).
    noise = np.array([noise_level(float(base[s]), step) for s in rows])[:, None] / n
    rel, verdict = judge(analytic, numeric, kink, noise, limits)
    return InputSlopeCheck(layer, lay.label, rows, analytic, numeric, rel, verdict, method, step)


def _moved(
    net: Network,
    theta: Array,
    work: Array,
    s: int,
    i: int,
    value: float,
    Y: Array,
    layer: int,
    trace: list[tuple[Array, Any]],
    kinked_layers: list[int],
) -> tuple[Array, bool]:
    """Per-sample costs with ``work[s, i] = value``, and whether a ReLU-like unit crossed its kink."""
    work[s, i] = value
    run = net.forward(theta, work, start=layer)
    crossed = False
    for index in kinked_layers:
        lay = net.layers[index]
        assert isinstance(lay, Builtin)
        crossed = crossed or bool(lay.crossed(trace[index][1], run[index - layer][1], 1)[0])
    A, cache = run[-1]
    return per_sample_costs(net, A, cache, Y), crossed
