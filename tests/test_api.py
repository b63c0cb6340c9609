"""The Python API (stepper.api) and the pytest helper (stepper.testing.check_layer).

Outside references: the README's example is run as written; onnxruntime runs
an ONNX file loaded and exported through the API; the slopes of the small
layers below are textbook calculus (for ``out = X * s + c``: ``d out / d s = X``,
``d out / d c = 1``, ``d out / d X = s``), and the helper must tell a backward
pass that follows them from one with a sign error.
"""

from __future__ import annotations

import importlib.util
import os
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from onnx_graphs import chain, run_onnxruntime, save, write_csv

from stepper import api
from stepper.errors import StepperError, UsageError
from stepper.testing import check_layer

ROOT = Path(__file__).resolve().parents[1]


def test_the_readme_example_runs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("### From Python"):]
    code = re.search(r"```python\n(.*?)```", section, re.S)
    assert code is not None
    monkeypatch.chdir(tmp_path)
    exec(compile(code.group(1), "README.md", "exec"), {"__name__": "readme_example"})
    assert (tmp_path / "tiny.onnx").is_file()


def test_load_an_onnx_file_check_step_and_export(tmp_path: Path) -> None:
    save(chain([("Gemm", {"units": 4, "transB": 1}), ("Tanh", {}), ("Gemm", {"units": 1, "transB": 1})]),
         tmp_path / "net.onnx")
    X = np.random.default_rng(3).normal(size=(40, 4))
    write_csv(tmp_path / "data.csv", X, np.cos(X[:, :1]), targets=["y"])
    setup = api.load(tmp_path / "net.onnx", data=tmp_path / "data.csv", targets=["y"], loss="mean_squared_error")
    report = api.check(setup)
    assert report.passed and report.counts["agree"] == setup.network.n_params
    assert report.row("L1.W[3,2]").source == "fc0.weight[2,3]"
    session = api.session(setup, rate=0.1)
    session.step(10)
    later = api.check(session)
    assert later.row("L1.W[3,2]").value == session.theta[setup.network.layout.lookup("L1.W[3,2]")]
    done = api.export(session, tmp_path / "trained.onnx")
    assert done.written_cost == session.train_cost()
    np.testing.assert_allclose(run_onnxruntime(tmp_path / "trained.onnx", X),  # onnxruntime
                               session.net.predict(session.theta, X), rtol=1e-12)


def test_load_a_model_file_or_a_bundled_scenario() -> None:
    assert api.load("kiln-tiny").network.n_params == api.load(ROOT / "scenarios" / "kiln-tiny").network.n_params
    with pytest.raises(UsageError, match="data, targets, inputs and loss are for an ONNX file"):
        api.load("kiln-tiny", loss="mean_squared_error")


def test_from_arrays_with_class_numbers_and_a_validation_set() -> None:
    rng = np.random.default_rng(8)
    X = rng.normal(size=(30, 2))
    kind = (X[:, 0] > 0).astype(float) + (X[:, 1] > 0)
    setup = api.from_arrays([{"units": 4, "activation": "tanh"}, {"units": 3, "activation": "softmax"}],
                            X, kind, "categorical_cross_entropy", X_val=X[:5], Y_val=kind[:5], seed=2)
    assert setup.data.Y.shape == (30, 3) and setup.data.n_val == 5
    assert np.array_equal(setup.data.Y.argmax(axis=1), kind)
    assert api.check(setup).passed


@pytest.mark.parametrize("Y, message", [
    (np.zeros((29, 1)), "Y: 29 rows, but X has 30"),
    (np.full((30, 1), np.nan), "Y: holds a value that is not a finite number"),
    (np.zeros((30, 1, 1)), "Y: expected shape (n_samples, n_columns), got (30, 1, 1)"),
])
def test_from_arrays_names_what_is_wrong(Y: np.ndarray, message: str) -> None:
    with pytest.raises(StepperError) as info:
        api.from_arrays([{"units": 1, "activation": "identity"}], np.zeros((30, 2)), Y, "mean_squared_error")
    assert info.value.message == message


def test_a_wrong_layer_table_is_named_like_a_model_file() -> None:
    with pytest.raises(StepperError) as info:
        api.from_arrays([{"units": 2, "activation": "swish"}], np.zeros((4, 2)), np.zeros((4, 2)),
                        "mean_squared_error")
    assert info.value.message.startswith("arrays (from arrays): layers[0].activation (L1): unknown 'swish'")


def test_open_app_runs_the_app_on_the_session(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    import stepper.ui.app as app_module

    seen: list[Any] = []
    monkeypatch.setattr(app_module, "run_app", lambda session, log, **kw: seen.append((session, log)) or 0)
    session = api.session(api.load("kiln-tiny"))
    assert api.open_app(session, tmp_path / "app.log") == 0
    assert seen == [(session, tmp_path / "app.log")]


# -- the pytest helper ---------------------------------------------------------------------------


class Scale:
    """``out = X * s + c`` unit by unit; ``sign`` = -1 puts a sign error into ds."""

    bias_keys = ("c",)

    def __init__(self, n_in: int, sign: float = 1.0, dx_sign: float = 1.0) -> None:
        self.n_out = n_in
        self.sign = sign
        self.dx_sign = dx_sign

    def init(self, rng: np.random.Generator) -> dict[str, np.ndarray]:
        return {"s": rng.normal(size=self.n_out), "c": rng.normal(size=self.n_out)}

    def forward(self, params: dict[str, np.ndarray], X: np.ndarray) -> tuple[np.ndarray, Any]:
        return X * params["s"] + params["c"], X

    def backward(self, params: dict[str, np.ndarray], X: Any, dOut: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray]:
        slopes = {"s": self.sign * (dOut * X).sum(axis=0), "c": dOut.sum(axis=0)}
        return slopes, self.dx_sign * dOut * params["s"]


def test_the_helper_passes_a_correct_layer() -> None:
    report = check_layer(Scale(4), n_in=4)
    assert report.passed and report.counts["agree"] == 8


def test_the_helper_fails_a_sign_error_naming_the_weights() -> None:
    with pytest.raises(AssertionError) as info:
        check_layer(Scale(4, sign=-1.0), n_in=4)
    message = str(info.value)
    assert message.startswith("Scale: 4 of 8 slopes disagree with finite differences (worst first: s[")
    assert "c[" not in message


def test_the_helper_fails_a_wrong_input_slope() -> None:
    with pytest.raises(AssertionError, match=r"^Scale: its input slopes dX disagree with finite differences "
                                             r"\(worst relative error [\d.e+]+ at sample \d, input \d\)$"):
        check_layer(Scale(3, dx_sign=-1.0), n_in=3)


def _gate(folder: str) -> Any:
    spec = importlib.util.spec_from_file_location(f"gate_{folder.replace('-', '_')}",
                                                  ROOT / "scenarios" / folder / "gate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.GatedUnits


def test_the_helper_on_the_bundled_gated_layers() -> None:
    check_layer(_gate("hive-gate-fixed")(n_in=5, units=3, options={}), n_in=5)
    with pytest.raises(AssertionError) as info:
        check_layer(_gate("hive-gate-buggy")(n_in=5, units=3, options={}), n_in=5)
    # The bundled bug forgets the gate in the bias slope: exactly the three b's.
    named = re.findall(r"(\w)\[(\d)\]: analytic", str(info.value))
    assert sorted(named) == [("b", "0"), ("b", "1"), ("b", "2")]


def test_the_helper_reports_a_layer_that_raises() -> None:
    class Broken(Scale):
        def forward(self, params: dict[str, np.ndarray], X: np.ndarray) -> tuple[np.ndarray, Any]:
            raise ValueError("no forward today")

    with pytest.raises(AssertionError, match="forward raised ValueError: no forward today"):
        check_layer(Broken(2), n_in=2)


def test_the_package_is_typed() -> None:
    assert (ROOT / "stepper" / "py.typed").is_file()
    assert os.path.getsize(ROOT / "stepper" / "py.typed") == 0
