"""Initial weights by published schemes.

- ``uniform``: ``U(-r, r)`` for a given ``r`` (``range`` in the model file).
- ``glorot_uniform``: ``U(-s, s)``, ``s = sqrt(6 / (fan_in + fan_out))``;
  ``glorot_normal``: ``N(0, 2 / (fan_in + fan_out))`` (Glorot & Bengio 2010,
  "Understanding the difficulty of training deep feedforward neural networks").
- ``he_normal``: ``N(0, 2 / fan_in)``; ``he_uniform``: ``U(-s, s)``,
  ``s = sqrt(6 / fan_in)`` (He, Zhang, Ren & Sun 2015, "Delving Deep into
  Rectifiers").

Biases start at zero (common practice). Layers are drawn in order from one
``numpy.random.default_rng(seed)``, so a seed fixes every value.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network

Array = NDArray[np.float64]

SCHEMES = ("uniform", "glorot_uniform", "glorot_normal", "he_normal", "he_uniform")


def initial_params(net: Network, scheme: str, seed: int, spread: float = 0.5) -> Array:
    """A fresh parameter vector ``(n_params,)`` for ``net``.

    Only dense weights (``kind == "weight"`` of 2-D arrays) are drawn by the
    scheme; biases are zero. Custom layers set their own values afterwards.
    """
    if scheme not in SCHEMES:
        raise KeyError(scheme)
    rng = np.random.default_rng(seed)
    theta = np.zeros(net.n_params)
    for block in net.layout.blocks:
        if block.kind != "weight" or len(block.shape) != 2:
            continue
        fan_in, fan_out = block.shape
        size = block.shape
        if scheme == "uniform":
            values = rng.uniform(-spread, spread, size)
        elif scheme == "glorot_uniform":
            s = np.sqrt(6.0 / (fan_in + fan_out))
            values = rng.uniform(-s, s, size)
        elif scheme == "glorot_normal":
            values = rng.normal(0.0, np.sqrt(2.0 / (fan_in + fan_out)), size)
        elif scheme == "he_normal":
            values = rng.normal(0.0, np.sqrt(2.0 / fan_in), size)
        else:
            s = np.sqrt(6.0 / fan_in)
            values = rng.uniform(-s, s, size)
        theta[block.start : block.stop] = values.ravel()
    return theta
