"""Small ONNX graphs of convolutions, pooling, norms, dropout and embeddings, written with ``onnx.helper``.

``layer_chain(steps, in_shape)`` builds a chain from the input ``x`` ``(N, *in_shape)``
to the output ``y``; each step is an operator name and its settings. The
weights are drawn from a seeded generator; the shape of one sample is followed
by hand with the ONNX operator documentation's formulas (output positions
``floor((n + pads - k) / s) + 1``, or ``ceil(n / s)`` under ``SAME_*``), and
``onnx.checker`` (the ONNX project's validator) checks every graph, with its
shape inference on.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

ELEM = {np.float32: TensorProto.FLOAT, np.float64: TensorProto.DOUBLE}


def _positions(size: list[int], attrs: dict[str, Any], kernel: list[int]) -> list[int]:
    strides = attrs.get("strides", [1] * len(size))
    auto = attrs.get("auto_pad", "NOTSET")
    if auto in ("SAME_UPPER", "SAME_LOWER"):
        return [math.ceil(n / s) for n, s in zip(size, strides)]
    pads = attrs.get("pads", [0] * (2 * len(size))) if auto == "NOTSET" else [0] * (2 * len(size))
    d = len(size)
    return [(n + pads[i] + pads[i + d] - k) // s + 1 for i, (n, k, s) in enumerate(zip(size, kernel, strides))]


def layer_chain(steps: list[tuple[str, dict[str, Any]]], in_shape: tuple[int, ...], dtype: type = np.float64,
                seed: int = 0, integer_input: bool = False, opset: int = 17) -> onnx.ModelProto:
    """A chain of nodes from ``x`` ``(N, *in_shape)`` to ``y``.

    Steps (settings besides the node's own attributes):

    - ``("Conv", {"channels": 3, "kernel": [3, 3], "bias": True, **attributes})``;
    - ``("MaxPool" | "AveragePool", {"kernel_shape": [2, 2], **attributes})``;
    - ``("BatchNormalization", {**attributes})``: scale, B, mean, positive var per channel;
    - ``("LayerNormalization", {"bias": True, **attributes})``: Scale and B of the normalized shape;
    - ``("Dropout", {"ratio": 0.3 | None, "training_mode": False | None})``;
    - ``("Reshape", {"shape": [0, -1]})``; ``("Gemm", {"units": 3, "transB": 1})``;
    - ``("Gather", {"categories": 5, "size": 4})``: first, on an integer input;
    - any other operator with its attributes (Relu, Flatten, ...).
    """
    rng = np.random.default_rng(seed)
    nodes: list[onnx.NodeProto] = []
    inits: list[onnx.TensorProto] = []
    shape = list(in_shape)
    current = "x"

    def tensor(name: str, values: np.ndarray) -> str:
        inits.append(numpy_helper.from_array(np.asarray(values).astype(dtype), name))
        return name

    for k, (op, settings) in enumerate(steps):
        attrs = dict(settings)
        out = f"t{k}"
        inputs = [current]
        if op == "Conv":
            channels, kernel = attrs.pop("channels"), attrs.pop("kernel")
            inputs.append(tensor(f"conv{k}.weight", rng.normal(0, 0.5, (channels, shape[0], *kernel))))
            if attrs.pop("bias", True):
                inputs.append(tensor(f"conv{k}.bias", rng.normal(0, 0.5, channels)))
            shape = [channels] + _positions(shape[1:], attrs, kernel)
        elif op in ("MaxPool", "AveragePool"):
            shape = [shape[0]] + _positions(shape[1:], attrs, attrs["kernel_shape"])
        elif op == "BatchNormalization":
            c = shape[0]
            inputs += [tensor(f"bn{k}.weight", rng.normal(1, 0.3, c)), tensor(f"bn{k}.bias", rng.normal(0, 0.3, c)),
                       tensor(f"bn{k}.running_mean", rng.normal(0, 0.5, c)),
                       tensor(f"bn{k}.running_var", rng.uniform(0.5, 2.0, c))]
        elif op == "LayerNormalization":
            axis = attrs.get("axis", -1)
            normalized = shape[(axis % (len(shape) + 1)) - 1:]
            inputs.append(tensor(f"ln{k}.weight", rng.normal(1, 0.3, normalized)))
            if attrs.pop("bias", True):
                inputs.append(tensor(f"ln{k}.bias", rng.normal(0, 0.3, normalized)))
        elif op == "Dropout":
            ratio, mode = attrs.pop("ratio", None), attrs.pop("training_mode", None)
            inputs.append("" if ratio is None else tensor(f"drop{k}.ratio", np.array(ratio)))
            if mode is not None:
                inits.append(numpy_helper.from_array(np.array(mode), f"drop{k}.training"))
                inputs.append(f"drop{k}.training")
        elif op == "Reshape":
            inits.append(numpy_helper.from_array(np.array(attrs.pop("shape"), dtype=np.int64), f"shape{k}"))
            inputs.append(f"shape{k}")
            shape = [math.prod(shape)]
        elif op == "Flatten":
            shape = [math.prod(shape)]
        elif op == "Gemm":
            units = attrs.pop("units")
            trans_b = attrs.get("transB", 0)
            w = rng.normal(0, 0.5, (units, shape[0]) if trans_b else (shape[0], units))
            inputs += [tensor(f"fc{k}.weight", w), tensor(f"fc{k}.bias", rng.normal(0, 0.5, units))]
            shape = [units]
        elif op == "Gather":
            categories, size = attrs.pop("categories"), attrs.pop("size")
            inputs = [tensor(f"embed{k}.weight", rng.normal(0, 1.0, (categories, size))), current]
            shape = shape + [size]
        nodes.append(helper.make_node(op, inputs, [out], name=f"{op.lower()}{k}", **attrs))
        current = out
    nodes.append(helper.make_node("Identity", [current], ["y"], name="out"))
    elem = TensorProto.INT64 if integer_input else ELEM[dtype]
    graph = helper.make_graph(nodes, "layers", [helper.make_tensor_value_info("x", elem, ["N", *in_shape])],
                              [helper.make_tensor_value_info("y", ELEM[dtype], ["N", *shape])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model
