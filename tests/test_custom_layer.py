"""Custom layers: loading, checking the user's results, messages, and the input-slope check."""

from __future__ import annotations

import json
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper import cli
from stepper.core.input_slopes import check_input_slopes
from stepper.formats.custom_layer import CustomLayer
from stepper.formats.model_file import load_setup

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"

#: A correct custom layer, out = X @ M + t, used as the base of every broken variant below.
MIX = '''\
import numpy as np


class Mix:
    bias_keys = ("t",)

    def __init__(self, n_in, units, options):
        self.n_in = n_in
        self.n_out = units if units is not None else n_in
        self.spread = options.get("spread", 0.5)

    def init(self, rng):
        return {"M": rng.normal(0.0, self.spread, (self.n_in, self.n_out)), "t": np.zeros(self.n_out)}

    def forward(self, params, X):
        out = X @ params["M"] + params["t"]
        return out, X

    def backward(self, params, X, dOut):
        slopes = {"M": X.T @ dOut, "t": dOut.sum(axis=0)}
        dX = dOut @ params["M"].T
        return slopes, dX
'''

@pytest.fixture
def model_with(custom_model):
    """Write model.toml, data.csv and mix.py (the base layer with one replacement) into tmp_path."""

    def write(old: str = "", new: str = "", extra: str = "") -> Path:
        source = MIX
        if old:
            assert old in source
            source = source.replace(old, new)
        return custom_model(source, "mix.py", "Mix", extra)

    return write


def line_of(path: Path, text: str) -> int:
    return 1 + next(i for i, line in enumerate(path.read_text().splitlines()) if text in line)


# -- the bundled scenarios -------------------------------------------------------------------


def test_the_buggy_scenario_fails_and_names_the_wrong_parameters(capsys) -> None:
    code = cli.main(["check", str(SCENARIOS / "hive-gate-buggy"), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 1 and report["passed"] is False
    wrong = {w["name"] for w in report["weights"] if w["verdict"] == "disagree"}
    assert wrong == {"L2.b[0]", "L2.b[1]", "L2.b[2]"}
    assert report["counts"]["agree"] == report["network"]["parameters"] - 3
    # The bug is in a parameter slope only: the layer's input slopes are right.
    assert [c["passed"] for c in report["input_slopes"]] == [True]
    code = cli.main(["check", str(SCENARIOS / "hive-gate-buggy"), "--worst", "3"])
    out = capsys.readouterr().out
    assert code == 1
    assert all(f"L2.b[{j}]" in out for j in range(3)) and "XX  disagree" in out
    assert "result      FAIL: 3 slopes disagree\n" in out


def test_the_fixed_scenario_passes(capsys) -> None:
    code = cli.main(["check", str(SCENARIOS / "hive-gate-fixed"), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0 and report["passed"] is True
    assert report["counts"]["agree"] == report["network"]["parameters"]
    assert report["input_slopes"][0]["passed"] is True
    assert report["input_slopes"][0]["counts"]["agree"] == 8 * 5


def test_the_fixed_gate_layer_matches_autograd() -> None:
    # Reference: the autograd package differentiates the whole network written out
    # again from gate.py's docstring (value X W + b times gate sigmoid(X V + c)).
    setup = load_setup(SCENARIOS / "hive-gate-fixed" / "model.toml")
    net, theta, X, Y = setup.network, setup.theta0, setup.data.X, setup.data.Y
    sizes = [b.size for b in net.layout.blocks]
    shapes = [b.shape for b in net.layout.blocks]

    def unpack(t: np.ndarray) -> list[np.ndarray]:
        out, start = [], 0
        for size, shape in zip(sizes, shapes):
            out.append(anp.reshape(t[start : start + size], shape))
            start += size
        return out

    def hidden(t: np.ndarray) -> np.ndarray:
        W1, b1 = unpack(t)[:2]
        return anp.tanh(anp.dot(X, W1) + b1)

    def rest(t: np.ndarray, A1: np.ndarray) -> float:
        _, _, W, b, V, c, W3, b3 = unpack(t)
        gate = 1.0 / (1.0 + anp.exp(-(anp.dot(A1, V) + c)))
        out = anp.dot((anp.dot(A1, W) + b) * gate, W3) + b3
        return anp.mean((out - Y) ** 2)

    def cost(t: np.ndarray) -> float:
        return rest(t, hidden(t))

    value, slopes = net.cost_and_slopes(theta, X, Y)
    assert value == pytest.approx(cost(theta), rel=1e-12)
    np.testing.assert_allclose(slopes, grad(cost)(theta), rtol=1e-9, atol=1e-14)
    # The numeric input slopes of layer 2 agree with autograd's slope w.r.t. its input.
    check = check_input_slopes(net, theta, X, Y, 1, n_samples=6)
    reference = grad(lambda A1: rest(theta, A1))(hidden(theta))[check.samples]
    np.testing.assert_allclose(check.numeric, reference, rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(check.analytic, reference, rtol=1e-10, atol=1e-16)


def test_initial_values_come_from_the_class_with_a_seeded_generator(model_with) -> None:
    model = model_with()
    setup = load_setup(model)
    layer = setup.network.layers[1]
    assert isinstance(layer, CustomLayer)
    assert [(s.key, s.shape, s.kind) for s in layer.param_specs()] == [("M", (2, 3), "weight"), ("t", (3,), "bias")]
    # Documented contract: layer i draws from numpy.random.default_rng([seed, i]).
    expected = np.random.default_rng([2, 1]).normal(0.0, 0.5, (2, 3))
    np.testing.assert_array_equal(setup.network.views(setup.theta0)[1]["M"], expected)
    np.testing.assert_array_equal(load_setup(model).theta0, setup.theta0)
    assert not (model.parent / "__pycache__").exists()


def test_options_reach_the_class(model_with) -> None:
    setup = load_setup(model_with(extra="options = { spread = 2.0 }"))
    expected = np.random.default_rng([2, 1]).normal(0.0, 2.0, (2, 3))
    np.testing.assert_array_equal(setup.network.views(setup.theta0)[1]["M"], expected)


def test_a_wrong_input_slope_fails_the_input_check(model_with, capsys) -> None:
    model = model_with('dX = dOut @ params["M"].T', 'dX = 2.0 * dOut @ params["M"].T')
    code = cli.main(["check", str(model), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 1
    assert report["input_slopes"][0]["passed"] is False
    assert report["input_slopes"][0]["counts"]["disagree"] == 8 * 2
    wrong = {w["name"] for w in report["weights"] if w["verdict"] == "disagree"}
    assert wrong and all(name.startswith("L1.") for name in wrong)
    code = cli.main(["check", str(model)])
    out = capsys.readouterr().out
    assert "XX  backward's dX disagrees" in out


def test_only_a_wrong_input_slope_still_fails(model_with, capsys) -> None:
    # The first layer's dX is thrown away by the network, so only the input check sees it.
    model = model_with('dX = dOut @ params["M"].T', 'dX = dOut @ params["M"].T + 1.0')
    text = model.read_text().replace('[[layers]]\nunits = 2\nactivation = "tanh"\n\n', "", 1)
    model.write_text(text)
    code = cli.main(["check", str(model)])
    out = capsys.readouterr().out
    assert code == 1
    assert "result      FAIL: the input slopes (dX) of custom layer L1 disagree" in out


def test_a_non_finite_input_slope_fails_the_input_check(model_with, capsys) -> None:
    # A NaN in dX must not read as "not computed": the input check fails on it
    # (only the first layer's dX is thrown away by the network, as above).
    model = model_with('dX = dOut @ params["M"].T', 'dX = dOut @ params["M"].T * np.nan')
    text = model.read_text().replace('[[layers]]\nunits = 2\nactivation = "tanh"\n\n', "", 1)
    model.write_text(text)
    code = cli.main(["check", str(model), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 1
    assert report["input_slopes"][0]["passed"] is False
    assert report["input_slopes"][0]["counts"]["disagree"] == 8 * 2


# -- messages, through the command line -------------------------------------------------------


def run_check(model: Path, capsys) -> tuple[int, str]:
    code = cli.main(["check", str(model)])
    return code, capsys.readouterr().err


def test_an_exception_in_forward_names_the_layer_and_the_users_line(model_with, capsys) -> None:
    model = model_with('        out = X @ params["M"] + params["t"]\n',
                       '        out = X @ params["M"] + params["t"]\n        scale = 1 / 0\n')
    code, err = run_check(model, capsys)
    line = line_of(model.parent / "mix.py", "scale = 1 / 0")
    assert code == 2
    assert err == (f"stepper: {model}: layers[1] (L2, mix.py:Mix): forward raised ZeroDivisionError: "
                   f"division by zero [mix.py line {line} in forward: scale = 1 / 0]\n")


def test_the_traceback_keeps_only_the_users_frames(model_with, capsys) -> None:
    model = model_with("    def backward(self, params, X, dOut):\n",
                       "    def helper(self, v):\n        return v[99]\n\n"
                       "    def backward(self, params, X, dOut):\n        self.helper(dOut)\n")
    code, err = run_check(model, capsys)
    mix = model.parent / "mix.py"
    assert code == 2
    assert err.startswith(f"stepper: {model}: layers[1] (L2, mix.py:Mix): backward raised IndexError: ")
    assert err.endswith(f"[mix.py line {line_of(mix, 'self.helper(dOut)')} in backward: self.helper(dOut) > "
                        f"mix.py line {line_of(mix, 'return v[99]')} in helper: return v[99]]\n")
    assert "stepper/" not in err and err.count("\n") == 1


@pytest.mark.parametrize("old, new, message", [
    ('"M": X.T @ dOut', '"M": dOut.T @ X', "backward returned dM of shape (3, 2), expected (2, 3)"),
    (', "t": dOut.sum(axis=0)}', "}", "backward returned no dt (expected one array for each of: M, t)"),
    ('"M": X.T @ dOut', '"M": X.T @ dOut, "extra": X', "backward returned dextra, which init did not declare "
     "(parameters: M, t)"),
    ("return out, X", "return out.astype(int), X", "forward returned its output of dtype int64, expected "
     "float64 (Stepper computes in float64; finite differences need its precision)"),
    ("return out, X", "return out", "forward returned an array of shape (30, 3), expected a pair (out, cache)"),
    ("return out, X", "return out[:, :2], X", "forward returned its output of shape (30, 2), expected (30, 3)"),
    ("return slopes, dX", "return slopes, dX.tolist()", "backward returned a list as dX, expected a numpy "
     "array of shape (30, 2)"),
    ("return slopes, dX", "return slopes, dX.astype(np.float32)", "backward returned dX of dtype float32, "
     "expected float64 (Stepper computes in float64; finite differences need its precision)"),
])
def test_wrong_results_get_a_clear_message(model_with, capsys, old: str, new: str, message: str) -> None:
    model = model_with(old, new)
    code, err = run_check(model, capsys)
    assert code == 2
    assert err == f"stepper: {model}: layers[1] (L2, mix.py:Mix): {message}\n"


def test_writing_into_an_input_is_refused_with_a_hint(model_with, capsys) -> None:
    model = model_with("        out = X @ params", "        X *= 2.0\n        out = X @ params")
    code, err = run_check(model, capsys)
    assert code == 2
    assert "forward raised ValueError: " in err
    assert "(params, X and dOut are read-only: return new arrays)" in err
    assert f"[mix.py line {line_of(model.parent / 'mix.py', 'X *= 2.0')} in forward: X *= 2.0]" in err


@pytest.mark.parametrize("old, new, extra, message", [
    ("", "", 'activation = "tanh"', "layers[1].activation (L2): a custom layer does not take this key (it sets "
     "its own parameters and activation in its class)"),
    ("class Mix:", "class Blend:", "", "layers[1].class (L2): 'Mix' is not defined in mix.py (classes there: Blend)"),
    ("    def backward(self", "    def backwards(self", "", "layers[1].class (L2): Mix has no backward method (a "
     "custom layer needs init, forward and backward; see README.md, Custom layers)"),
    ("self.n_out = units if units is not None else n_in", "self.n_out = 4", "",
     "layers[1] (L2, mix.py:Mix): the class set n_out = 4 but the model file says units = 3"),
    ("self.spread = options.get", "self.spread = options.pop('x') or options.get", "",
     "layers[1] (L2, mix.py:Mix): creating the layer raised KeyError: 'x' [mix.py line 10 in __init__: "
     "self.spread = options.pop('x') or options.get(\"spread\", 0.5)]"),
    ('"t": np.zeros(self.n_out)}', '"t": np.zeros(self.n_out), "1x": np.ones(2)}', "",
     "layers[1] (L2, mix.py:Mix): init returned a parameter named '1x'; names must be identifiers (letters, "
     "digits, underscores)"),
    ('"t": np.zeros(self.n_out)}', '"t": np.float64(0.0)}', "",
     "layers[1] (L2, mix.py:Mix): init returned a float64 for 't', expected a numpy array with at least one "
     "axis (use shape (1,) for a single number)"),
    ("import numpy as np\n", "import numpy as np\nraise RuntimeError('no sensor attached')\n", "",
     "layers[1] (L2, mix.py): loading the file raised RuntimeError: no sensor attached [mix.py line 2 in "
     "<module>: raise RuntimeError('no sensor attached')]"),
    ("class Mix:", "class Mix(", "", "layers[1] (L2, mix.py): syntax error at line 4: '(' was never closed"),
])
def test_bad_layer_files_are_refused_at_load(model_with, capsys, old: str, new: str, extra: str,
                                             message: str) -> None:
    model = model_with(old, new, extra)
    code, err = run_check(model, capsys)
    assert code == 2
    assert err == f"stepper: {model}: {message}\n"


def test_a_missing_layer_file_is_named(model_with, capsys) -> None:
    model = model_with()
    model.write_text(model.read_text().replace('file = "mix.py"', 'file = "lens.py"'))
    code, err = run_check(model, capsys)
    assert code == 2
    assert err == f"stepper: {model}: layers[1].file (L2): no such file 'lens.py' (looked for {model.parent / 'lens.py'})\n"
