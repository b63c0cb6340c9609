"""Costs of many perturbed copies of a network at once, for any built-in layer.

Moving one parameter of layer ``l`` changes nothing before ``l``: the layers
before it are never run again (their outputs come from the unperturbed forward
pass, the ``trace``). Layer ``l`` makes the outputs of every copy at once
(:meth:`stepper.core.layers.Builtin.perturbed`: one output channel changes for a
convolution's kernel entry, one unit for a dense weight), stacked on a leading
axis ``(k, n, n_out)``; every later built-in layer runs once on the whole stack.
A custom layer after ``l`` runs once per copy (a user's layer is only promised
``(n, n_in)`` inputs).

Kinks. Each later layer compares its stacked run with the unperturbed one
(:meth:`stepper.core.layers.Builtin.crossed`): a ReLU-like unit that changed
side, or a max-pool window whose largest entry changed, marks that copy's
finite difference as straddling a corner.

Dense networks have a faster path of their own in :mod:`stepper.core.numeric`
(a rank-one update of the next layer); this module serves every other case.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import Builtin, Params
from stepper.core.network import Network

Array = NDArray[np.float64]

#: Bytes the stacked arrays of one chunk may take (the same working-set bound as numeric.CHUNK_BYTES).
CHUNK_BYTES = 4 * 1024 * 1024
#: Arrays of a stack's size alive at once in a layer (its input, output and temporaries).
LIVE = 3


def chunk_size(net: Network, layer: int, n_samples: int) -> int:
    """Copies per chunk so that one chunk's stacked arrays fit in :data:`CHUNK_BYTES`."""
    widest = 1
    for lay in net.layers[layer:]:
        widest = max(widest, lay.scratch() if isinstance(lay, Builtin) else max(lay.n_in, lay.n_out))
    per_copy = 8 * n_samples * widest * LIVE
    return int(max(1, min(4096, CHUNK_BYTES // per_copy)))


def stacked_costs(
    net: Network,
    params: list[Params],
    trace: list[tuple[Array, Any]],
    inputs: list[Array],
    layer: int,
    key: str,
    local: NDArray[np.int64],
    delta: Array,
    Y: Array,
) -> tuple[Array, NDArray[np.bool_]]:
    """Costs ``(k,)`` with entry ``local[j]`` of array ``key`` of layer ``layer`` moved by ``delta[j]``.

    Args:
        net: the network; params: its per-layer views of ``theta``.
        trace: the unperturbed forward pass (output and cache per layer).
        inputs: the input of every layer in that pass, ``inputs[i]`` ``(n, n_in)``.
        layer: 0-based index of a built-in layer.
        key, local, delta: which entries move, ``(k,)`` each, and by how much.
        Y: targets ``(n, n_outputs)``.

    Also returns, per copy, whether the move crossed a kink of some layer.
    """
    first = net.layers[layer]
    assert isinstance(first, Builtin)
    k = local.size
    A, kinked = first.perturbed(params[layer], inputs[layer], trace[layer][1], key, local, delta)
    cache: Any = None
    for index in range(layer + 1, len(net.layers)):
        lay = net.layers[index]
        if isinstance(lay, Builtin):
            A, cache = lay.forward(params[index], A)
            if lay.has_kinks:
                kinked |= lay.crossed(trace[index][1], cache, k)
        else:
            A = np.stack([lay.forward(params[index], A[i])[0] for i in range(k)])
            cache = None
    if layer == len(net.layers) - 1:
        # The output layer itself moved: a fused loss would need its Z, which only dense layers
        # have, and those take the dense path.
        assert net.fused is None
    return np.asarray(net.output_cost(A, cache, Y), dtype=np.float64), kinked
