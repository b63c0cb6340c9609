"""Convolution, pooling, norm, dropout and embedding graphs Stepper cannot run: one line, exit 2.

Every graph here but one is valid ONNX (``onnx.checker``, the ONNX project's validator,
passes it, and the ONNX operator documentation allows each attribute value), so
each refusal is Stepper's choice; the line names the node, its operator and
what Stepper runs instead.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx_graphs import save, write_csv
from onnx_layer_graphs import layer_chain

from stepper import cli


def _g(nodes: list[onnx.NodeProto], inits: dict[str, np.ndarray], in_dims: list[Any],
       elem: int = TensorProto.DOUBLE, check: bool = True) -> onnx.ModelProto:
    """A graph from ``x`` (``in_dims``) through ``nodes`` to ``y``; ONNX's shape inference gives ``y`` its
    shape and onnx.checker checks the whole."""
    tensors = [numpy_helper.from_array(values, name) for name, values in inits.items()]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", elem, in_dims)],
                              [helper.make_tensor_value_info("y", TensorProto.DOUBLE, None)], tensors)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    if not check:  # a graph no exporter writes (shape inference refuses it), as a hand-made file may be
        return model
    model = onnx.shape_inference.infer_shapes(model, strict_mode=True)
    onnx.checker.check_model(model)
    return model


def _w(*shape: int) -> np.ndarray:
    return np.random.default_rng(0).normal(size=shape)


def _node(op: str, inputs: list[str], output: str = "y", name: str | None = None, **attrs: Any) -> onnx.NodeProto:
    return helper.make_node(op, inputs, [output], name=name or op.lower(), **attrs)


IMAGE = ["N", 2, 6, 6]

# name -> (graph, expected message after "<path>: ")
GRAPHS: dict[str, tuple[Callable[[], onnx.ModelProto], str]] = {
    "conv in groups": (
        lambda: _g([_node("Conv", ["x", "K"], group=2)], {"K": _w(2, 1, 3, 3)}, IMAGE),
        "node 'conv' (Conv): attribute group is 2 (Stepper runs group = 1: every output channel sees every "
        "input channel)"),
    "dilated conv": (
        lambda: _g([_node("Conv", ["x", "K"], dilations=[2, 2])], {"K": _w(3, 2, 2, 2)}, IMAGE),
        "node 'conv' (Conv): attribute dilations is [2, 2] (Stepper runs windows without gaps: dilations of [1, 1])"),
    "conv on samples x features (not valid ONNX)": (
        lambda: _g([_node("Gemm", ["x", "W"], "h", name="fc"), _node("Conv", ["h", "K"])],
                   {"W": _w(4, 6), "K": _w(1, 6, 1)}, ["N", 4], check=False),
        "node 'conv' (Conv): gets a tensor of shape (N, 6); Stepper runs Conv on (N, C, L) or (N, C, H, W) "
        "(channels first, one or two spatial axes)"),
    "max pool with padding": (
        lambda: _g([_node("MaxPool", ["x"], kernel_shape=[2, 2], pads=[1, 1, 1, 1])], {}, IMAGE),
        "node 'maxpool' (MaxPool): pads the input (pads [1, 1, 1, 1]); Stepper pools without padding "
        "(pads of 0, or auto_pad VALID)"),
    "average pool padded by SAME_UPPER": (
        lambda: _g([_node("AveragePool", ["x"], kernel_shape=[3, 3], auto_pad="SAME_UPPER")], {}, IMAGE),
        "node 'averagepool' (AveragePool): pads the input (pads [1, 1, 1, 1]); Stepper pools without padding "
        "(pads of 0, or auto_pad VALID)"),
    "max pool whose ceil_mode adds a window": (
        lambda: _g([_node("MaxPool", ["x"], kernel_shape=[2, 2], strides=[2, 2], ceil_mode=1)], {}, ["N", 1, 5, 5]),
        "node 'maxpool' (MaxPool): attribute ceil_mode is 1 and the last window would run past the input; Stepper "
        "pools whole windows only (ceil_mode = 0)"),
    "dilated max pool": (
        lambda: _g([_node("MaxPool", ["x"], kernel_shape=[2, 2], dilations=[1, 2])], {}, IMAGE),
        "node 'maxpool' (MaxPool): attribute dilations is [1, 2] (Stepper runs windows without gaps: dilations "
        "of [1, 1])"),
    "reshape to three axes": (
        lambda: _g([_node("Reshape", ["x", "s"])], {"s": np.array([0, 3, -1], dtype=np.int64)}, IMAGE),
        "node 'reshape' (Reshape): reshapes (N, 2, 6, 6) to [0, 3, -1]; Stepper runs a Reshape only to samples x "
        "features, with a shape of [0, -1] or [-1, 72]"),
    "reshape to a fixed batch the input does not have": (
        lambda: _g([_node("Reshape", ["x", "s"])], {"s": np.array([8, -1], dtype=np.int64)}, IMAGE),
        "node 'reshape' (Reshape): reshapes (N, 2, 6, 6) to [8, -1]; Stepper runs a Reshape only to samples x "
        "features, with a shape of [0, -1] or [-1, 72]"),
    "batch norm of a training graph": (
        lambda: _g([helper.make_node("BatchNormalization", ["x", "s", "b", "m", "v"], ["y", "mean", "var"],
                                     name="batchnormalization", training_mode=1)],
                   {"s": _w(2), "b": _w(2), "m": _w(2), "v": np.ones(2)}, IMAGE),
        "node 'batchnormalization' (BatchNormalization): attribute training_mode is 1: a graph exported for "
        "training; Stepper reads inference graphs (training_mode = 0)"),
    "layer norm over the last axis of an image": (
        lambda: _g([_node("LayerNormalization", ["x", "s"], axis=-1)], {"s": _w(6)}, IMAGE),
        "node 'layernormalization' (LayerNormalization): attribute axis is -1: normalizes over part of each sample "
        "of (N, 2, 6, 6); Stepper's layer norm takes every entry of a sample (axis = 1)"),
    "dropout in training mode": (
        lambda: layer_chain([("Gemm", {"units": 3}), ("Dropout", {"ratio": 0.2, "training_mode": True})], (4,)),
        "node 'dropout1' (Dropout): its training_mode 'drop1.training' may be true; Stepper reads inference graphs "
        "(training_mode absent or false)"),
    "gather of columns of a float input": (
        lambda: _g([_node("Gather", ["x", "i"], axis=1)], {"i": np.array([0, 2], dtype=np.int64)}, ["N", 4]),
        "node 'gather' (Gather): Stepper reads Gather only as an embedding: the first node, its indices the "
        "graph's integer input (or a Cast of it) and its data an initializer table"),
    "cast to another float type": (
        lambda: _g([_node("Cast", ["x"], "c", to=TensorProto.FLOAT), _node("Cast", ["c"], to=TensorProto.DOUBLE,
                                                                             name="back")], {}, ["N", 4]),
        "node 'cast' (Cast): Stepper reads Cast only on the graph's float input, to int64 or int32 category numbers "
        "for the Gather right after it"),
    "whole numbers of a cast into another operator": (
        lambda: _g([_node("Cast", ["x"], "c", to=TensorProto.INT64), _node("Relu", ["c"], "r"),
                    _node("Cast", ["r"], to=TensorProto.DOUBLE, name="back")], {}, ["N", 4]),
        "node 'relu' (Relu): takes the whole numbers of the Cast before it; Stepper reads them only as the category "
        "numbers of an embedding (a Gather right after the Cast)"),
    "gather along axis 1": (
        lambda: _g([_node("Gather", ["E", "x"], axis=1)], {"E": _w(5, 4)}, ["N", 2], TensorProto.INT64),
        "node 'gather' (Gather): attribute axis is 1 (Stepper runs 0)"),
    "integer input into another operator": (
        lambda: _g([_node("Relu", ["x"], "r"), _node("Cast", ["r"], to=TensorProto.DOUBLE)], {}, ["N", 2],
                   TensorProto.INT64),
        "node 'relu' (Relu): takes the graph's int64 input; Stepper reads whole-number inputs only as the category "
        "numbers of an embedding (a Gather first)"),
    "softmax after a pooling": (
        lambda: _g([_node("Conv", ["x", "K"], "c"), _node("MaxPool", ["c"], "p", kernel_shape=[2, 2]),
                    _node("Softmax", ["p"])], {"K": _w(3, 2, 3, 3)}, IMAGE),
        "node 'softmax' (Softmax): does not follow a Gemm or MatMul; Stepper runs Softmax only as the activation "
        "of a dense layer (over the features of each sample)"),
    "softmax after a conv": (
        lambda: _g([_node("Conv", ["x", "K"], "c"), _node("Softmax", ["c"])], {"K": _w(3, 2, 3, 3)}, IMAGE),
        "node 'softmax' (Softmax): follows a Conv; Stepper runs Softmax only after a Gemm or MatMul (over the "
        "features of each sample)"),
    "matmul on an image": (
        lambda: _g([_node("MatMul", ["x", "W"])], {"W": _w(6, 3)}, IMAGE),
        "node 'matmul' (MatMul): gets a tensor of shape (N, 2, 6, 6); Stepper runs MatMul on samples x features "
        "(put a Flatten before it)"),
}

INPUTS: dict[str, tuple[Callable[[], onnx.ModelProto], str]] = {
    "a symbolic height": (
        lambda: _g([_node("Flatten", ["x"])], {}, ["N", 1, "H", 8]),
        "graph input 'x' has the shape (N, 1, ?, 8); Stepper needs every dimension but the samples fixed"),
    "three spatial axes": (
        lambda: _g([_node("Conv", ["x", "K"])], {"K": _w(1, 1, 2, 2, 2)}, ["N", 1, 3, 3, 3]),
        "graph input 'x' has 5 dimensions (N, 1, 3, 3, 3); Stepper runs graphs whose input is samples x features, "
        "or channels first: (N, C, L) or (N, C, H, W)"),
}


def refusal(tmp_path: Path, model: onnx.ModelProto, capsys: pytest.CaptureFixture[str]) -> str:
    path = save(model, tmp_path / "net.onnx")
    X = np.random.default_rng(1).normal(size=(4, 4))
    write_csv(tmp_path / "data.csv", X, X[:, :1])
    code = cli.main(["check", str(path), "--data", str(tmp_path / "data.csv"), "--targets", "y0",
                     "--loss", "mean_squared_error"])
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and lines[0].startswith("stepper: ") and "Traceback" not in err, err
    return lines[0].removeprefix(f"stepper: {path}: ")


@pytest.mark.parametrize("name", list(GRAPHS) + list(INPUTS))
def test_a_layer_graph_stepper_cannot_run_is_refused_in_one_line(tmp_path: Path, name: str,
                                                                 capsys: pytest.CaptureFixture[str]) -> None:
    build, expected = GRAPHS.get(name) or INPUTS[name]
    assert refusal(tmp_path, build(), capsys) == expected


def test_a_model_file_input_shape_that_differs_from_the_graph(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    save(layer_chain([("Flatten", {}), ("Gemm", {"units": 1})], (1, 2, 2)), tmp_path / "net.onnx")
    write_csv(tmp_path / "data.csv", np.zeros((3, 4)), np.zeros((3, 1)))
    (tmp_path / "model.toml").write_text('network = "net.onnx"\nloss = "mean_squared_error"\n[data]\n'
                                         'file = "data.csv"\ninputs = "*"\ntargets = ["y0"]\ninput_shape = [4, 1]\n',
                                         encoding="utf-8")
    assert cli.main(["check", str(tmp_path / "model.toml")]) == 2
    assert capsys.readouterr().err == (f"stepper: {tmp_path / 'model.toml'}: data.input_shape: [4, 1], but the graph's "
                                       "input takes samples of shape [1, 2, 2]; leave input_shape out (the graph "
                                       "gives it)\n")
