"""Graphs Stepper cannot run, and files that are not ONNX: one line on stderr, exit code 2, no traceback.

The graphs are written with ``onnx.helper`` and checked with ``onnx.checker``
(the ONNX project's own validator) where they are valid ONNX, so each refusal
is Stepper's choice, not a broken file; the malformed files are cut or made up.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path
from typing import Callable

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx_graphs import chain, save, write_csv

from stepper import cli


def _graph(nodes: list[onnx.NodeProto], inits: list[onnx.TensorProto], inputs: list[str] = ["x"],
           opset: int = 17, width: int = 2) -> onnx.ModelProto:
    value_inputs = [helper.make_tensor_value_info(name, TensorProto.DOUBLE, ["N", 4]) for name in inputs]
    graph = helper.make_graph(nodes, "g", value_inputs,
                              [helper.make_tensor_value_info("y", TensorProto.DOUBLE, ["N", width])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    return model


def _w(name: str, shape: tuple[int, ...]) -> onnx.TensorProto:
    return numpy_helper.from_array(np.random.default_rng(0).normal(size=shape), name)


def _bare(name: str, dims: list[int]) -> onnx.TensorProto:
    """A float64 tensor that declares ``dims`` and holds no data."""
    tensor = onnx.TensorProto()
    tensor.name, tensor.data_type = name, TensorProto.DOUBLE
    tensor.dims.extend(dims)
    return tensor


def run_check(tmp_path: Path, model_path: Path, capsys: pytest.CaptureFixture[str]) -> str:
    X = np.random.default_rng(1).normal(size=(6, 4))
    write_csv(tmp_path / "data.csv", X, X[:, :2])
    code = cli.main(["check", str(model_path), "--data", str(tmp_path / "data.csv"), "--targets", "y0,y1",
                     "--loss", "mean_squared_error"])
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("stepper: ") and "Traceback" not in err, err
    return lines[0].removeprefix("stepper: ")


SUPPORTED = ("Gemm, MatMul (with an Add for the bias), Add, Relu, LeakyRelu, Tanh, Sigmoid, Softplus, "
             "Softmax (last axis), Identity, Flatten, Conv, MaxPool, AveragePool, Reshape (to samples x features), "
             "BatchNormalization, LayerNormalization, Dropout, Cast (to whole numbers, for a Gather), "
             "Gather (an embedding of the integer input)")

# name -> (model, expected message after "<path>: ")
GRAPHS: dict[str, tuple[Callable[[], onnx.ModelProto], str]] = {
    "unsupported operator": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["h"], name="fc"),
                        helper.make_node("Abs", ["h"], ["y"], name="magnitude")], [_w("w", (4, 2))]),
        f"node 'magnitude' (Abs): operator Abs is not supported (Stepper runs a chain of: {SUPPORTED})"),
    "skip connection": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["h"], name="fc"),
                        helper.make_node("Add", ["h", "x"], ["y"], name="skip")], [_w("w", (4, 4))], width=4),
        "node 'skip' (Add): combines two computed tensors ('h' and 'x'): a branch or skip connection; Stepper "
        "runs a chain where each node takes only the output of the node before it"),
    "branch": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["h"], name="fc"),
                        helper.make_node("Relu", ["h"], ["r"], name="left"),
                        helper.make_node("Tanh", ["h"], ["y"], name="right")], [_w("w", (4, 2))]),
        "node 'right' (Tanh): takes 'h', which another node already takes: a branch; Stepper runs a chain "
        "where each node takes only the output of the node before it"),
    "second input": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["y"], name="fc")], [_w("w", (4, 2))],
                       inputs=["x", "mask"]),
        "the graph has 2 data inputs ('x', 'mask'); Stepper runs a graph with exactly one input, the samples"),
    "initializer that is also an input": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["y"], name="fc")], [_w("w", (4, 2))],
                       inputs=["x", "w"]),
        "initializer 'w' is also a graph input, so whoever runs the graph may replace it; Stepper reads weights "
        "only from initializers that are not inputs (export again with keep_initializers_as_inputs=False)"),
    "softmax after another activation": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["h"], name="fc"),
                        helper.make_node("Relu", ["h"], ["r"], name="r"),
                        helper.make_node("Softmax", ["r"], ["y"], name="t")], [_w("w", (4, 2))]),
        "node 't' (Softmax): does not follow a Gemm or MatMul; Stepper runs Softmax only as the activation of a "
        "dense layer (over the features of each sample)"),
    "weights made by a Constant node": (
        lambda: _graph([helper.make_node("Constant", [], ["w"], name="weights", value=_w("c", (4, 2))),
                        helper.make_node("Gemm", ["x", "w"], ["y"], name="fc")], []),
        "node 'fc' (Gemm): its B (weights) 'w' comes from a Constant node; Stepper reads weights only from "
        "initializers, which it can write back"),
    "transA inside the chain": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["h"], name="fc1"),
                        helper.make_node("Gemm", ["h", "v"], ["y"], name="fc2", transA=1)],
                       [_w("w", (4, 3)), _w("v", (3, 2))]),
        "node 'fc2' (Gemm): transA = 1 is supported only on the graph's input (samples along the second axis); "
        "inside the chain the samples run along the first axis"),
    "widths that do not fit": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["y"], name="fc")], [_w("w", (5, 2))]),
        "node 'fc' (Gemm): its weights take 5 inputs but the tensor it gets has 4 features per sample"),
    "opset 11": (
        lambda: _graph([helper.make_node("Gemm", ["x", "w"], ["y"], name="fc")], [_w("w", (4, 2))], opset=11),
        "written with operator set 11; Stepper reads opset 13 and newer (export again with opset_version=13 "
        "or later)"),
    "integer weights": (
        lambda: _graph([helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")],
                       [numpy_helper.from_array(np.ones((4, 2), np.int64), "w")]),
        "node 'mm' (MatMul): initializer 'w' is of ONNX element type INT64; Stepper reads float32 and float64 "
        "weights"),
    "a huge count of weights, with no data behind it": (
        lambda: _graph([helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")], [_bare("w", [4, 10**10])]),
        "node 'mm' (MatMul): initializer 'w' has 40,000,000,000 entries; Stepper reads at most 10,000,000"),
    "a negative dimension": (
        lambda: _graph([helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")], [_bare("w", [4, -2])]),
        "node 'mm' (MatMul): initializer 'w' has a negative dimension (4, -2)"),
    "weights that are not finite": (
        lambda: _graph([helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")],
                       [numpy_helper.from_array(np.array([[1.0, np.inf]] * 4), "w")]),
        "node 'mm' (MatMul): initializer 'w' holds a value that is not a finite number"),
}


@pytest.mark.parametrize("name", list(GRAPHS))
def test_a_graph_stepper_cannot_run_is_refused_in_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                           name: str) -> None:
    build, expected = GRAPHS[name]
    path = save(build(), tmp_path / "net.onnx")
    assert run_check(tmp_path, path, capsys) == f"{path}: {expected}"


def _external_model(tmp_path: Path, location: str) -> Path:
    model = chain([("MatMul", {"units": 2, "bias": None})])
    tensor = model.graph.initializer[0]
    values = numpy_helper.to_array(tensor)
    tensor.ClearField("raw_data")
    tensor.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", "0"), ("length", str(values.nbytes))):
        entry = tensor.external_data.add()
        entry.key, entry.value = key, value
    folder = tmp_path / "model"
    folder.mkdir()
    (tmp_path / "outside.bin").write_bytes(values.astype("<f8").tobytes())
    (folder / "inside.bin").write_bytes(values.astype("<f8").tobytes())
    return save(model, folder / "net.onnx")


def test_external_data_inside_the_folder_is_read(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = _external_model(tmp_path, "inside.bin")
    X = np.random.default_rng(1).normal(size=(6, 4))
    write_csv(tmp_path / "data.csv", X, X[:, :2])
    assert cli.main(["check", str(path), "--data", str(tmp_path / "data.csv"), "--targets", "y0,y1",
                     "--loss", "mean_squared_error"]) == 0


@pytest.mark.parametrize("location, said", [
    ("../outside.bin", "leads outside the model's folder"),
    ("/etc/passwd", "is not a file name inside the model's folder"),
    ("link.bin", "leads outside the model's folder"),
    ("missing.bin", "external data file 'missing.bin' is missing"),
])
def test_external_data_is_never_followed_outside_the_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                            location: str, said: str) -> None:
    path = _external_model(tmp_path, location)
    os.symlink(tmp_path / "outside.bin", path.parent / "link.bin")
    message = run_check(tmp_path, path, capsys)
    assert message.startswith(f"{path}: node 'mm0' (MatMul): initializer 'w0': ") and said in message


@pytest.mark.parametrize("content, said", [
    (b"name = 'not a graph'\n", "not an ONNX model"),
    (b"", "the file is empty"),
])
def test_a_file_that_is_not_onnx_gets_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                               content: bytes, said: str) -> None:
    path = tmp_path / "net.onnx"
    path.write_bytes(content)
    assert said in run_check(tmp_path, path, capsys)


@pytest.mark.parametrize("cut", [0.3, 0.6, 0.95])
def test_a_truncated_onnx_file_gets_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str], cut: float) -> None:
    whole = chain([("Gemm", {"units": 3}), ("Tanh", {}), ("Gemm", {"units": 2})]).SerializeToString()
    path = tmp_path / "net.onnx"
    path.write_bytes(whole[: int(len(whole) * cut)])
    message = run_check(tmp_path, path, capsys)
    assert message.startswith(f"{path}: ") and ("truncated" in message or "not an ONNX model" in message)


def test_a_fifo_is_not_read(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "net.onnx"
    os.mkfifo(path)
    assert run_check(tmp_path, path, capsys) == (f"{path}: is not a regular file (Stepper reads ONNX only "
                                                 "from regular files)")


def test_an_onnx_file_without_its_data_options(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = save(chain([("Gemm", {"units": 2})]), tmp_path / "net.onnx")
    assert cli.main(["check", str(path), "--data", "d.csv"]) == 2
    assert capsys.readouterr().err == (f"stepper: {path}: an ONNX file holds the network but not its data: give "
                                       "--targets, --loss (or name it in a model file: network = \"net.onnx\")\n")
    assert cli.main(["check", "scenarios/bakery-demand", "--targets", "y"]) == 2
    assert "--targets: only with an ONNX file named directly" in capsys.readouterr().err


def test_help_and_model_files_do_not_import_onnx() -> None:
    # Start-up must not pay for the onnx package: --help, and a check of a
    # model file without a graph, leave it unimported; reading a graph loads
    # only its message classes, not the package (whose import of ml_dtypes
    # took seconds).
    code = ("import sys\nfrom stepper import cli\n"
            "try:\n    cli.main(['--help'])\nexcept SystemExit:\n    pass\n"
            "cli.main(['check', 'kiln-tiny'])\n"
            "print('onnx' in sys.modules, 'onnxruntime' in sys.modules, file=sys.stderr)\n"
            "cli.main(['check', 'glasshouse-vents'])\n"
            "print('onnx' in sys.modules, 'ml_dtypes' in sys.modules, file=sys.stderr)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                          cwd=Path(__file__).resolve().parents[1])
    assert done.stderr.strip().splitlines()[-2:] == ["False False", "False False"], done.stderr


def test_data_columns_that_do_not_fit_the_graph_input(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = save(chain([("Gemm", {"units": 1})], n_in=3), tmp_path / "net.onnx")
    X = np.random.default_rng(1).normal(size=(6, 4))
    write_csv(tmp_path / "data.csv", X, X[:, :1])
    code = cli.main(["check", str(path), "--data", str(tmp_path / "data.csv"), "--targets", "y0",
                     "--loss", "mean_squared_error"])
    assert code == 2
    assert capsys.readouterr().err == (
        f"stepper: {path} (with the data options): data.inputs: names 4 column(s) (x0, x1, x2, x3) but the "
        "network's input takes 3 features; name the input columns (inputs = [...] in a model file, --inputs "
        "on the command line)\n")
    assert cli.main(["check", str(path), "--data", str(tmp_path / "data.csv"), "--targets", "y0",
                     "--inputs", "x0,x2,x3", "--loss", "mean_squared_error"]) == 0
