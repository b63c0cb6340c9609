"""ONNX graphs opened as Stepper networks: the forward pass against onnxruntime, slopes against autograd.

Outside references: onnxruntime (the ONNX project's own inference engine) runs
each graph on the same inputs; float64 graphs must agree to 1e-12 relative,
float32 graphs to float32's precision (a few units in 1e-6: onnxruntime
computes in float32, Stepper in float64 from the same float32 values). The
ONNX operator specification (onnx.ai, Operators.md) defines what each
attribute means; onnxruntime is taken as its reading. The `autograd` package
differentiates an independent numpy transcription of a graph.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad
from onnx_graphs import chain, run_onnxruntime, save, write_csv

from stepper import cli
from stepper.core.gemm import ScaledDense
from stepper.core.layers import Dense
from stepper.formats.model_file import load_setup

# Each case: the chain's steps. Together they cover every supported operator
# and every attribute the importer reads.
CASES: dict[str, list[tuple[str, dict[str, Any]]]] = {
    "gemm": [("Gemm", {"units": 3}), ("Tanh", {}), ("Gemm", {"units": 2})],
    "gemm transB=1 (PyTorch's Linear)": [("Gemm", {"units": 5, "transB": 1}), ("Relu", {}),
                                         ("Gemm", {"units": 1, "transB": 1})],
    "gemm transB=1 alpha beta": [("Gemm", {"units": 3, "transB": 1, "alpha": 0.5, "beta": 2.0}),
                                 ("Sigmoid", {}), ("Gemm", {"units": 2, "alpha": 1.5, "beta": -0.25})],
    "gemm alpha only, no C": [("Gemm", {"units": 3, "alpha": 0.75, "C": None}), ("Softplus", {}),
                              ("Gemm", {"units": 1})],
    "gemm C of shape (1, n)": [("Gemm", {"units": 3, "C": "row"}), ("Tanh", {}), ("Gemm", {"units": 2, "C": "row"})],
    "matmul + add": [("MatMul", {"units": 4}), ("Relu", {}), ("MatMul", {"units": 2})],
    "matmul + add, bias first": [("MatMul", {"units": 3, "bias": "first"}), ("Tanh", {}),
                                 ("MatMul", {"units": 1, "bias": "first"})],
    "matmul without bias": [("MatMul", {"units": 3, "bias": None}), ("Sigmoid", {}), ("MatMul", {"units": 2})],
    "leaky relu default alpha": [("Gemm", {"units": 4}), ("LeakyRelu", {}), ("Gemm", {"units": 1})],
    "leaky relu alpha 0.3": [("Gemm", {"units": 4}), ("LeakyRelu", {"alpha": 0.3}), ("Gemm", {"units": 1})],
    "softmax last axis": [("Gemm", {"units": 5}), ("Tanh", {}), ("Gemm", {"units": 3}), ("Softmax", {})],
    "softmax axis=1": [("Gemm", {"units": 3}), ("Softmax", {"axis": 1})],
    "identity and flatten": [("Flatten", {}), ("Gemm", {"units": 3}), ("Identity", {}), ("Relu", {}),
                             ("Flatten", {"axis": 1}), ("Gemm", {"units": 2})],
}


def _setup(tmp_path: Path, model: Any, n_out: int, loss: str = "mean_squared_error", n_rows: int = 12,
           transposed: bool = False, n_in: int = 4):
    onnx_path = save(model, tmp_path / "net.onnx")
    rng = np.random.default_rng(5)
    X = rng.normal(size=(n_rows, n_in))
    Y = rng.normal(size=(n_rows, n_out))
    write_csv(tmp_path / "data.csv", X, Y)
    toml = tmp_path / "model.toml"
    toml.write_text(f'network = "net.onnx"\nloss = "{loss}"\n[data]\nfile = "data.csv"\ninputs = "*"\n'
                    f'targets = [{", ".join(repr(f"y{i}") for i in range(n_out))}]\n'.replace("'", '"'),
                    encoding="utf-8")
    return onnx_path, load_setup(toml), X


@pytest.mark.parametrize("name", list(CASES))
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_forward_equals_onnxruntime(tmp_path: Path, name: str, dtype: type) -> None:
    steps = CASES[name]
    model = chain(steps, dtype=dtype)
    n_out = model.graph.output[0].type.tensor_type.shape.dim[1].dim_value
    onnx_path, setup, X = _setup(tmp_path, model, n_out)
    ours = setup.network.predict(setup.theta0, setup.data.X)
    reference = run_onnxruntime(onnx_path, X)  # onnxruntime: the outside reference
    if dtype == np.float64:
        np.testing.assert_allclose(ours, reference, rtol=1e-12, atol=1e-14)
    else:
        # float32 arithmetic in onnxruntime: about 1e-7 relative per operation.
        np.testing.assert_allclose(ours, reference.astype(np.float64), rtol=2e-5, atol=2e-6)
    assert setup.origin is not None and setup.origin.dtype == ("float64" if dtype == np.float64 else "float32")


def test_gemm_with_alpha_and_beta_keeps_the_file_values(tmp_path: Path) -> None:
    model = chain(CASES["gemm transB=1 alpha beta"])
    _, setup, _ = _setup(tmp_path, model, 2)
    first = setup.network.layers[0]
    assert isinstance(first, ScaledDense) and (first.alpha, first.beta) == (0.5, 2.0)
    # The weights are the initializer's values exactly, in Stepper's (in, out) arrangement.
    from onnx import numpy_helper

    B = numpy_helper.to_array(model.graph.initializer[0])  # fc0.weight, (out, in) since transB = 1
    block = setup.network.layout.find_block(0, "W")
    assert np.array_equal(setup.theta0[block.start : block.stop].reshape(block.shape), B.T)
    assert isinstance(setup.network.layers[1], ScaledDense)
    plain = load_setup_from_case(tmp_path / "plain", "gemm")
    assert all(isinstance(layer, Dense) for layer in plain.network.layers)


def load_setup_from_case(folder: Path, name: str):
    folder.mkdir()
    model = chain(CASES[name])
    return _setup(folder, model, model.graph.output[0].type.tensor_type.shape.dim[1].dim_value)[1]


def test_transposed_input_gemm_equals_onnxruntime(tmp_path: Path) -> None:
    # Gemm with transA = 1 on a graph whose input is features x samples.
    model = chain([("Gemm", {"units": 3, "transA": 1, "transB": 1}), ("Tanh", {}), ("Gemm", {"units": 1})],
                  transposed_input=True)
    onnx_path, setup, X = _setup(tmp_path, model, 1)
    assert setup.origin is not None and setup.origin.input_transposed
    reference = run_onnxruntime(onnx_path, X, transposed_input=True)  # onnxruntime
    np.testing.assert_allclose(setup.network.predict(setup.theta0, setup.data.X), reference, rtol=1e-12)


def test_slopes_of_a_scaled_gemm_equal_autograd(tmp_path: Path) -> None:
    # An independent transcription of the graph in autograd.numpy, differentiated
    # by the autograd package, on the initializers as the file holds them.
    from onnx import numpy_helper

    model = chain([("Gemm", {"units": 3, "transB": 1, "alpha": 0.5, "beta": 2.0}), ("LeakyRelu", {"alpha": 0.2}),
                   ("MatMul", {"units": 1})])
    _, setup, X = _setup(tmp_path, model, 1)
    init = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    Y = setup.data.Y

    def cost(B: Any, C: Any, W: Any, b: Any) -> Any:
        Z = 0.5 * anp.dot(X, B.T) + 2.0 * C
        A = anp.where(Z > 0, Z, np.float32(0.2).item() * Z)
        out = anp.dot(A, W) + b
        return anp.mean((out - Y) ** 2)

    args = [init["fc0.weight"], init["fc0.bias"], init["w2"], init["b2"]]
    value, slopes = setup.network.cost_and_slopes(setup.theta0, setup.data.X, Y)
    assert value == pytest.approx(float(cost(*args)), rel=1e-12)
    assert setup.origin is not None
    by_source = dict(zip(setup.origin.source_names(setup.network.layout), slopes))
    for k, name in enumerate(["fc0.weight", "fc0.bias", "w2", "b2"]):
        expected = grad(cost, argnum=k)(*args)
        for index in np.ndindex(*expected.shape):
            key = f"{name}[{','.join(map(str, index))}]"
            assert by_source[key] == pytest.approx(expected[index], rel=1e-10, abs=1e-14), key


def test_each_weight_is_named_both_ways_in_check_json(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = chain(CASES["gemm transB=1 (PyTorch's Linear)"])
    onnx_path, _, _ = _setup(tmp_path, model, 1)
    code = cli.main(["check", str(onnx_path), "--data", str(tmp_path / "data.csv"), "--targets", "y0",
                     "--loss", "mean_squared_error", "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    rows = {row["name"]: row["source"] for row in doc["weights"]}
    # Stepper's W[i, j] (input i to unit j) is the (out, in) initializer's [j, i].
    assert rows["L1.W[3,0]"] == "fc0.weight[0,3]"
    assert rows["L1.b[4]"] == "fc0.bias[4]"
    assert rows["L2.W[2,0]"] == "fc2.weight[0,2]"
    assert doc["network"]["weights_from"] == {"file": str(onnx_path), "kind": "onnx", "layout": "onnx"}
    assert doc["network"]["inputs"] == 4 and doc["passed"] is True


def test_open_check_and_run_take_an_onnx_file_with_data_options(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    model = chain(CASES["softmax last axis"])
    onnx_path = save(model, tmp_path / "net.onnx")
    rng = np.random.default_rng(2)
    X = rng.normal(size=(30, 4))
    classes = rng.integers(0, 3, size=(30, 1)).astype(float)
    write_csv(tmp_path / "data.csv", X, classes, targets=["kind"])
    options = ["--data", str(tmp_path / "data.csv"), "--targets", "kind", "--loss", "categorical_cross_entropy"]
    assert cli.main(["check", str(onnx_path), *options]) == 0
    out = capsys.readouterr().out
    assert "PASS" in out
    assert cli.main(["run", str(onnx_path), *options, "--steps", "20", "--rate", "0.5", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["cost_after"] < doc["cost_before"]
    # The class numbers became one-hot targets: the cost is the categorical
    # cross-entropy of the softmax outputs, -mean log p[class] (its definition).
    onnx_out = run_onnxruntime(onnx_path, X)  # onnxruntime
    expected = -np.mean(np.log(onnx_out[np.arange(30), classes[:, 0].astype(int)]))
    assert doc["cost_before"] == pytest.approx(expected, rel=1e-12)


def test_a_journal_of_an_onnx_file_opened_with_data_options_replays(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    # The journal records the options' document, so replay rebuilds the same setup
    # (bit for bit, as the journal's own contract asks) without a model file.
    from stepper.commands.replay import replay

    model = chain(CASES["gemm transB=1 (PyTorch's Linear)"])
    onnx_path, _, _ = _setup(tmp_path, model, 1)
    journal = tmp_path / "run.jsonl"
    options = ["--data", str(tmp_path / "data.csv"), "--targets", "y0", "--loss", "mean_squared_error"]
    assert cli.main(["run", str(onnx_path), *options, "--steps", "7", "--rate", "0.05", "--journal", str(journal),
                     "--save", str(tmp_path / "ck.safetensors")]) == 0
    capsys.readouterr()
    rebuilt = replay(journal)
    from stepper.formats.checkpoint import load_checkpoint

    saved = load_checkpoint(tmp_path / "ck.safetensors", rebuilt.net.layout)
    assert rebuilt.step_count == 7 and rebuilt.theta.tobytes() == saved.theta.tobytes()
