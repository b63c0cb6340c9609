"""``stepper check`` through ``stepper.cli.main``: reports, JSON, exit codes, and bad input.

Exit codes (README.md): 0 every slope agrees (slopes at a kink are not judged), 1 at
least one disagrees or is only doubtful, 2 the input could not be used; bad input is
one line on stderr, never a traceback.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest

from stepper.cli import main
from stepper.core.layers import Dense

WriteModel = Callable[..., Path]

DATA = "x1,x2,y\n0.5,-1.0,0.3\n1.5,0.25,-0.2\n-0.7,0.8,0.9\n0.1,0.1,0.0\n"

MODEL = """\
name = "cli net"
loss = "mean_squared_error"

[data]
file = "data.csv"
inputs = ["x1", "x2"]
targets = ["y"]

[init]
scheme = "glorot_uniform"
seed = 2

[[layers]]
units = 3
activation = "tanh"

[[layers]]
units = 1
activation = "identity"
"""


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(["check", *argv])
    out, err = capsys.readouterr()
    return code, out, err


def run_json(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, dict[str, Any]]:
    code, out, err = run(capsys, *argv, "--json")
    assert err == ""
    return code, json.loads(out)


# -- a passing check ------------------------------------------------------------------------------


def test_table_report_passes(capsys: pytest.CaptureFixture[str], write_model: WriteModel) -> None:
    code, out, err = run(capsys, str(write_model(MODEL, DATA)))
    assert code == 0 and err == ""
    assert out.startswith("cli net: 13 parameters, 4 samples, loss mean_squared_error, central differences, ")
    for name in ("L1.W[0,0]", "L1.W[1,2]", "L1.b[2]", "L2.W[2,0]", "L2.b[0]"):
        assert f"\n{name} " in out
    assert "verdicts    13 agree, 0 doubtful, 0 disagree, 0 kink" in out
    assert "result      PASS: every slope agrees" in out


def test_worst_lists_only_n_weights(capsys: pytest.CaptureFixture[str], write_model: WriteModel) -> None:
    code, out, _ = run(capsys, str(write_model(MODEL, DATA)), "--worst", "2")
    assert code == 0
    listed = [line for line in out.splitlines() if line.startswith(("L1.", "L2."))]
    assert len(listed) == 2


def test_json_document(capsys: pytest.CaptureFixture[str], write_model: WriteModel) -> None:
    path = write_model(MODEL, DATA)
    code, doc = run_json(capsys, str(path), "--method", "forward", "--delta", "1e-7")
    assert code == 0
    assert doc["model"]["name"] == "cli net" and doc["model"]["path"] == str(path)
    network = doc["network"]
    assert network["loss"] == "mean_squared_error"
    assert network["inputs"] == 2 and network["parameters"] == 13
    assert [{k: layer[k] for k in ("inputs", "units", "activation", "bias")} for layer in network["layers"]] == [
        {"inputs": 2, "units": 3, "activation": "tanh", "bias": True},
        {"inputs": 3, "units": 1, "activation": "identity", "bias": True},
    ]
    assert doc["differences"] == {"method": "forward", "h": 1e-7}
    assert doc["samples"] == 4 and doc["passed"] is True
    weights = doc["weights"]
    assert [w["name"] for w in weights][:4] == ["L1.W[0,0]", "L1.W[0,1]", "L1.W[0,2]", "L1.W[1,0]"]
    keys = {"name", "layer", "kind", "indices", "value", "analytic", "numeric", "relative_error", "verdict"}
    assert all(keys <= set(w) for w in weights)
    by_name = {w["name"]: w for w in weights}
    assert by_name["L1.W[1,2]"]["layer"] == 1 and by_name["L1.W[1,2]"]["indices"] == [1, 2]
    assert by_name["L1.W[1,2]"]["kind"] == "weight" and by_name["L2.b[0]"]["kind"] == "bias"
    assert by_name["L2.b[0]"]["layer"] == 2 and by_name["L2.b[0]"]["indices"] == [0]
    assert {w["verdict"] for w in weights} == {"agree"}

    # The numbers in the document are the model's own: cost and slopes recomputed here.
    from stepper.formats.model_file import load_setup

    setup = load_setup(path)
    cost, slopes = setup.network.cost_and_slopes(setup.theta0, setup.data.X, setup.data.Y)
    assert doc["cost"] == pytest.approx(cost, rel=1e-15)
    np.testing.assert_allclose([w["analytic"] for w in weights], slopes, rtol=1e-15)
    np.testing.assert_allclose([w["value"] for w in weights], setup.theta0, rtol=0)
    np.testing.assert_allclose([w["numeric"] for w in weights], slopes, rtol=1e-4, atol=1e-8)


def test_samples_option(capsys: pytest.CaptureFixture[str], write_model: WriteModel) -> None:
    path = str(write_model(MODEL, DATA))
    code, doc = run_json(capsys, path, "--samples", "2")
    assert code == 0 and doc["samples"] == 2
    code, out, err = run(capsys, path, "--samples", "9")
    assert code == 2 and out == ""
    assert err == "stepper: --samples 9: the training set has only 4 samples\n"


# -- kinks and failures -------------------------------------------------------------------------

KINK_MODEL = """\
loss = "half_squared_error"

[data]
file = "data.csv"
inputs = ["x"]
targets = ["y"]

[[layers]]
units = 2
activation = "relu"
weights = [[1.0, -0.5]]
biases = [-0.99999999, 0.7]

[[layers]]
units = 1
activation = "identity"
weights = [[0.9], [-1.2]]
biases = [0.1]
"""


def test_kink_is_reported_not_failed(capsys: pytest.CaptureFixture[str], write_model: WriteModel) -> None:
    # x = 1: unit 0's pre-activation is 1 - 0.99999999 = 1e-8, within h of the ReLU kink.
    path = str(write_model(KINK_MODEL, "x,y\n1.0,2.0\n"))
    code, doc = run_json(capsys, path)
    assert code == 0 and doc["passed"] is True
    verdict = {w["name"]: w["verdict"] for w in doc["weights"]}
    assert verdict["L1.W[0,0]"] == "kink" and verdict["L1.b[0]"] == "kink"
    assert doc["counts"]["disagree"] == 0 and doc["counts"]["kink"] >= 2
    code, out, _ = run(capsys, path)
    assert code == 0
    assert (f"result      PASS: every slope agrees, except {doc['counts']['kink']} at a kink, where finite "
            "differences cannot judge\n") in out


def scaled_first_layer_slopes(monkeypatch: pytest.MonkeyPatch, factor: float) -> None:
    """Make the tanh layer's analytic dW come out ``factor`` times the true one."""
    original = Dense.backward_from_z

    def scaled(self: Dense, params: Any, cache: Any, dZ: Any, *args: Any, **kwargs: Any) -> Any:
        grads, dX = original(self, params, cache, dZ, *args, **kwargs)
        if self.activation.name == "tanh":
            grads = dict(grads, W=grads["W"] * factor)
        return grads, dX

    monkeypatch.setattr(Dense, "backward_from_z", scaled)


def test_wrong_backward_pass_fails_with_exit_1(capsys: pytest.CaptureFixture[str], write_model: WriteModel,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    # A deliberately wrong analytic slope: the first layer's dW comes out 2% too large.
    scaled_first_layer_slopes(monkeypatch, 1.02)
    path = str(write_model(MODEL, DATA))
    code, doc = run_json(capsys, path)
    assert code == 1 and doc["passed"] is False
    verdict = {w["name"]: w["verdict"] for w in doc["weights"]}
    assert {verdict[f"L1.W[{i},{j}]"] for i in range(2) for j in range(3)} == {"disagree"}
    assert {verdict["L2.W[0,0]"], verdict["L1.b[0]"]} == {"agree"}
    code, out, err = run(capsys, path)
    assert code == 1 and err == ""
    assert "XX  disagree" in out and "result      FAIL: 6 slopes disagree\n" in out


def test_only_doubtful_slopes_fail_and_say_so(capsys: pytest.CaptureFixture[str], write_model: WriteModel,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    # README: exit 0 only when every slope agrees; a doubtful slope (relative error
    # between 1e-5 and 1e-3) is not confirmed, so the check exits 1 and says so. A
    # relative error of 1e-4 on six slopes makes them doubtful and nothing worse.
    scaled_first_layer_slopes(monkeypatch, 1.0001)
    path = str(write_model(MODEL, DATA))
    code, doc = run_json(capsys, path)
    assert code == 1 and doc["passed"] is False
    assert doc["counts"] == {"agree": 7, "doubtful": 6, "disagree": 0, "kink": 0, "unresolved": 0}
    code, out, err = run(capsys, path)
    assert code == 1 and err == ""
    assert ("result      FAIL: 6 slopes are doubtful (relative error between 1e-5 and 1e-3), none "
            "disagrees: not confirmed; central differences or another step may settle them\n") in out
    # Just inside the agreement threshold (a relative error of 0.9e-5) the check passes.
    monkeypatch.undo()
    scaled_first_layer_slopes(monkeypatch, 1.000009)
    code, out, _ = run(capsys, path)
    assert code == 0 and "result      PASS: every slope agrees\n" in out


def test_cost_that_overflows_fails_with_valid_json(capsys: pytest.CaptureFixture[str],
                                                   write_model: WriteModel) -> None:
    text = MODEL.replace('[init]\nscheme = "glorot_uniform"\nseed = 2\n', "").replace(
        'activation = "tanh"', 'activation = "tanh"\nweights = [[1, 2, 3], [4, 5, 6]]').replace(
        'activation = "identity"', 'activation = "identity"\nweights = [[1e300], [1e300], [1e300]]')
    path = str(write_model(text, DATA))
    code, out, err = run(capsys, path, "--json")
    assert code == 1 and err == ""

    def refuse(constant: str) -> None:
        raise AssertionError(f"{constant} is not JSON (RFC 8259)")

    doc = json.loads(out, parse_constant=refuse)
    assert doc["cost"] is None and doc["passed"] is False
    assert doc["counts"]["disagree"] == doc["network"]["parameters"]
    code, out, err = run(capsys, path)
    assert code == 1 and err == ""
    assert "(not a finite number: no slope can be checked here)" in out and "FAIL" in out


# -- bad input: one line on stderr, exit code 2 ----------------------------------------------------


def bad(capsys: pytest.CaptureFixture[str], tmp_path: Path, *argv: str) -> str:
    code, out, err = run(capsys, *argv)
    assert code == 2
    assert out == ""
    assert err.endswith("\n") and err.count("\n") == 1, err
    assert "Traceback" not in err
    return err.rstrip("\n").replace(str(tmp_path) + "/", "")


def test_missing_model_file(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    assert bad(capsys, tmp_path, str(tmp_path / "absent.toml")) == "stepper: absent.toml: no such model file"


def test_invalid_toml(capsys: pytest.CaptureFixture[str], tmp_path: Path, write_model: WriteModel) -> None:
    path = write_model('loss = "mean_squared_error"\n[data\n', DATA)
    assert bad(capsys, tmp_path, str(path)) == (
        "stepper: model.toml: not valid TOML (Expected ']' at the end of a table declaration "
        "(at line 2, column 6))")


# (text to replace in MODEL, replacement, message after "stepper: model.toml: ")
MODEL_MISTAKES = [
    ('activation = "tanh"', 'activation = "swish"',
     "layers[0].activation (L1): unknown 'swish' (expected one of: identity, sigmoid, tanh, relu, leaky_relu, "
     "softplus, softmax)"),
    ('"mean_squared_error"', '"absolute_error"',
     "loss: unknown 'absolute_error' (expected one of: half_squared_error, mean_squared_error, "
     "binary_cross_entropy, categorical_cross_entropy)"),
    ("units = 3", 'units = "three"', "layers[0].units (L1): expected an integer, got the string 'three'"),
    ("seed = 2", "seed = 2\nsead = 3", "init.sead: unknown key (allowed: file, layout, names, range, scheme, seed)"),
    ("units = 1\n", "units = 2\n",
     "layers[1].units (L2): the last layer has 2 units but [data].targets names 1 column(s); they must match; "
     "if 'y' holds class numbers, end with a softmax layer of 2 units and Stepper builds the one-hot targets "
     "from them"),
    ('activation = "tanh"', 'activation = "tanh"\nweights = [[0.1, 0.2], [0.3, 0.4]]',
     "layers[0].weights (L1): shape 2x2 does not fit the layer, which needs 2x3 (inputs x units)"),
]


@pytest.mark.parametrize("old,new,expected", MODEL_MISTAKES)
def test_model_mistake(capsys: pytest.CaptureFixture[str], tmp_path: Path, write_model: WriteModel,
                       old: str, new: str, expected: str) -> None:
    assert old in MODEL
    path = write_model(MODEL.replace(old, new, 1), DATA)
    assert bad(capsys, tmp_path, str(path)) == f"stepper: model.toml: {expected}"


DATA_MISTAKES = [
    ("x1,y\n0.5,0.3\n", "data.csv: line 1: no column named 'x2' (the header has: x1, y)"),
    ("x1,x2,y\n0.5,-1.0,0.3\n1.5,abc,-0.2\n", "data.csv: line 3, column 'x2': 'abc' is not a finite number"),
    ("x1,x2,y\n0.5,-1.0,0.3\n1.5,0.25,NaN\n", "data.csv: line 3, column 'y': 'NaN' is not a finite number"),
    ("", "data.csv: the file is empty (expected a header row, then data rows)"),
    ("x1,x2,y\n", "data.csv: no data rows after the header"),
]


@pytest.mark.parametrize("csv_text,expected", DATA_MISTAKES)
def test_data_mistake(capsys: pytest.CaptureFixture[str], tmp_path: Path, write_model: WriteModel,
                      csv_text: str, expected: str) -> None:
    path = write_model(MODEL, csv_text)
    assert bad(capsys, tmp_path, str(path)) == f"stepper: {expected}"


@pytest.mark.parametrize("step,reason", [("abc", "is not a number"), ("0", "must be a positive number"),
                                         ("-1e-6", "must be a positive number"),
                                         ("nan", "must be a positive number"),
                                         ("inf", "must be a positive number")])
def test_bad_delta(capsys: pytest.CaptureFixture[str], tmp_path: Path, write_model: WriteModel, step: str,
                  reason: str) -> None:
    path = write_model(MODEL, DATA)
    assert bad(capsys, tmp_path, str(path), f"--delta={step}") == (
        f"stepper: check: argument --delta: {step!r} {reason}")


def test_bad_method(capsys: pytest.CaptureFixture[str], tmp_path: Path, write_model: WriteModel) -> None:
    path = write_model(MODEL, DATA)
    assert bad(capsys, tmp_path, str(path), "--method", "backward").startswith(
        "stepper: check: argument --method: invalid choice: 'backward'")
