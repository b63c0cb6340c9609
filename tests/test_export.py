"""Sending the weights back: ONNX that onnxruntime runs, and safetensors in PyTorch's layout or Stepper's.

Outside references: onnxruntime (the ONNX project's inference engine) runs
every exported graph; the safetensors library reads every exported tensor
file; PyTorch's documented ``Linear`` (``y = x A^T + b``, ``weight`` of shape
``(out, in)``) is applied in plain numpy to the tensors read back.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from onnx_graphs import chain, run_onnxruntime, save, write_csv
from safetensors.numpy import load_file

from stepper import cli
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"

STEPS: list[tuple[str, dict[str, Any]]] = [
    ("Gemm", {"units": 5, "transB": 1, "alpha": 0.5, "beta": 2.0}), ("LeakyRelu", {"alpha": 0.3}),
    ("MatMul", {"units": 3, "bias": "first"}), ("Tanh", {}), ("Gemm", {"units": 2, "C": "row"}),
]


def onnx_model(tmp_path: Path, dtype: type = np.float64, steps: list[tuple[str, dict[str, Any]]] = STEPS,
               transposed: bool = False) -> tuple[Path, np.ndarray]:
    """``model.toml`` naming an ONNX graph, and the data's inputs ``X``."""
    save(chain(steps, dtype=dtype, transposed_input=transposed), tmp_path / "net.onnx")
    X = np.random.default_rng(4).normal(size=(25, 4))
    write_csv(tmp_path / "data.csv", X, np.sin(X[:, :2]))
    (tmp_path / "model.toml").write_text('network = "net.onnx"\nloss = "mean_squared_error"\n[data]\n'
                                         'file = "data.csv"\ninputs = "*"\ntargets = ["y0", "y1"]\n',
                                         encoding="utf-8")
    return tmp_path / "model.toml", X


def trained(model: Path, steps: int = 5) -> Session:
    session = Session(load_setup(model), rate=0.05)
    session.step(steps)
    return session


def export(args: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    assert cli.main(["export", *args]) == 0
    return capsys.readouterr().out


def test_onnx_import_export_import_is_bit_exact_in_float64(tmp_path: Path,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    model, _ = onnx_model(tmp_path)
    setup = load_setup(model)
    out = tmp_path / "again" / "net.onnx"
    export([str(model), "--to", str(out)], capsys)
    again = tmp_path / "again" / "model.toml"
    again.write_text(model.read_text(encoding="utf-8").replace('"data.csv"', f'"{tmp_path / "data.csv"}"'),
                     encoding="utf-8")
    assert load_setup(again).theta0.tobytes() == setup.theta0.tobytes()


@pytest.mark.parametrize("transposed", [False, True])
def test_exported_onnx_after_steps_runs_in_onnxruntime_as_stepper_computes(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], transposed: bool) -> None:
    steps = STEPS if not transposed else [("Gemm", {"units": 3, "transA": 1, "transB": 1}), ("Tanh", {}),
                                          ("Gemm", {"units": 2})]
    model, X = onnx_model(tmp_path, steps=steps, transposed=transposed)
    session = trained(model)
    ck = session.save_checkpoint(tmp_path / "ck.safetensors")
    out = tmp_path / "trained.onnx"
    text = export([str(model), "--resume", str(ck), "--to", str(out)], capsys)
    assert f"wrote {out} (ONNX, float64" in text
    ours = session.net.predict(session.theta, X)
    np.testing.assert_allclose(run_onnxruntime(out, X, transposed), ours, rtol=1e-12)  # onnxruntime
    assert not np.allclose(run_onnxruntime(tmp_path / "net.onnx", X, transposed), ours)  # the steps moved it


def test_a_float64_graph_exported_as_float32(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model, X = onnx_model(tmp_path)
    session = trained(model)
    ck = session.save_checkpoint(tmp_path / "ck.safetensors")
    out = tmp_path / "small.onnx"
    text = export([str(model), "--resume", str(ck), "--to", str(out), "--dtype", "float32"], capsys)
    assert "Stepper's, before rounding to float32" in text
    reference = run_onnxruntime(out, X)  # onnxruntime, in float32
    assert reference.dtype == np.float32
    np.testing.assert_allclose(reference, session.net.predict(session.theta, X), rtol=1e-5, atol=1e-6)


def test_a_float32_graph_goes_back_as_float32_bit_for_bit(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import onnx
    from onnx import numpy_helper

    model, _ = onnx_model(tmp_path, dtype=np.float32)
    out = tmp_path / "back.onnx"
    export([str(model), "--to", str(out)], capsys)
    before = {t.name: numpy_helper.to_array(t) for t in onnx.load(str(tmp_path / "net.onnx")).graph.initializer}
    after = {t.name: numpy_helper.to_array(t) for t in onnx.load(str(out)).graph.initializer}
    assert before.keys() == after.keys()
    for name in before:
        assert after[name].dtype == np.float32 and after[name].tobytes() == before[name].tobytes(), name


def test_a_model_file_network_exports_to_onnx(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Every activation a model file can name, and a softmax output.
    text = (ROOT / "seed-sorter" / "model.toml").read_text(encoding="utf-8").replace(
        'file = "data.csv"', f'file = "{(ROOT / "seed-sorter" / "data.csv").as_posix()}"')
    for activation in ("sigmoid", "relu", "leaky_relu", "softplus", "identity"):
        text = text.replace('units = 3\nactivation = "softmax"',
                            f'units = 5\nactivation = "{activation}"\n\n[[layers]]\nunits = 3\nactivation = "softmax"')
    model = tmp_path / "model.toml"
    model.write_text(text, encoding="utf-8")
    setup = load_setup(model)
    out = tmp_path / "sorter.onnx"
    export([str(model), "--to", str(out)], capsys)
    X = setup.data.X
    # onnxruntime on the float64 graph; ONNX stores LeakyRelu's alpha as float32,
    # which moves outputs by about 1e-10 of the negative parts.
    np.testing.assert_allclose(run_onnxruntime(out, X), setup.network.predict(setup.theta0, X), rtol=1e-9)


def test_torch_layout_safetensors_applied_in_numpy_give_the_same_cost(tmp_path: Path,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    model = ROOT / "bakery-demand" / "model.toml"
    session = trained(model, 8)
    ck = session.save_checkpoint(tmp_path / "ck.safetensors")
    out = tmp_path / "state.safetensors"
    export([str(model), "--resume", str(ck), "--to", str(out)], capsys)
    tensors = load_file(str(out))  # the safetensors library reads it
    assert sorted(tensors) == ["0.bias", "0.weight", "2.bias", "2.weight"]  # Linear, Tanh, Linear
    X, Y = session.setup.data.X, session.setup.data.Y
    # PyTorch's Linear, y = x A^T + b, with A of shape (out, in).
    hidden = np.tanh(X @ tensors["0.weight"].T + tensors["0.bias"])
    out_values = hidden @ tensors["2.weight"].T + tensors["2.bias"]
    assert np.mean((out_values - Y) ** 2) == pytest.approx(session.train_cost(), rel=1e-13)


def test_torch_and_stepper_layouts_read_back_bit_for_bit(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = ROOT / "bakery-demand" / "model.toml"
    session = trained(model, 3)
    ck = session.save_checkpoint(tmp_path / "ck.safetensors")
    base = model.read_text(encoding="utf-8").replace('file = "data.csv"',
                                                     f'file = "{(ROOT / "bakery-demand" / "data.csv").as_posix()}"')
    init_start = base.index("[init]")
    init_end = base.index("[[layers]]")
    for layout in ("torch", "stepper"):
        out = tmp_path / f"{layout}.safetensors"
        export([str(model), "--resume", str(ck), "--to", str(out), "--layout", layout], capsys)
        again = tmp_path / f"{layout}.toml"
        again.write_text(base[:init_start] + f'[init]\nfile = "{out.name}"\nlayout = "{layout}"\n\n'
                         + base[init_end:], encoding="utf-8")
        assert load_setup(again).theta0.tobytes() == session.theta.tobytes(), layout


def test_weights_from_a_state_dict_go_back_under_its_names(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from safetensors.numpy import save_file

    rng = np.random.default_rng(9)
    state = {"net.0.weight": rng.normal(size=(6, 4)).astype(np.float32), "net.0.bias": np.zeros(6, np.float32),
             "net.3.weight": rng.normal(size=(1, 6)).astype(np.float32), "net.3.bias": np.ones(1, np.float32)}
    save_file(state, str(tmp_path / "state.safetensors"))
    text = (ROOT / "bakery-demand" / "model.toml").read_text(encoding="utf-8").replace(
        'file = "data.csv"', f'file = "{(ROOT / "bakery-demand" / "data.csv").as_posix()}"')
    text = text[: text.index("[init]")] + '[init]\nfile = "state.safetensors"\nlayout = "torch"\n\n' + \
        '[[layers]]\nactivation = "tanh"\n\n[[layers]]\nactivation = "identity"\n'
    model = tmp_path / "model.toml"
    model.write_text(text, encoding="utf-8")
    out = tmp_path / "back.safetensors"
    assert "float32" in export([str(model), "--to", str(out)], capsys)
    back = load_file(str(out))
    assert back.keys() == state.keys()
    for name in state:
        assert back[name].dtype == np.float32 and back[name].tobytes() == state[name].tobytes(), name


@pytest.mark.parametrize("args, message", [
    (["--to", "{dir}/w.safetensors", "--layout", "sideways"], None),
    (["--to", "{dir}/w.onnx", "--layout", "torch"],
     "{dir}/w.onnx: --layout is for a .safetensors file; an ONNX file has the graph's own layout"),
    (["--to", "{dir}/w.pt"], "{dir}/w.pt: export writes a .onnx or a .safetensors file"),
    (["--to", "{dir}/net.onnx"],
     "{dir}/net.onnx: is a file this model was read from; export never overwrites its inputs (choose another name)"),
    (["--to", "{dir}/ck.safetensors", "--resume", "{dir}/ck.safetensors"],
     "{dir}/ck.safetensors: is a file this model was read from; export never overwrites its inputs (choose "
     "another name)"),
])
def test_export_refusals_are_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str],
                                      message: str | None) -> None:
    model, _ = onnx_model(tmp_path)
    trained(model).save_checkpoint(tmp_path / "ck.safetensors")
    capsys.readouterr()
    before = (tmp_path / "net.onnx").read_bytes(), (tmp_path / "ck.safetensors").read_bytes()
    assert cli.main(["export", str(model), *[a.format(dir=tmp_path) for a in args]]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and err.startswith("stepper: ")
    if message is not None:
        assert err == f"stepper: {message.format(dir=tmp_path)}\n"
    assert ((tmp_path / "net.onnx").read_bytes(), (tmp_path / "ck.safetensors").read_bytes()) == before


def test_a_custom_layer_has_no_onnx_operator(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model = ROOT / "hive-gate-fixed" / "model.toml"
    assert cli.main(["export", str(model), "--to", str(tmp_path / "gate.onnx")]) == 2
    assert "has no ONNX operator; export its weights to a .safetensors file instead" in capsys.readouterr().err
    export([str(model), "--to", str(tmp_path / "gate.safetensors"), "--layout", "stepper"], capsys)
    assert "L2.V" in load_file(str(tmp_path / "gate.safetensors"))


def test_an_export_gets_the_usual_file_mode(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import os
    import stat

    old = os.umask(0o022)
    try:
        export([str(ROOT / "kiln-tiny"), "--to", str(tmp_path / "kiln.onnx")], capsys)
    finally:
        os.umask(old)
    assert stat.S_IMODE((tmp_path / "kiln.onnx").stat().st_mode) == 0o644


def test_a_scaled_gemm_has_no_torch_layout(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Gemm's alpha and beta have no counterpart in PyTorch's Linear: refused rather than written wrong.
    model, _ = onnx_model(tmp_path)
    assert cli.main(["export", str(model), "--to", str(tmp_path / "w.safetensors")]) == 2
    assert capsys.readouterr().err == (
        "stepper: layer L1 (dense 4->5 leaky_relu(alpha=0.3) (alpha 0.5, beta 2)) scales its product by "
        "constants that a PyTorch Linear does not have; export to .onnx, or use --layout stepper\n")
    export([str(model), "--to", str(tmp_path / "w.safetensors"), "--layout", "stepper"], capsys)
