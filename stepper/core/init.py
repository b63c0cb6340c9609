"""Initial weights by published schemes.

- ``uniform``: ``U(-r, r)`` for a given ``r`` (``range`` in the model file).
- ``glorot_uniform``: ``U(-s, s)``, ``s = sqrt(6 / (fan_in + fan_out))``;
  ``glorot_normal``: ``N(0, 2 / (fan_in + fan_out))`` (Glorot & Bengio 2010,
  "Understanding the difficulty of training deep feedforward neural networks").
- ``he_normal``: ``N(0, 2 / fan_in)``; ``he_uniform``: ``U(-s, s)``,
  ``s = sqrt(6 / fan_in)`` (He, Zhang, Ren & Sun 2015, "Delving Deep into
  Rectifiers").

Each array says how it starts (:class:`stepper.core.layers.ParamSpec`): weights
with fans (dense weights, convolution kernels, embedding tables) are drawn by the
scheme; a convolution's fans count its receptive field, ``channels x window
cells`` on each side (common practice in frameworks, as Glorot & Bengio's rule
is applied to convolutions). Arrays with a constant start take it (a norm's
scale starts at 1). Biases and shifts start at zero (common practice). Arrays
are drawn in order from one ``numpy.random.default_rng(seed)``, so a seed fixes
every value.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import is_builtin
from stepper.core.network import Network

Array = NDArray[np.float64]

SCHEMES = ("uniform", "glorot_uniform", "glorot_normal", "he_normal", "he_uniform")


def initial_params(net: Network, scheme: str, seed: int, spread: float = 0.5) -> Array:
    """A fresh parameter vector ``(n_params,)`` for ``net``.

    Arrays with fans are drawn by the scheme, arrays with a fill take it, the
    rest are zero. Custom layers set their own values afterwards; their 2-D
    weight arrays are drawn all the same, as they always were, so that the
    draws of the layers after them stay the same.
    """
    if scheme not in SCHEMES:
        raise KeyError(scheme)
    rng = np.random.default_rng(seed)
    theta = np.zeros(net.n_params)
    fill_constants(net, theta)
    for block in net.layout.blocks:
        fans = block.fans
        if fans is None and block.kind == "weight" and len(block.shape) == 2 and not is_builtin(
                net.layers[block.layer]):
            fans = (block.shape[0], block.shape[1])
        if fans is None:
            continue
        fan_in, fan_out = fans
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


def fill_constants(net: Network, theta: Array) -> None:
    """Set the arrays that start at a constant (a norm's scale at 1) in ``theta`` ``(n_params,)``, in place."""
    for block in net.layout.blocks:
        if block.fill is not None:
            theta[block.start : block.stop] = block.fill
