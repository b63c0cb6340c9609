"""Convolutions, pooling, norms, dropout and embeddings written back as ONNX, and run by onnxruntime.

Outside references: onnxruntime (the ONNX project's inference engine) runs every
exported float32 graph; a float64 graph holding Conv or AveragePool, for which
onnxruntime's CPU build has no float64 kernel, is run by the ONNX project's
reference evaluator (``onnx.reference``). Each must give what Stepper's
evaluation forward gives (no dropout, batch norm on its running statistics),
after training steps have moved the weights and the running statistics.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from onnx_graphs import run_onnxruntime, save, write_csv
from onnx_layer_graphs import layer_chain

from stepper import cli
from stepper.formats.model_file import load_setup
from stepper.session import Session

CONV_BN: list[tuple[str, dict[str, object]]] = [
    ("Conv", {"channels": 3, "kernel": [3, 3], "pads": [1, 1, 1, 1]}), ("Relu", {}), ("BatchNormalization", {}),
    ("MaxPool", {"kernel_shape": [2, 2], "strides": [2, 2]}), ("Dropout", {"ratio": 0.2}),
    ("Reshape", {"shape": [0, -1]}), ("Gemm", {"units": 4, "transB": 1}), ("LayerNormalization", {"bias": False}),
    ("Gemm", {"units": 2}),
]


def graph_model(tmp_path: Path, dtype: type = np.float64) -> tuple[Path, np.ndarray]:
    save(layer_chain(CONV_BN, (2, 6, 6), dtype=dtype), tmp_path / "net.onnx")
    X = np.random.default_rng(3).normal(size=(30, 72))
    write_csv(tmp_path / "data.csv", X, np.tanh(X[:, :2]))
    (tmp_path / "model.toml").write_text('network = "net.onnx"\nloss = "mean_squared_error"\n[data]\n'
                                         'file = "data.csv"\ninputs = "*"\ntargets = ["y0", "y1"]\n', encoding="utf-8")
    return tmp_path / "model.toml", X


def export(args: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    assert cli.main(["export", *args]) == 0, capsys.readouterr().err
    return capsys.readouterr().out


def trained(model: Path, steps: int = 6) -> tuple[Session, Path]:
    session = Session(load_setup(model), rate=0.05)
    session.step(steps)
    return session, session.save_checkpoint(model.parent / "ck.safetensors")


@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_an_imported_conv_graph_goes_back_with_its_trained_weights_and_statistics(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], dtype: str) -> None:
    model, X = graph_model(tmp_path)
    session, ck = trained(model)
    out = tmp_path / "trained.onnx"
    text = export([str(model), "--resume", str(ck), "--to", str(out), "--dtype", dtype], capsys)
    ours = session.evaluation_net().predict(session.theta, X)
    reference = run_onnxruntime(out, X)  # onnxruntime in float32; ONNX's reference evaluator in float64
    if dtype == "float64":
        np.testing.assert_allclose(reference, ours, rtol=1e-12, atol=1e-13)
    else:
        np.testing.assert_allclose(reference, ours, rtol=2e-5, atol=2e-5)
    # The evaluation cost export prints is the mean squared error of the runtime's outputs on the rows.
    printed = float(text.split("on the training rows): ")[1].split()[0])
    expected = float(np.mean((reference.astype(np.float64) - np.tanh(X[:, :2])) ** 2))
    assert printed == pytest.approx(expected, rel=1e-9 if dtype == "float64" else 1e-5)
    # The training cost printed is the session's at its step (that step's dropout masks, the batch's statistics).
    training = float(text.split("training cost at the weights written: ")[1].split()[0])
    assert training == pytest.approx(session.train_cost(), rel=1e-9 if dtype == "float64" else 1e-5)
    written = {t.name: numpy_helper.to_array(t) for t in onnx.load(str(out)).graph.initializer}
    kept = session.net.state_views(session.state)[1]
    # The running statistics moved with the steps and went back as the node's input_mean and input_var.
    np.testing.assert_allclose(written["bn2.running_mean"], kept["running_mean"], rtol=1e-6 if dtype == "float32" else 0)
    assert not np.allclose(kept["running_var"], session.net.initial_state()[3:6])
    # The LayerNormalization had no B: the export adds the trained shift as one, on the node.
    node = next(n for n in onnx.load(str(out)).graph.node if n.op_type == "LayerNormalization")
    assert len(node.input) == 3 and node.input[2] in written and np.any(written[node.input[2]] != 0.0)


def test_import_export_import_is_bit_exact_with_the_statistics(tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    model, _ = graph_model(tmp_path)
    setup = load_setup(model)
    again = tmp_path / "again"
    export([str(model), "--to", str(again / "net.onnx")], capsys)
    (again / "model.toml").write_text(model.read_text(encoding="utf-8").replace(
        '"data.csv"', f'"{tmp_path / "data.csv"}"'), encoding="utf-8")
    back = load_setup(again / "model.toml")
    assert back.theta0.tobytes() == setup.theta0.tobytes()
    assert back.network.initial_state().tobytes() == setup.network.initial_state().tobytes()
    assert [layer.label for layer in back.network.layers] == [layer.label for layer in setup.network.layers]


MODEL_FILE = """
name = "layers"
loss = "mean_squared_error"
[data]
file = "data.csv"
inputs = "*"
targets = ["y0", "y1"]
input_shape = {shape}
[init]
scheme = "glorot_uniform"
seed = 3
{layers}
"""

# Epsilons that float32 holds exactly (2^-10, 2^-16): ONNX stores float attributes as float32, so these go
# through the file unchanged and the float64 outputs can agree to 1e-12 (1e-5 would move them by ~1e-9).
IMAGE_LAYERS = """
[[layers]]
type = "conv2d"
channels = 3
kernel = [3, 2]
stride = [1, 2]
padding = 1
activation = "tanh"
[[layers]]
type = "batch_norm"
momentum = 0.7
epsilon = 1.52587890625e-5
[[layers]]
type = "max_pool"
size = 2
[[layers]]
type = "dropout"
rate = 0.3
[[layers]]
type = "layer_norm"
epsilon = 0.0009765625
[[layers]]
type = "flatten"
[[layers]]
units = 4
activation = "relu"
[[layers]]
type = "batch_norm"
epsilon = 1.52587890625e-5
[[layers]]
units = 2
activation = "identity"
"""

SIGNAL_LAYERS = """
[[layers]]
type = "conv1d"
channels = 2
kernel = 4                # "same" pads 1 before and 2 after: uneven pads in the file
padding = "same"
activation = "relu"
[[layers]]
type = "avg_pool"
size = 2
[[layers]]
type = "flatten"
[[layers]]
units = 2
activation = "sigmoid"
"""


@pytest.mark.parametrize("kind", ["image", "signal"])
@pytest.mark.parametrize("dtype", ["float64", "float32"])
def test_a_model_file_network_of_the_new_layers_exports_to_onnx(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                                kind: str, dtype: str) -> None:
    shape, layers, n_in = ("[1, 6, 8]", IMAGE_LAYERS, 48) if kind == "image" else ("[2, 9]", SIGNAL_LAYERS, 18)
    X = np.random.default_rng(8).normal(size=(24, n_in))
    write_csv(tmp_path / "data.csv", X, np.tanh(X[:, :2]))
    model = tmp_path / "model.toml"
    model.write_text(MODEL_FILE.format(shape=shape, layers=layers), encoding="utf-8")
    session, ck = trained(model)
    out = tmp_path / "net.onnx"
    export([str(model), "--resume", str(ck), "--to", str(out), "--dtype", dtype], capsys)
    ours = session.evaluation_net().predict(session.theta, X)
    reference = run_onnxruntime(out, X)  # onnxruntime in float32; ONNX's reference evaluator in float64
    tight = dtype == "float64"
    np.testing.assert_allclose(reference, ours, rtol=1e-12 if tight else 2e-5, atol=1e-12 if tight else 2e-5)
    # The file opens again as the same layers, with the same evaluation outputs.
    (tmp_path / "back.toml").write_text('network = "net.onnx"\nloss = "mean_squared_error"\n[data]\n'
                                        'file = "data.csv"\ninputs = "*"\ntargets = ["y0", "y1"]\n', encoding="utf-8")
    back = load_setup(tmp_path / "back.toml")
    assert [type(layer) for layer in back.network.layers] == [type(layer) for layer in session.net.layers]
    np.testing.assert_allclose(back.network.at(False).predict(back.theta0, X), reference,
                               rtol=1e-12 if tight else 2e-5, atol=1e-12 if tight else 2e-5)


EMBEDDING = """
name = "tables"
loss = "mean_squared_error"
[data]
file = "data.csv"
inputs = ["a", "b"{extra}]
targets = ["y0"]
[init]
scheme = "glorot_uniform"
seed = 5
[[layers]]
type = "embedding"
columns = ["a", "b"]
categories = 4
size = 3
[[layers]]
units = 1
activation = "identity"
"""


def test_an_embedding_exports_as_gather_on_an_integer_input(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    X = np.random.default_rng(2).integers(0, 4, (20, 2)).astype(float)
    write_csv(tmp_path / "data.csv", X, X[:, :1] * 0.5, inputs=["a", "b"])
    (tmp_path / "model.toml").write_text(EMBEDDING.format(extra=""), encoding="utf-8")
    session, ck = trained(tmp_path / "model.toml")
    out = tmp_path / "net.onnx"
    export([str(tmp_path / "model.toml"), "--resume", str(ck), "--to", str(out), "--dtype", "float32"], capsys)
    graph = onnx.load(str(out)).graph
    assert graph.input[0].type.tensor_type.elem_type == onnx.TensorProto.INT64
    reference = run_onnxruntime(out, X)  # onnxruntime, on int64 category numbers
    np.testing.assert_allclose(reference, session.evaluation_net().predict(session.theta, X), rtol=2e-5, atol=2e-6)


def test_an_embedding_with_other_columns_is_refused_for_onnx(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    X = np.random.default_rng(2).integers(0, 4, (10, 3)).astype(float)
    write_csv(tmp_path / "data.csv", X, X[:, :1], inputs=["a", "b", "c"])
    (tmp_path / "model.toml").write_text(EMBEDDING.format(extra=', "c"'), encoding="utf-8")
    code = cli.main(["export", str(tmp_path / "model.toml"), "--to", str(tmp_path / "net.onnx")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert err.startswith("stepper: layer L1 (embedding 3->7): ONNX's Gather reads an integer input, so Stepper "
                          "exports an embedding only as the first layer with every input column a category column")
    assert not (tmp_path / "net.onnx").exists()


def test_the_glaze_defects_scenario_goes_to_onnx_and_opens_with_the_same_costs(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The bundled 2-D convolution scenario, written as ONNX and opened again from the graph with the scenario's
    # own [data] table: the same training and validation costs, and onnxruntime's outputs give the same cost.
    scenario = Path(__file__).resolve().parents[1] / "scenarios" / "glaze-defects"
    original = load_setup(scenario / "model.toml")
    export([str(scenario / "model.toml"), "--to", str(tmp_path / "net.onnx")], capsys)
    export([str(scenario / "model.toml"), "--to", str(tmp_path / "net32.onnx"), "--dtype", "float32"], capsys)
    text = (scenario / "model.toml").read_text(encoding="utf-8")
    head = text[: text.index("[init]")].replace('file = "data.csv"', f'file = "{scenario / "data.csv"}"')
    (tmp_path / "model.toml").write_text('network = "net.onnx"\n' + head, encoding="utf-8")
    graph = load_setup(tmp_path / "model.toml")
    data = original.data
    assert graph.network.input_shape == (1, 8, 8) and graph.data.X.tobytes() == data.X.tobytes()
    for X, Y in ((data.X, data.Y), (data.X_val, data.Y_val)):
        cost = original.network.cost(original.theta0, X, Y)
        assert graph.network.cost(graph.theta0, X, Y) == cost
        # Categorical cross-entropy, the mean over rows of -log(p of the row's class), from onnxruntime's outputs.
        p = run_onnxruntime(tmp_path / "net32.onnx", X).astype(np.float64)
        assert float(np.mean(-np.log(np.sum(p * Y, axis=1)))) == pytest.approx(cost, rel=1e-5)
