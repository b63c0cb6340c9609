"""Writing a network and its current weights as an ONNX file.

A network that came from an ONNX file goes back as that same graph: every
node, name, attribute and input arrangement is kept, and only the
initializers Stepper read are replaced by the current weights, in the file's
own arrangement (Gemm's ``B`` stays ``(out, in)`` under ``transB = 1``). With
another float type than the file's, every float tensor type of the graph
changes with it.

Any other network of dense layers is written as a new chain: per layer a Gemm
(``transB = 1`` with ``(out, in)`` weights when the weights came from a
framework's file, under its tensor names; Stepper's own ``L1.W`` ``(in, out)``
otherwise) and its activation. A custom layer has no ONNX operator and is
refused. The graph uses opset 17 and IR version 8, which onnxruntime 1.14 and
later run.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.gemm import ScaledDense
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.errors import UsageError
from stepper.formats.weight_sources import TensorSource, WeightOrigin

Array = NDArray[np.float64]

OPSET = 17
IR_VERSION = 8
#: Activation name -> ONNX operator (identity needs no node).
OPERATORS = {"relu": "Relu", "tanh": "Tanh", "sigmoid": "Sigmoid", "softplus": "Softplus", "softmax": "Softmax"}


def onnx_bytes(network: Network, theta: Array, origin: WeightOrigin | None, dtype: str, name: str) -> bytes:
    """The ONNX file of ``network`` at weights ``theta`` ``(n_params,)``, with float type ``dtype``."""
    if origin is not None and origin.kind == "onnx" and origin.graph is not None:
        return _patched(network, theta, origin, dtype)
    return _built(network, theta, origin, dtype, name)


def _np_dtype(dtype: str) -> type:
    return np.float32 if dtype == "float32" else np.float64


def _patched(network: Network, theta: Array, origin: WeightOrigin, dtype: str) -> bytes:
    import onnx
    from onnx import numpy_helper

    assert origin.graph is not None
    model = onnx.ModelProto()
    model.ParseFromString(origin.graph)
    arrays: dict[str, Array] = {}
    for block in network.layout.blocks:
        source = origin.tensors[block.prefix]
        arrays[source.tensor] = source.to_file(theta[block.start : block.stop].reshape(block.shape))
    code = onnx.TensorProto.FLOAT if dtype == "float32" else onnx.TensorProto.DOUBLE
    floats = (onnx.TensorProto.FLOAT, onnx.TensorProto.DOUBLE)
    for index, tensor in enumerate(model.graph.initializer):
        if tensor.name in arrays:
            values: NDArray[Any] = arrays[tensor.name].astype(_np_dtype(dtype))
        elif tensor.data_type in floats and dtype != origin.dtype:
            values = numpy_helper.to_array(tensor).astype(_np_dtype(dtype))
        else:
            continue
        # A fresh tensor: external data of the original is written inline.
        model.graph.initializer[index].CopyFrom(numpy_helper.from_array(values, tensor.name))
    if dtype != origin.dtype:
        for info in list(model.graph.input) + list(model.graph.output) + list(model.graph.value_info):
            if info.type.tensor_type.elem_type in floats:
                info.type.tensor_type.elem_type = code
    return bytes(model.SerializeToString())


def _built(network: Network, theta: Array, origin: WeightOrigin | None, dtype: str, name: str) -> bytes:
    import onnx
    from onnx import helper, numpy_helper

    code = onnx.TensorProto.FLOAT if dtype == "float32" else onnx.TensorProto.DOUBLE
    views = network.views(theta)
    nodes: list[Any] = []
    inits: list[Any] = []
    current = "input"
    for index, layer in enumerate(network.layers):
        number = index + 1
        if not isinstance(layer, (Dense, ScaledDense)):
            raise UsageError(f"layer L{number} ({layer.label}) has no ONNX operator; export its weights to a "
                             ".safetensors file instead")
        W_source = _source(origin, f"L{number}.W", TensorSource(f"L{number}.W", (layer.n_in, layer.n_out), (0, 1)))
        W = W_source.to_file(views[index]["W"])
        if W.shape not in ((layer.n_in, layer.n_out), (layer.n_out, layer.n_in)) or \
                W_source.perm not in ((0, 1), (1, 0)):
            W_source = TensorSource(W_source.tensor, (layer.n_in, layer.n_out), (0, 1))
            W = W_source.to_file(views[index]["W"])
        inputs = [current, W_source.tensor]
        inits.append(numpy_helper.from_array(W.astype(_np_dtype(dtype)), W_source.tensor))
        if layer.bias:
            b_source = _source(origin, f"L{number}.b", TensorSource(f"L{number}.b", (layer.n_out,), (0,)))
            b = b_source.to_file(views[index]["b"])
            inputs.append(b_source.tensor)
            inits.append(numpy_helper.from_array(b.astype(_np_dtype(dtype)), b_source.tensor))
        attributes: dict[str, Any] = {"transB": int(W_source.perm == (1, 0))}
        if isinstance(layer, ScaledDense):
            attributes.update(alpha=layer.alpha, beta=layer.beta)
        out = f"L{number}.Z"
        nodes.append(helper.make_node("Gemm", inputs, [out], name=f"L{number}", **attributes))
        current = out
        act = layer.activation
        op = OPERATORS.get(act.name) or ("LeakyRelu" if act.name.startswith("leaky_relu") else None)
        if op is not None:
            out = f"L{number}.A"
            extra: dict[str, Any] = dict(act.constants) if op == "LeakyRelu" else {}
            if op == "Softmax":
                extra["axis"] = -1
            nodes.append(helper.make_node(op, [current], [out], name=f"L{number}.{act.name.split('(')[0]}", **extra))
            current = out
        elif act.name != "identity":
            raise UsageError(f"layer L{number}'s activation {act.name} has no ONNX operator")
    nodes.append(helper.make_node("Identity", [current], ["output"], name="output"))
    graph = helper.make_graph(
        nodes, name or "stepper",
        [helper.make_tensor_value_info("input", code, ["N", network.n_inputs])],
        [helper.make_tensor_value_info("output", code, ["N", network.n_outputs])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="stepper")
    model.ir_version = IR_VERSION
    return bytes(model.SerializeToString())


def _source(origin: WeightOrigin | None, prefix: str, default: TensorSource) -> TensorSource:
    if origin is None or prefix not in origin.tensors:
        return default
    return origin.tensors[prefix]
