"""How the numbers of each layer are spread: histograms of weights, slopes, last updates and activations.

Per layer, four sets of numbers:

- ``weights``: the layer's weight arrays (``kind == "weight"``; biases are left
  out, as in the layer health figures: they start at zero and say little about
  the spread);
- ``slopes``: the slopes of those weights;
- ``updates``: the change the last step made to them (none counted when there
  is no last step to speak of);
- ``activations``: the layer's outputs over the rows given, ``n_samples x n_out``
  numbers.

Each set is counted into equal-width bins from its own smallest to its largest
finite value, with the edge rules of ``numpy.histogram`` (every bin half-open
but the last, which holds its right edge; a set of one value gets the range
value +- 0.5). Values that are not finite are counted apart, not binned.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network

Array = NDArray[np.float64]

QUANTITIES = ("weights", "slopes", "updates", "activations")
DEFAULT_BINS = 20


@dataclass(frozen=True)
class Histogram:
    """Counts of one set of numbers.

    Attributes:
        counts: values per bin, ``(n_bins,)``.
        edges: bin edges, ``(n_bins + 1,)``.
        nonfinite: values that are NaN or infinite (not in any bin).
        mean, std: of the finite values (NaN when there are none).
        zeros: values exactly 0.
    """

    counts: NDArray[np.int64]
    edges: Array
    nonfinite: int
    mean: float
    std: float
    zeros: int

    @property
    def n(self) -> int:
        """Finite values counted."""
        return int(self.counts.sum())


def histogram(values: Array, bins: int = DEFAULT_BINS) -> Histogram:
    """Equal-width histogram of ``values`` (any shape) over their finite range; see the module docstring."""
    flat = np.asarray(values, dtype=np.float64).ravel()
    finite = flat[np.isfinite(flat)]
    nonfinite = int(flat.size - finite.size)
    if finite.size == 0:
        return Histogram(np.zeros(bins, dtype=np.int64), np.linspace(0.0, 1.0, bins + 1), nonfinite,
                         float("nan"), float("nan"), 0)
    counts, edges = np.histogram(finite, bins=bins)
    return Histogram(counts.astype(np.int64), edges, nonfinite, float(finite.mean()), float(finite.std()),
                     int(np.count_nonzero(finite == 0.0)))


@dataclass(frozen=True)
class LayerSpread:
    """The four histograms of one layer.

    Attributes:
        index: 0-based layer index.
        label: the layer's label, e.g. ``dense 4->6 tanh``.
        hists: one :class:`Histogram` per name in :data:`QUANTITIES`.
    """

    index: int
    label: str
    hists: dict[str, Histogram]


def weight_entries(net: Network, layer: int) -> NDArray[np.int64]:
    """Flat indices of the weights (not biases) of ``layer`` (0-based)."""
    parts = [np.arange(b.start, b.stop) for b in net.layout.blocks if b.layer == layer and b.kind == "weight"]
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)


def layer_spreads(
    net: Network, theta: Array, slopes: Array, update: Array | None, X: Array, bins: int = DEFAULT_BINS
) -> list[LayerSpread]:
    """Histograms of every layer.

    Args:
        net: the network; theta: parameters ``(n_params,)``.
        slopes: slopes of the cost ``(n_params,)``.
        update: the last step's change ``(n_params,)``, or None when there is none.
        X: rows whose activations to count, ``(n_samples, n_inputs)``.
        bins: bins per histogram.
    """
    outputs = [out for out, _ in net.forward(theta, X)] if X.shape[0] else [np.empty(0)] * len(net.layers)
    spreads: list[LayerSpread] = []
    for i, layer in enumerate(net.layers):
        idx = weight_entries(net, i)
        hists = {
            "weights": histogram(theta[idx], bins),
            "slopes": histogram(slopes[idx], bins),
            "updates": histogram(np.empty(0) if update is None else update[idx], bins),
            "activations": histogram(outputs[i], bins),
        }
        spreads.append(LayerSpread(i, layer.label, hists))
    return spreads
