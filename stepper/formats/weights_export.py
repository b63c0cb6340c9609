"""Writing the current weights for another program: ONNX, or safetensors in a framework's layout.

Safetensors layouts:

- ``torch``: what PyTorch's ``load_state_dict`` takes for the same network.
  Weights that came from a framework's file go back under their own names and
  in their own arrangement (an ``nn.Sequential``'s ``0.weight`` ``(out, in)``,
  or the names declared in ``[init.names]``, transposed as declared); weights
  that came from an ONNX file go under the initializers' names as ``(out,
  in)`` matrices; any other network is numbered as an ``nn.Sequential`` with
  each non-identity activation taking the next index (``0.weight``,
  ``0.bias``, ``2.weight``, ...). The other built-in layers go as PyTorch's
  modules of the same meaning hold them: a convolution's kernel is ``weight``
  ``(out, in, kh, kw)`` as it is (``Conv1d``, ``Conv2d``), a norm's ``scale``
  and ``shift`` are ``weight`` and ``bias`` (``LayerNorm``, ``BatchNorm``, which
  also gets its ``running_mean`` and ``running_var``, and ``num_batches_tracked``
  as the step count), an embedding's table is ``weight`` ``(categories, size)``;
  pooling, flatten, dropout and activation layers take their index and hold nothing. Weights from
  an ONNX file keep the initializers' names (PyTorch's, when PyTorch wrote it).
- ``stepper``: Stepper's own names and arrangement, ``L1.W`` ``(in, out)`` and
  ``L1.b``, which ``[init] layout = "stepper"`` reads back.

The float type is ``float32`` or ``float64``; by default the one the weights
came in (float64 for weights Stepper drew itself). Every tensor is made
C-contiguous before saving (see :mod:`stepper.formats.checkpoint`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.gemm import ScaledDense
from stepper.core.layers import ActivationLayer, BatchNorm, Conv, Dense, Embedding, LayerNorm
from stepper.core.network import Network
from stepper.errors import UsageError
from stepper.formats.weight_sources import TensorSource, WeightOrigin

Array = NDArray[np.float64]

LAYOUTS = ("torch", "stepper")


def default_dtype(origin: WeightOrigin | None) -> str:
    """The float type weights are written in unless told: the one they came in."""
    return origin.dtype if origin is not None else "float64"


def export_tensors(network: Network, theta: Array, origin: WeightOrigin | None, layout: str,
                   state: Array | None = None, step: int = 0) -> dict[str, NDArray[Any]]:
    """The tensors of the weights ``theta`` ``(n_params,)`` in ``layout``, by name, float64.

    ``state`` ``(n_state,)``: the layers' kept arrays (batch norm's running
    statistics), written in the torch layout; by default the network's starting
    ones. ``step``: the update count, PyTorch's ``num_batches_tracked``.
    """
    views = network.views(theta)
    out: dict[str, NDArray[Any]] = {}
    for block in network.layout.blocks:
        values = views[block.layer][block.key]
        if layout == "stepper":
            out[block.prefix] = np.ascontiguousarray(values)
            continue
        _put(out, _torch_source(network, origin, block.layer, block.key), values)
    if layout == "torch" and network.has_state:
        kept = network.state_views(network.initial_state() if state is None else state)
        for block in network.state_layout.blocks:
            source = _torch_source(network, origin, block.layer, block.key)
            _put(out, source, kept[block.layer][block.key])
            if block.key == "running_var":
                counter = source.tensor.removesuffix("running_var") + "num_batches_tracked"
                out.setdefault(counter, np.array(step, dtype=np.int64))
    return out


def _put(out: dict[str, NDArray[Any]], source: TensorSource, values: Array) -> None:
    if source.tensor in out:
        raise UsageError(f"two arrays would be written as tensor {source.tensor!r}")
    out[source.tensor] = source.to_file(values)


#: Stepper's array key -> the name PyTorch's module gives it.
TORCH_NAMES = {"W": "weight", "K": "weight", "E": "weight", "scale": "weight", "b": "bias", "shift": "bias",
               "running_mean": "running_mean", "running_var": "running_var"}


def _torch_source(network: Network, origin: WeightOrigin | None, index: int, key: str) -> TensorSource:
    layer = network.layers[index]
    prefix = f"L{index + 1}.{key}"
    known = None
    if origin is not None:
        known = origin.tensors.get(prefix) or origin.state_tensors.get(prefix)
    if known is not None and origin is not None and origin.kind == "safetensors":
        return known  # back as it came: the names and the arrangement of the file read
    if isinstance(layer, ScaledDense):
        raise UsageError(f"layer L{index + 1} ({layer.label}) scales its product by constants that a PyTorch "
                         "Linear does not have; export to .onnx, or use --layout stepper")
    if not isinstance(layer, (Dense, Conv, BatchNorm, LayerNorm, Embedding)):
        raise UsageError(f"layer L{index + 1} ({layer.label}) has no PyTorch counterpart; use --layout stepper")
    shape: tuple[int, ...]
    perm: tuple[int, ...]
    if isinstance(layer, Dense):
        shape, perm = ((layer.n_out, layer.n_in), (1, 0)) if key == "W" else ((layer.n_out,), (0,))
    else:  # PyTorch holds these arrays as Stepper does
        shape = _shape(network, index, key)
        perm = tuple(range(len(shape)))
    # From ONNX: the initializer's name; otherwise an nn.Sequential's numbering.
    name = known.tensor if known is not None else f"{_sequential_index(network, index)}.{TORCH_NAMES[key]}"
    return TensorSource(name, shape, perm)


def _shape(network: Network, index: int, key: str) -> tuple[int, ...]:
    for layout in (network.layout, network.state_layout):
        for block in layout.blocks:
            if block.layer == index and block.key == key:
                return block.shape
    raise KeyError(key)


def _sequential_index(network: Network, index: int) -> int:
    """Position of layer ``index`` in an nn.Sequential where each non-identity activation takes a slot."""
    position = 0
    for layer in network.layers[:index]:
        position += 1
        activation = getattr(layer, "activation", None)
        # An activation layer is its own module (nn.ReLU); others' activations take the next index.
        if activation is not None and activation.name != "identity" and not isinstance(layer, ActivationLayer):
            position += 1
    return position


def safetensors_bytes(network: Network, theta: Array, origin: WeightOrigin | None, layout: str, dtype: str,
                      state: Array | None = None, step: int = 0) -> bytes:
    """The bytes of a safetensors file of the weights in ``layout`` and float type ``dtype`` (see
    :func:`export_tensors` for ``state`` and ``step``)."""
    from safetensors.numpy import save

    kind = np.float32 if dtype == "float32" else np.float64
    tensors = {name: np.ascontiguousarray(values if values.dtype == np.int64 else values.astype(kind))
               for name, values in export_tensors(network, theta, origin, layout, state, step).items()}
    return bytes(save(tensors, metadata={"written_by": "stepper", "layout": layout}))
