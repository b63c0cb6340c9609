"""Small ONNX graphs for the tests, written with ``onnx.helper`` (the ONNX project's own builder).

``chain(...)`` builds a graph from a list of steps; each step is the operator
name and its attributes, and the weights are drawn from a seeded generator.
The graphs are what PyTorch's exporter or a hand-written ``onnx.helper``
script produce for a small MLP: Gemm or MatMul + Add, then an activation.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

ONNX_TYPES = {np.float32: TensorProto.FLOAT, np.float64: TensorProto.DOUBLE}


def chain(steps: list[tuple[str, dict[str, Any]]], n_in: int = 4, dtype: type = np.float64, seed: int = 0,
          opset: int = 17, transposed_input: bool = False) -> onnx.ModelProto:
    """A chain of nodes from input ``x`` ``(N, n_in)`` to output ``y``.

    A step ``("Gemm", {"units": 3, "transB": 1, "alpha": 0.5, "beta": 2.0, "C": "row"})``
    adds a Gemm with a weight of the orientation transB asks for and a bias C
    (``"vector"`` (units,), ``"row"`` (1, units) or ``None``); ``("MatMul", {"units": 3,
    "bias": "second"|"first"|None})`` adds MatMul and an Add with the bias on that
    side; any other step is an operator applied with the given attributes.
    """
    rng = np.random.default_rng(seed)
    nodes: list[onnx.NodeProto] = []
    inits: list[onnx.TensorProto] = []
    current, width = "x", n_in

    def tensor(name: str, shape: tuple[int, ...]) -> str:
        inits.append(numpy_helper.from_array(rng.normal(0.0, 0.7, shape).astype(dtype), name))
        return name

    for k, (op, attrs) in enumerate(steps):
        out = f"t{k}"
        attrs = dict(attrs)
        if op == "Gemm":
            units = attrs.pop("units")
            trans_b = attrs.get("transB", 0)
            B = tensor(f"fc{k}.weight", (units, width) if trans_b else (width, units))
            inputs = [current, B]
            c = attrs.pop("C", "vector")
            if c is not None:
                inputs.append(tensor(f"fc{k}.bias", (units,) if c == "vector" else (1, units)))
            nodes.append(helper.make_node("Gemm", inputs, [out], name=f"fc{k}", **attrs))
            width = units
        elif op == "MatMul":
            units = attrs.pop("units")
            side = attrs.pop("bias", "second")
            W = tensor(f"w{k}", (width, units))
            if side is None:
                nodes.append(helper.make_node("MatMul", [current, W], [out], name=f"mm{k}"))
            else:
                nodes.append(helper.make_node("MatMul", [current, W], [f"m{k}"], name=f"mm{k}"))
                b = tensor(f"b{k}", (units,))
                pair = [f"m{k}", b] if side == "second" else [b, f"m{k}"]
                nodes.append(helper.make_node("Add", pair, [out], name=f"add{k}"))
            width = units
        else:
            nodes.append(helper.make_node(op, [current], [out], name=f"{op.lower()}{k}", **attrs))
        current = out
    nodes.append(helper.make_node("Identity", [current], ["y"], name="out"))
    elem = ONNX_TYPES[dtype]
    in_shape: list[Any] = [n_in, "N"] if transposed_input else ["N", n_in]
    graph = helper.make_graph(nodes, "chain", [helper.make_tensor_value_info("x", elem, in_shape)],
                              [helper.make_tensor_value_info("y", elem, ["N", width])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def save(model: onnx.ModelProto, path: Path) -> Path:
    onnx.save(model, str(path))
    return path


#: Operators onnxruntime's CPU build has no float64 kernel for (onnxruntime 1.32: "Could not find an
#: implementation"); a float64 graph holding one is run by the ONNX project's reference evaluator.
NO_FLOAT64_KERNEL = {"Softplus", "Conv", "AveragePool"}


def run_onnxruntime(path: Path, X: np.ndarray, transposed_input: bool = False) -> np.ndarray:
    """The graph's output for ``X`` ``(n, n_in)``, by onnxruntime (the outside reference).

    The rows are shaped as the graph's input (``(n, C, H, W)`` for a Conv net)
    and given its element type (int64 category numbers for a Gather). A float64
    graph with an operator in :data:`NO_FLOAT64_KERNEL` is run by
    ``onnx.reference.ReferenceEvaluator``, the ONNX project's own numpy
    implementation of the operator specification.
    """
    import onnxruntime

    model = onnx.load(str(path))
    info = model.graph.input[0]
    elem = info.type.tensor_type.elem_type
    dims = [d.dim_value for d in info.type.tensor_type.shape.dim]
    types = {TensorProto.FLOAT: np.float32, TensorProto.DOUBLE: np.float64, TensorProto.INT64: np.int64,
             TensorProto.INT32: np.int32}
    rows = X.T if transposed_input else X
    if len(dims) > 2:
        rows = rows.reshape((X.shape[0], *dims[1:]))
    feed = np.ascontiguousarray(rows.astype(types[elem]))
    name = info.name
    if elem == TensorProto.DOUBLE and any(node.op_type in NO_FLOAT64_KERNEL for node in model.graph.node):
        from onnx.reference import ReferenceEvaluator

        return np.asarray(ReferenceEvaluator(model).run(None, {name: feed})[0])
    session = onnxruntime.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return np.asarray(session.run(None, {name: feed})[0])


def write_csv(path: Path, X: np.ndarray, Y: np.ndarray, inputs: list[str] | None = None,
              targets: list[str] | None = None) -> Path:
    """A CSV with a header row; numbers written with repr so they read back exactly."""
    inputs = inputs or [f"x{i}" for i in range(X.shape[1])]
    targets = targets or [f"y{i}" for i in range(Y.shape[1])]
    lines = [",".join(inputs + targets)]
    lines += [",".join(repr(float(v)) for v in row) for row in np.hstack([X, Y])]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
