"""Writing the current weights for another program: ONNX, or safetensors in a framework's layout.

Safetensors layouts:

- ``torch``: what PyTorch's ``load_state_dict`` takes for the same network.
  Weights that came from a framework's file go back under their own names and
  in their own arrangement (an ``nn.Sequential``'s ``0.weight`` ``(out, in)``,
  or the names declared in ``[init.names]``, transposed as declared); weights
  that came from an ONNX file go under the initializers' names as ``(out,
  in)`` matrices; any other dense stack is numbered as an ``nn.Sequential`` of
  ``Linear`` layers with each non-identity activation taking the next index
  (``0.weight``, ``0.bias``, ``2.weight``, ...).
- ``stepper``: Stepper's own names and arrangement, ``L1.W`` ``(in, out)`` and
  ``L1.b``, which ``[init] layout = "stepper"`` reads back.

The float type is ``float32`` or ``float64``; by default the one the weights
came in (float64 for weights Stepper drew itself). Every tensor is made
C-contiguous before saving (see :mod:`stepper.formats.checkpoint`).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from stepper.core.gemm import ScaledDense
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.errors import UsageError
from stepper.formats.weight_sources import TensorSource, WeightOrigin

Array = NDArray[np.float64]

LAYOUTS = ("torch", "stepper")


def default_dtype(origin: WeightOrigin | None) -> str:
    """The float type weights are written in unless told: the one they came in."""
    return origin.dtype if origin is not None else "float64"


def export_tensors(network: Network, theta: Array, origin: WeightOrigin | None, layout: str) -> dict[str, Array]:
    """The tensors of the weights ``theta`` ``(n_params,)`` in ``layout``, by name, float64."""
    views = network.views(theta)
    out: dict[str, Array] = {}
    for block in network.layout.blocks:
        values = views[block.layer][block.key]
        if layout == "stepper":
            out[block.prefix] = np.ascontiguousarray(values)
            continue
        source = _torch_source(network, origin, block.layer, block.key)
        if source.tensor in out:
            raise UsageError(f"two arrays would be written as tensor {source.tensor!r}")
        out[source.tensor] = source.to_file(values)
    return out


def _torch_source(network: Network, origin: WeightOrigin | None, index: int, key: str) -> TensorSource:
    layer = network.layers[index]
    prefix = f"L{index + 1}.{key}"
    known = origin.tensors.get(prefix) if origin is not None else None
    if known is not None and origin is not None and origin.kind == "safetensors":
        return known  # back as it came: the names and the arrangement of the file read
    if not isinstance(layer, (Dense, ScaledDense)):
        raise UsageError(f"layer L{index + 1} ({layer.label}) has no PyTorch counterpart; use --layout stepper")
    if isinstance(layer, ScaledDense):
        raise UsageError(f"layer L{index + 1} ({layer.label}) scales its product by constants that a PyTorch "
                         "Linear does not have; export to .onnx, or use --layout stepper")
    if known is not None:
        # From ONNX: the initializer's name, in Linear's (out, in) arrangement.
        return TensorSource(known.tensor, (layer.n_out, layer.n_in) if key == "W" else (layer.n_out,),
                            (1, 0) if key == "W" else (0,))
    number = _sequential_index(network, index)
    if key == "W":
        return TensorSource(f"{number}.weight", (layer.n_out, layer.n_in), (1, 0))
    return TensorSource(f"{number}.bias", (layer.n_out,), (0,))


def _sequential_index(network: Network, index: int) -> int:
    """Position of layer ``index`` in an nn.Sequential where each non-identity activation takes a slot."""
    position = 0
    for layer in network.layers[:index]:
        position += 1
        activation = getattr(layer, "activation", None)
        if activation is not None and activation.name != "identity":
            position += 1
    return position


def safetensors_bytes(network: Network, theta: Array, origin: WeightOrigin | None, layout: str, dtype: str) -> bytes:
    """The bytes of a safetensors file of the weights in ``layout`` and float type ``dtype``."""
    from safetensors.numpy import save

    kind = np.float32 if dtype == "float32" else np.float64
    tensors = {name: np.ascontiguousarray(values.astype(kind))
               for name, values in export_tensors(network, theta, origin, layout).items()}
    return bytes(save(tensors, metadata={"written_by": "stepper", "layout": layout}))
