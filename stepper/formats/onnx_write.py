"""Writing a network and its current weights as an ONNX file.

A network that came from an ONNX file goes back as that same graph: every
node, name, attribute and input arrangement is kept, and only the
initializers Stepper read are replaced by the current weights, in the file's
own arrangement (Gemm's ``B`` stays ``(out, in)`` under ``transB = 1``). With
another float type than the file's, every float tensor type of the graph
changes with it.

Any other network is written as a new chain (:mod:`stepper.formats.onnx_build`):
per dense layer a Gemm (``transB = 1`` with ``(out, in)`` weights when the
weights came from a framework's file, under its tensor names; Stepper's own
``L1.W`` ``(in, out)`` otherwise) and its activation, and the operator of the
same meaning for every other built-in layer. A custom layer has no ONNX
operator and is refused. The graph uses opset 17 and IR version 8, which
onnxruntime 1.14 and later run.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network
from stepper.formats.weight_sources import WeightOrigin

Array = NDArray[np.float64]

OPSET = 17
IR_VERSION = 8
#: Activation name -> ONNX operator (identity needs no node).
OPERATORS = {"relu": "Relu", "tanh": "Tanh", "sigmoid": "Sigmoid", "softplus": "Softplus", "softmax": "Softmax"}


def onnx_bytes(network: Network, theta: Array, origin: WeightOrigin | None, dtype: str, name: str,
               state: Array | None = None) -> bytes:
    """The ONNX file of ``network`` at weights ``theta`` ``(n_params,)``, with float type ``dtype``.

    ``state`` ``(n_state,)``: the arrays layers keep (batch norm's running
    statistics, written as its ``input_mean`` and ``input_var``); by default the
    network's starting ones.
    """
    kept = network.initial_state() if state is None else state
    if origin is not None and origin.kind == "onnx" and origin.graph is not None:
        return _patched(network, theta, kept, origin, dtype)
    from stepper.formats.onnx_build import built_graph

    return built_graph(network, theta, kept, origin, dtype, name)


def np_dtype(dtype: str) -> type:
    """The numpy float type named ``dtype``."""
    return np.float32 if dtype == "float32" else np.float64


def _patched(network: Network, theta: Array, state: Array, origin: WeightOrigin, dtype: str) -> bytes:
    import onnx
    from onnx import numpy_helper

    assert origin.graph is not None
    model = onnx.ModelProto()
    model.ParseFromString(origin.graph)
    arrays: dict[str, Array] = {}
    for layout, flat, sources in ((network.layout, theta, origin.tensors),
                                  (network.state_layout, state, origin.state_tensors)):
        for block in layout.blocks:
            source = sources[block.prefix]
            arrays[source.tensor] = source.to_file(flat[block.start : block.stop].reshape(block.shape))
    code = onnx.TensorProto.FLOAT if dtype == "float32" else onnx.TensorProto.DOUBLE
    floats = (onnx.TensorProto.FLOAT, onnx.TensorProto.DOUBLE)
    for index, tensor in enumerate(model.graph.initializer):
        if tensor.name in arrays:
            values: NDArray[Any] = arrays.pop(tensor.name).astype(np_dtype(dtype))
        elif tensor.data_type in floats and dtype != origin.dtype:
            values = numpy_helper.to_array(tensor).astype(np_dtype(dtype))
        else:
            continue
        # A fresh tensor: external data of the original is written inline.
        model.graph.initializer[index].CopyFrom(numpy_helper.from_array(values, tensor.name))
    for prefix, (node_index, position) in origin.inserts.items():
        # An array the file did not have (a LayerNormalization's B): a new initializer, named on its node.
        tensor_name = origin.tensors[prefix].tensor
        model.graph.initializer.append(numpy_helper.from_array(arrays.pop(tensor_name).astype(np_dtype(dtype)),
                                                               tensor_name))
        node = model.graph.node[node_index]
        while len(node.input) <= position:
            node.input.append("")
        node.input[position] = tensor_name
    if dtype != origin.dtype:
        for info in list(model.graph.input) + list(model.graph.output) + list(model.graph.value_info):
            if info.type.tensor_type.elem_type in floats:
                info.type.tensor_type.elem_type = code
    return bytes(model.SerializeToString())
