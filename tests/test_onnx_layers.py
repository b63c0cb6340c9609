"""ONNX graphs of convolutions, pooling, norms, dropout and embeddings opened as Stepper networks.

Outside references: onnxruntime (the ONNX project's inference engine) runs each
graph on the same random inputs, in float32; float64 graphs go to onnxruntime
too, except those holding an operator its CPU build has no float64 kernel for
(Conv, AveragePool), which the ONNX project's reference evaluator
(``onnx.reference``, its numpy implementation of the operator specification)
runs instead. The ONNX operator documentation (onnx.ai, Operators.md) defines
every attribute; the runtimes are taken as its reading. Stepper's evaluation
forward (no dropout, batch norm on its running statistics) is what an inference
graph computes; the batch-statistics forward of training is checked against
Ioffe & Szegedy (2015), Algorithm 1, computed by onnxruntime with the batch's
own statistics as the graph's mean and variance.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from onnx_graphs import run_onnxruntime, save, write_csv
from onnx_layer_graphs import layer_chain

from stepper.core.layers import BatchNorm, Conv, Dropout, Embedding, Flatten, LayerNorm, Pool
from stepper.formats.model_file import Setup, load_setup

Steps = list[tuple[str, dict[str, Any]]]

# Each case: the input's shape and the chain's steps. Together they cover every operator and attribute
# the importer reads for these layers.
CASES: dict[str, tuple[tuple[int, ...], Steps]] = {
    "conv2d relu, flatten, gemm": ((2, 6, 6), [
        ("Conv", {"channels": 3, "kernel": [3, 3]}), ("Relu", {}), ("Flatten", {}),
        ("Gemm", {"units": 2, "transB": 1})]),
    "conv2d strides and symmetric pads, no bias, max pool": ((2, 8, 8), [
        ("Conv", {"channels": 3, "kernel": [3, 3], "strides": [2, 2], "pads": [1, 1, 1, 1], "bias": False}),
        ("Tanh", {}), ("MaxPool", {"kernel_shape": [2, 2], "strides": [2, 2]}), ("Flatten", {"axis": 1}),
        ("Gemm", {"units": 2})]),
    "conv2d SAME_UPPER stride 2 (odd padding after), average pool, reshape [0, -1]": ((1, 7, 7), [
        ("Conv", {"channels": 2, "kernel": [3, 3], "strides": [2, 2], "auto_pad": "SAME_UPPER"}),
        ("Sigmoid", {}), ("AveragePool", {"kernel_shape": [2, 2]}), ("Reshape", {"shape": [0, -1]}),
        ("Gemm", {"units": 2, "transB": 1})]),
    "conv2d SAME_LOWER stride 2 (odd padding before)": ((1, 6, 6), [
        ("Conv", {"channels": 2, "kernel": [2, 2], "strides": [2, 2], "auto_pad": "SAME_LOWER"}),
        ("LeakyRelu", {"alpha": 0.2}), ("Flatten", {}), ("Gemm", {"units": 2})]),
    "conv2d VALID, rectangular kernel and strides, explicit kernel_shape": ((2, 7, 9), [
        ("Conv", {"channels": 3, "kernel": [2, 3], "kernel_shape": [2, 3], "strides": [1, 2], "auto_pad": "VALID",
                  "group": 1, "dilations": [1, 1]}),
        ("Softplus", {}), ("Flatten", {}), ("Gemm", {"units": 2})]),
    "conv2d uneven explicit pads": ((1, 5, 5), [
        ("Conv", {"channels": 2, "kernel": [3, 3], "pads": [0, 1, 2, 0]}), ("Flatten", {}), ("Gemm", {"units": 2})]),
    "conv1d pads, max pool 1-D": ((2, 10), [
        ("Conv", {"channels": 3, "kernel": [3], "pads": [1, 1]}), ("Relu", {}),
        ("MaxPool", {"kernel_shape": [2], "strides": [2], "pads": [0, 0], "ceil_mode": 0, "storage_order": 0}),
        ("Flatten", {}), ("Gemm", {"units": 2})]),
    "conv1d stride 2, overlapping average pool, reshape [-1, F]": ((1, 12), [
        ("Conv", {"channels": 2, "kernel": [4], "strides": [2]}), ("Tanh", {}),
        ("AveragePool", {"kernel_shape": [3], "count_include_pad": 1, "auto_pad": "VALID"}),
        ("Reshape", {"shape": [-1, 6]}), ("Gemm", {"units": 2})]),
    "max pool with default strides 1 (overlapping windows), ceil_mode where it changes nothing": ((2, 5, 5), [
        ("MaxPool", {"kernel_shape": [3, 3], "ceil_mode": 1}), ("Flatten", {}), ("Gemm", {"units": 2})]),
    "batch norm on channels, epsilon and momentum": ((2, 6, 6), [
        ("Conv", {"channels": 3, "kernel": [3, 3]}), ("BatchNormalization", {"epsilon": 1e-3, "momentum": 0.8}),
        ("MaxPool", {"kernel_shape": [2, 2], "strides": [2, 2]}), ("Flatten", {}), ("Gemm", {"units": 2})]),
    "batch norm on features between gemms": ((5,), [
        ("Gemm", {"units": 4, "transB": 1}), ("BatchNormalization", {}), ("Gemm", {"units": 2})]),
    "layer norm over features (axis -1), epsilon": ((5,), [
        ("Gemm", {"units": 4}), ("Relu", {}), ("LayerNormalization", {"axis": -1, "epsilon": 1e-3}),
        ("Gemm", {"units": 2})]),
    "layer norm over a shaped sample (axis 1)": ((2, 4, 4), [
        ("Conv", {"channels": 2, "kernel": [3, 3]}), ("LayerNormalization", {"axis": 1}), ("Flatten", {}),
        ("Gemm", {"units": 2})]),
    "layer norm without B": ((5,), [
        ("Gemm", {"units": 4}), ("LayerNormalization", {"bias": False}), ("Gemm", {"units": 2})]),
    "dropout with a ratio, and with none (0.5)": ((5,), [
        ("Gemm", {"units": 4}), ("Tanh", {}), ("Dropout", {"ratio": 0.3, "training_mode": False}),
        ("Gemm", {"units": 3}), ("Dropout", {}), ("Gemm", {"units": 2})]),
    "gemm, batch norm, relu, gemm (an activation layer after a norm)": ((5,), [
        ("Gemm", {"units": 4, "transB": 1}), ("BatchNormalization", {}), ("Relu", {}), ("Gemm", {"units": 2})]),
    "conv, max pool, then tanh; dropout, then leaky relu; flatten, then sigmoid": ((2, 6, 6), [
        ("Conv", {"channels": 2, "kernel": [3, 3]}), ("MaxPool", {"kernel_shape": [2, 2], "strides": [2, 2]}),
        ("Tanh", {}), ("Dropout", {"ratio": 0.2}), ("LeakyRelu", {"alpha": 0.2}), ("Flatten", {}),
        ("Sigmoid", {}), ("Gemm", {"units": 2}), ("Softplus", {}), ("Relu", {})]),
    "dropout on a conv's channels": ((1, 6, 6), [
        ("Conv", {"channels": 2, "kernel": [3, 3]}), ("Relu", {}), ("Dropout", {"ratio": 0.25}), ("Flatten", {}),
        ("Gemm", {"units": 2})]),
}


def open_graph(tmp_path: Path, model: Any, n_rows: int = 16, categories: int = 0) -> tuple[Path, Setup, np.ndarray]:
    """``model`` saved with a model file naming it and random data of the graph's width; the setup and ``X``."""
    path = save(model, tmp_path / "net.onnx")
    info = model.graph.input[0].type.tensor_type.shape.dim
    n_in = int(np.prod([d.dim_value for d in info[1:]])) if len(info) > 1 else 1
    n_out = model.graph.output[0].type.tensor_type.shape.dim[1].dim_value
    rng = np.random.default_rng(7)
    X = rng.integers(0, categories, (n_rows, n_in)).astype(float) if categories else rng.normal(size=(n_rows, n_in))
    write_csv(tmp_path / "data.csv", X, rng.normal(size=(n_rows, n_out)))
    targets = ", ".join(f'"y{i}"' for i in range(n_out))
    (tmp_path / "model.toml").write_text(f'network = "net.onnx"\nloss = "mean_squared_error"\n[data]\n'
                                         f'file = "data.csv"\ninputs = "*"\ntargets = [{targets}]\n', encoding="utf-8")
    return path, load_setup(tmp_path / "model.toml"), X


def evaluation_output(setup: Setup, X: np.ndarray) -> np.ndarray:
    """Stepper's evaluation forward: no dropout, batch norm on the running statistics."""
    return setup.network.at(False).predict(setup.theta0, X)


@pytest.mark.parametrize("name", list(CASES))
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_forward_equals_the_onnx_runtimes(tmp_path: Path, name: str, dtype: type) -> None:
    in_shape, steps = CASES[name]
    path, setup, X = open_graph(tmp_path, layer_chain(steps, in_shape, dtype=dtype))
    assert setup.network.input_shape == in_shape
    reference = run_onnxruntime(path, X).reshape(X.shape[0], -1)  # onnxruntime, or ONNX's reference evaluator
    ours = evaluation_output(setup, X)
    if dtype == np.float64:
        np.testing.assert_allclose(ours, reference, rtol=1e-12, atol=1e-13)
    else:
        # onnxruntime computes in float32 (about 1e-7 relative per operation), Stepper in float64.
        np.testing.assert_allclose(ours, reference.astype(np.float64), rtol=2e-5, atol=2e-5)


def test_the_layers_and_their_settings(tmp_path: Path) -> None:
    # The ONNX operator documentation: SAME_UPPER puts the odd zero after, SAME_LOWER before;
    # ceil(7 / 2) = 4 positions of a 3-wide window at stride 2 need (4 - 1) * 2 + 3 - 7 = 2 zeros.
    _, setup, _ = open_graph(tmp_path, layer_chain(CASES["conv2d SAME_UPPER stride 2 (odd padding after), "
                                                         "average pool, reshape [0, -1]"][1], (1, 7, 7)))
    conv, pool, flat = setup.network.layers[:3]
    assert isinstance(conv, Conv) and conv.grid.pad == ((1, 1), (1, 1)) and conv.grid.out == (4, 4)
    assert isinstance(pool, Pool) and pool.how == "avg" and pool.grid.stride == (1, 1)
    assert isinstance(flat, Flatten)
    lower = tmp_path / "lower"
    lower.mkdir()
    _, setup, _ = open_graph(lower, layer_chain(CASES["conv2d SAME_LOWER stride 2 (odd padding before)"][1],
                                                (1, 6, 6)))
    first = setup.network.layers[0]
    # 3 positions of a 2-wide window at stride 2 over 6: (3 - 1) * 2 + 2 - 6 = 0 zeros; see the next case.
    assert isinstance(first, Conv) and first.grid.pad == ((0, 0), (0, 0))
    odd = tmp_path / "odd"
    odd.mkdir()
    _, setup, _ = open_graph(odd, layer_chain([("Conv", {"channels": 1, "kernel": [2, 2], "auto_pad": "SAME_LOWER"}),
                                               ("Flatten", {}), ("Gemm", {"units": 1})], (1, 5, 5)))
    first = setup.network.layers[0]
    # ceil(5 / 1) = 5 positions of a 2-wide window need 1 zero: SAME_LOWER puts it before.
    assert isinstance(first, Conv) and first.grid.pad == ((1, 0), (1, 0))


def test_batch_norm_running_statistics_come_from_the_graph(tmp_path: Path) -> None:
    from onnx import numpy_helper

    model = layer_chain(CASES["batch norm on channels, epsilon and momentum"][1], (2, 6, 6))
    _, setup, _ = open_graph(tmp_path, model)
    bn = setup.network.layers[1]
    init = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    assert isinstance(bn, BatchNorm)
    # ONNX stores float attributes as float32: 1e-3 and 0.8 are float32's nearest values.
    assert bn.epsilon == float(np.float32(1e-3)) and bn.momentum == float(np.float32(0.8))
    state = setup.network.state_views(setup.network.initial_state())[1]
    np.testing.assert_array_equal(state["running_mean"], init["bn1.running_mean"])
    np.testing.assert_array_equal(state["running_var"], init["bn1.running_var"])


def test_batch_norm_trains_on_the_batch_statistics(tmp_path: Path) -> None:
    # Training cost and slopes use the batch's own mean and (biased) variance per channel (Ioffe &
    # Szegedy 2015, Algorithm 1); onnxruntime computes the same when those are the graph's statistics.
    import onnx
    from onnx import numpy_helper

    steps: Steps = [("BatchNormalization", {}), ("Flatten", {}), ("Gemm", {"units": 2})]
    model = layer_chain(steps, (3, 4, 4))
    _, setup, X = open_graph(tmp_path, model, n_rows=20)
    Xs = X.reshape(-1, 3, 4, 4)
    batch = onnx.ModelProto()
    batch.CopyFrom(model)
    for tensor in batch.graph.initializer:
        if tensor.name == "bn0.running_mean":
            tensor.CopyFrom(numpy_helper.from_array(Xs.mean(axis=(0, 2, 3)), tensor.name))
        if tensor.name == "bn0.running_var":
            tensor.CopyFrom(numpy_helper.from_array(Xs.var(axis=(0, 2, 3)), tensor.name))
    reference = run_onnxruntime(save(batch, tmp_path / "batch.onnx"), X)  # onnxruntime
    np.testing.assert_allclose(setup.network.at(True).predict(setup.theta0, X), reference, rtol=1e-12, atol=1e-13)
    assert not np.allclose(evaluation_output(setup, X), reference)  # the graph's statistics differ


def test_dropout_rate_and_evaluation(tmp_path: Path) -> None:
    _, setup, X = open_graph(tmp_path, layer_chain(CASES["dropout with a ratio, and with none (0.5)"][1], (5,)))
    drops = [layer for layer in setup.network.layers if isinstance(layer, Dropout)]
    # ONNX's Dropout: ratio 0.3 as given (as float64), 0.5 when the input is left out (operator documentation).
    assert [d.rate for d in drops] == [0.3, 0.5]
    # While training the masks drop entries: the output differs from the inference graph's.
    assert not np.allclose(setup.network.at(True, step=1).predict(setup.theta0, X), evaluation_output(setup, X))


def test_layer_norm_without_b_starts_its_shift_at_zero(tmp_path: Path) -> None:
    _, setup, _ = open_graph(tmp_path, layer_chain(CASES["layer norm without B"][1], (5,)))
    norm = setup.network.layers[1]
    assert isinstance(norm, LayerNorm)
    block = setup.network.layout.find_block(1, "shift")
    assert not setup.theta0[block.start : block.stop].any()
    assert setup.origin is not None and setup.origin.inserts == {"L2.shift": (1, 2)}


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("columns", [1, 3])
def test_gather_embedding_equals_onnxruntime(tmp_path: Path, dtype: type, columns: int) -> None:
    # Input (N, 3): every column a category column, vectors one after another; input (N,): one column.
    in_shape = (columns,) if columns > 1 else ()
    steps: Steps = [("Gather", {"categories": 5, "size": 4})] + ([("Flatten", {})] if columns > 1 else []) + [
        ("Gemm", {"units": 3}), ("Tanh", {}), ("Gemm", {"units": 2})]
    model = layer_chain(steps, in_shape, dtype=dtype, integer_input=True)
    path, setup, X = open_graph(tmp_path, model, categories=5)
    embedding = setup.network.layers[0]
    assert isinstance(embedding, Embedding) and embedding.columns == tuple(range(columns))
    reference = run_onnxruntime(path, X.reshape(-1) if columns == 1 else X)  # onnxruntime
    np.testing.assert_allclose(evaluation_output(setup, X), reference,
                               rtol=1e-12 if dtype == np.float64 else 2e-5, atol=1e-13 if dtype == np.float64 else 2e-5)


def test_gather_data_must_hold_category_numbers(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from stepper import cli

    model = layer_chain([("Gather", {"categories": 5, "size": 2}), ("Flatten", {}), ("Gemm", {"units": 1})], (2,),
                        integer_input=True)
    path = save(model, tmp_path / "net.onnx")
    write_csv(tmp_path / "data.csv", np.array([[1.0, 4.0], [5.0, 0.0]]), np.zeros((2, 1)))
    code = cli.main(["check", str(path), "--data", str(tmp_path / "data.csv"), "--targets", "y0",
                     "--loss", "mean_squared_error"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.strip().splitlines() == [
        f"stepper: {tmp_path / 'data.csv'}: line 3, column 'x0': 5 is not a category number of the embedding in "
        "layers[0] (expected a whole number from 0 to 4)"]


@pytest.mark.parametrize("form", ["value", "value_ints"])
def test_a_reshape_whose_shape_is_a_constant_node(tmp_path: Path, form: str) -> None:
    # PyTorch's exporter writes a reshape's shape as a Constant node; Stepper reads it like an initializer.
    import onnx
    from onnx import helper, numpy_helper

    model = layer_chain([("Conv", {"channels": 2, "kernel": [3, 3]}), ("Relu", {}), ("Reshape", {"shape": [0, -1]}),
                         ("Dropout", {"ratio": 0.1}), ("Gemm", {"units": 2})], (1, 5, 5))
    shape = next(t for t in model.graph.initializer if t.name == "shape2")
    model.graph.initializer.remove(shape)
    ratio = next(t for t in model.graph.initializer if t.name == "drop3.ratio")
    model.graph.initializer.remove(ratio)
    attrs = {"value": numpy_helper.from_array(np.array([0, -1], dtype=np.int64))} if form == "value" else {
        "value_ints": [0, -1]}
    model.graph.node.insert(0, helper.make_node("Constant", [], ["shape2"], name="shape", **attrs))
    model.graph.node.insert(0, helper.make_node("Constant", [], ["drop3.ratio"], name="ratio", value=ratio))
    onnx.checker.check_model(model)
    path, setup, X = open_graph(tmp_path, model)
    assert [type(layer) for layer in setup.network.layers] == [Conv, Flatten, Dropout, type(setup.network.layers[3])]
    assert setup.network.layers[2].rate == pytest.approx(0.1)  # type: ignore[attr-defined]
    np.testing.assert_allclose(evaluation_output(setup, X), run_onnxruntime(path, X), rtol=1e-12, atol=1e-13)  # ONNX's
    # reference evaluator (a float64 Conv)


def test_a_cast_of_a_float_input_feeds_the_gather(tmp_path: Path) -> None:
    # A float input turned into int64 category numbers by a Cast, then the embedding (as Keras exports one).
    import onnx
    from onnx import TensorProto, helper

    model = layer_chain([("Gather", {"categories": 6, "size": 2}), ("Flatten", {}), ("Gemm", {"units": 2})], (3,),
                        integer_input=True)
    model.graph.input[0].type.tensor_type.elem_type = TensorProto.DOUBLE
    model.graph.node.insert(0, helper.make_node("Cast", ["x"], ["x.int"], name="to_int", to=TensorProto.INT64))
    model.graph.node[1].input[1] = "x.int"
    onnx.checker.check_model(model, full_check=True)
    path, setup, X = open_graph(tmp_path, model, categories=6)
    assert isinstance(setup.network.layers[0], Embedding) and setup.network.input_shape == (3,)
    np.testing.assert_allclose(evaluation_output(setup, X), run_onnxruntime(path, X), rtol=1e-12, atol=1e-13)  # onnxruntime
