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

One channel at a time. A convolution's kernel entry (or a norm's scale or
shift) moves one channel of that layer's output. Where every layer between it
and the next dense layer treats each channel on its own (pooling, batch norm,
dropout, flatten: :meth:`stepper.core.layers.Builtin.channel_width`), each copy
carries only its moved channel ``(k, n, width)`` up to that dense layer, which
receives the change of those ``width`` inputs: ``Z = Z_0 + (A - A_0) @
W[rows of the channel]``, one batched matrix product. The layers from there on
run stacked as above.

Dense networks have a faster path of their own in :mod:`stepper.core.numeric`
(a rank-one update of the next layer); this module serves every other case.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import Builtin, Dense, DenseCache, Params
from stepper.core.network import Network

Array = NDArray[np.float64]

#: Bytes the stacked arrays of one chunk may take (the same working-set bound as numeric.CHUNK_BYTES).
CHUNK_BYTES = 4 * 1024 * 1024
#: Arrays of a stack's size alive at once in a layer (its input, output and temporaries).
LIVE = 3


def chunk_size(net: Network, layer: int, n_samples: int) -> int:
    """Copies per chunk so that one chunk's stacked arrays fit in :data:`CHUNK_BYTES`."""
    widest = 1
    target = channel_route(net, layer)
    if target is not None:
        # One channel per copy up to dense layer `target`, whose output is the first full-width array.
        first = net.layers[layer]
        widest = max(first.n_out // first.out_shape[0], net.layers[target].n_out)  # type: ignore[attr-defined]
        layer = target + 1
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
    target = channel_route(net, layer)
    moved = None if target is None else first.moved_channels(params[layer], inputs[layer], trace[layer][1], key,
                                                             local, delta)
    cache: Any = None
    if moved is None or target is None:
        A, kinked = first.perturbed(params[layer], inputs[layer], trace[layer][1], key, local, delta)
        start = layer + 1
    else:
        A, cache, kinked = _channels_to_dense(net, params, trace, layer, target, *moved)
        start = target + 1
    for index in range(start, len(net.layers)):
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


def channel_route(net: Network, layer: int) -> int | None:
    """The index of the dense layer a moved channel of layer ``layer`` reaches channel by channel, or None.

    Every layer in between must keep channels apart (:meth:`Builtin.channel_width`).
    """
    first = net.layers[layer]
    if not isinstance(first, Builtin) or len(first.out_shape) < 2:
        return None
    width = first.n_out // first.out_shape[0]
    for index in range(layer + 1, len(net.layers)):
        lay = net.layers[index]
        if isinstance(lay, Dense):
            return index
        following = lay.channel_width(width) if isinstance(lay, Builtin) else None
        if following is None:
            return None
        width = following
    return None


def _channels_to_dense(
    net: Network, params: list[Params], trace: list[tuple[Array, Any]], layer: int, target: int,
    channels: NDArray[np.int64], A: Array, kinked: NDArray[np.bool_],
) -> tuple[Array, DenseCache, NDArray[np.bool_]]:
    """From one moved channel per copy (``A`` ``(k, n, width)``) to the output of dense layer ``target``.

    Returns that output ``(k, n, units)``, its cache and the kinks crossed on the way.
    """
    for index in range(layer + 1, target):
        lay = net.layers[index]
        assert isinstance(lay, Builtin)
        A, crossed = lay.channel_forward(params[index], A, channels, trace[index][1])
        kinked = kinked | crossed
    dense = net.layers[target]
    assert isinstance(dense, Dense)
    k, n, width = A.shape
    before = trace[target - 1][0].reshape(n, -1, width)[:, channels].swapaxes(0, 1)  # (k, n, width)
    W = params[target]["W"].reshape(-1, width, dense.n_out)[channels]  # (k, width, units)
    base: DenseCache = trace[target][1]
    Z = np.matmul(A - before, W)
    Z += base.Z
    if dense.activation.kink:
        kinked = kinked | np.any((Z > 0.0) != (base.Z > 0.0), axis=(1, 2))
    out = Z if target == len(net.layers) - 1 and net.fused is not None else dense.activation.fn(Z)
    return out, DenseCache(_NOTHING, Z, out), kinked


_NOTHING = np.empty(0)
