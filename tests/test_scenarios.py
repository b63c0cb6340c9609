"""The bundled scenarios: each loads, passes its own slope check, regenerates its
data byte for byte, and trains under plain gradient descent.

Every folder under ``scenarios/`` that holds a ``model.toml`` is tested, so a
new scenario is covered as soon as it is added (and must get an entry in
``TRAINING_RATES``, with the figures its README promises).
"""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from fnmatch import fnmatch
from pathlib import Path

import autograd.numpy as anp
import numpy as np
import pytest
from autograd import grad

from stepper import cli
from stepper.formats.model_file import Setup, load_setup
from stepper.session import Session
from stepper.scenarios import DEFAULT

ROOT = Path(__file__).resolve().parents[1] / "scenarios"
NAMES = sorted(p.name for p in ROOT.iterdir() if (p / "model.toml").is_file())

#: Patterns pyproject.toml ships as package data for the scenarios.
SHIPPED = ("*.toml", "*.csv", "*.md", "*.py", "*.safetensors", "*.onnx")

#: What each scenario's README promises for plain gradient descent at its suggested
#: rate: (rate, [(updates, cost, printed figure)]). "about X" in the README means the
#: cost rounds to X at the digits printed; "below X" is a bound. These are our own
#: scenarios' numbers, checked against their READMEs, not outside values.
TRAINING_RATES: dict[str, tuple[float, list[tuple[int, str, str]]]] = {
    "bakery-demand": (0.1, [(0, "train", "about 1.27"), (60, "train", "about 0.012"),
                            (300, "train", "below 0.008")]),
    "kiln-tiny": (2.0, [(0, "train", "0.02742"), (100, "train", "about 0.0016")]),
    "seed-sorter": (1.0, [(0, "train", "about 0.94"), (50, "train", "about 0.15")]),
    "sensor-drift": (0.3, [(0, "train", "about 0.86"), (50, "train", "about 0.42"),
                           (250, "train", "about 0.35")]),
    "hive-gate-fixed": (0.3, [(0, "train", "about 0.098"), (50, "train", "about 0.048"),
                              (250, "train", "about 0.019")]),
    # The wrong bias slopes barely slow training: the README says so, on purpose.
    "hive-gate-buggy": (0.3, [(0, "train", "about 0.098"), (50, "train", "about 0.048")]),
    "glasshouse-vents": (2.0, [(0, "train", "about 0.157"), (50, "train", "about 0.0044"),
                               (50, "validation", "about 0.0063")]),
    "glaze-defects": (0.02, [(0, "train", "about 2.24"), (300, "train", "about 0.13"),
                             (0, "validation", "about 2.9"), (300, "validation", "about 0.26")]),
    "fan-bearing": (0.1, [(0, "train", "about 0.88"), (400, "train", "about 0.21"),
                          (0, "validation", "about 0.73"), (400, "validation", "about 0.35")]),
}


def meets(value: float, printed: str) -> bool:
    """``value`` is what ``printed`` says: below a bound, or equal at the printed significant digits."""
    words = printed.split()
    number = words[-1]
    if words[0] == "below":
        return value < float(number)
    digits = len(number.replace(".", "").lstrip("0"))
    return f"{value:.{digits}g}" == number


#: Scenarios whose slopes are wrong on purpose, to show what the check finds;
#: tests/test_custom_layer.py checks that they fail in the expected way.
DELIBERATELY_WRONG = {"hive-gate-buggy"}


def setup_of(name: str) -> Setup:
    return load_setup(ROOT / name / "model.toml")


def test_the_expected_scenarios_are_bundled() -> None:
    assert DEFAULT in NAMES
    assert {"bakery-demand", "kiln-tiny", "seed-sorter"} <= set(NAMES)


@pytest.mark.parametrize("name", NAMES)
def test_scenario_files_are_complete_and_shipped(name: str) -> None:
    folder = ROOT / name
    assert (folder / "data.csv").is_file()
    assert (folder / "README.md").is_file()
    if not (folder / "make_data.py").is_file():
        # Hand-written data must say so in the README.
        assert "by hand" in (folder / "README.md").read_text(encoding="utf-8")
    for path in folder.iterdir():
        if path.name == "__pycache__":
            continue
        # pyproject.toml ships only files one level below scenarios/ with these
        # endings; anything else would be missing from an installed copy.
        assert path.is_file(), f"{path}: scenario folders hold no sub-folders"
        assert any(fnmatch(path.name, pattern) for pattern in SHIPPED), f"{path} is not shipped"


@pytest.mark.parametrize("name", NAMES)
def test_scenario_loads_and_stays_small(name: str) -> None:
    setup = setup_of(name)
    n_rows = setup.data.n_train + setup.data.n_val
    assert 1 <= n_rows <= 500
    # Tens to a few hundred weights; a convolutional network on images up to a few thousand.
    most = 3000 if setup.network.input_shape and len(setup.network.input_shape) == 3 else 500
    assert 1 <= setup.network.n_params <= most
    assert np.all(np.isfinite(setup.theta0))
    assert np.isfinite(setup.network.cost(setup.theta0, setup.data.X, setup.data.Y))


@pytest.mark.parametrize("name", [n for n in NAMES if n not in DELIBERATELY_WRONG])
def test_every_slope_agrees(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    code = cli.main(["check", str(ROOT / name), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0
    assert report["passed"] is True
    assert report["counts"]["agree"] == report["network"]["parameters"]


#: Seeded scripts beside the files they write: (script, file).
GENERATED = (("make_data.py", "data.csv"), ("make_network.py", "net.onnx"))


@pytest.mark.parametrize("name, script, written", [
    (n, script, written) for n in NAMES for script, written in GENERATED if (ROOT / n / script).is_file()
])
def test_seeded_scripts_reproduce_their_files(name: str, script: str, written: str, tmp_path: Path) -> None:
    out = tmp_path / written
    subprocess.run(
        [sys.executable, str(ROOT / name / script), str(out)],
        check=True,
        capture_output=True,
        timeout=60,
    )
    assert out.read_bytes() == (ROOT / name / written).read_bytes()


def test_the_onnx_scenario_runs_in_onnxruntime_as_stepper_computes() -> None:
    # onnxruntime, the ONNX project's inference engine, runs the bundled graph
    # (float32) on the scenario's inputs.
    import onnxruntime

    setup = setup_of("glasshouse-vents")
    session = onnxruntime.InferenceSession(str(ROOT / "glasshouse-vents" / "net.onnx"),
                                           providers=["CPUExecutionProvider"])
    X = setup.data.X
    reference = session.run(None, {"readings": X.astype(np.float32)})[0]
    np.testing.assert_allclose(setup.network.predict(setup.theta0, X), reference, rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("name", NAMES)
def test_small_steps_of_plain_descent_lower_the_cost(name: str) -> None:
    # A small enough step against a nonzero gradient lowers a smooth function
    # (first-order Taylor expansion; Nocedal & Wright, Numerical Optimization,
    # 2nd ed., 2006, section 2.2, recalled from memory). The rate 0.01 is our
    # choice, far below the rates at which these scenarios start to overshoot.
    setup = setup_of(name)
    net, X, Y = setup.network, setup.data.X, setup.data.Y
    theta = setup.theta0.copy()
    costs = []
    for _ in range(5):
        cost, slopes = net.cost_and_slopes(theta, X, Y)
        costs.append(cost)
        theta -= 0.01 * slopes
    costs.append(net.cost(theta, X, Y))
    assert all(later < earlier for earlier, later in zip(costs, costs[1:])), costs


@pytest.mark.parametrize("name", NAMES)
def test_descent_at_the_suggested_rate_trains(name: str) -> None:
    assert name in TRAINING_RATES, f"add the figures the {name} README promises to TRAINING_RATES"
    rate, promises = TRAINING_RATES[name]
    readme = (ROOT / name / "README.md").read_text(encoding="utf-8")
    assert f"rate {rate:g}" in readme
    # Through a session, as `stepper run` makes them: each step with its own dropout masks,
    # the validation cost without dropout and on batch norm's running statistics.
    session = Session(setup_of(name), rate=rate)
    session.step(max(updates for updates, _, _ in promises), watch=False)
    costs = {"train": [h.train_cost for h in session.history],
             "validation": [h.val_cost if h.val_cost is not None else float("nan") for h in session.history]}
    for updates, which, printed in promises:
        # The figure is the README's own (with "about" or "below" in front of it there).
        assert printed.split()[-1] in readme, printed
        value = costs[which][updates]
        assert meets(value, printed), f"{name}: {which} cost after {updates} updates is {value:.6g}, " \
                                      f"the README says {printed}"


def test_readme_figures_are_compared_at_their_digits() -> None:
    assert meets(0.01188, "about 0.012") and not meets(0.01251, "about 0.012")
    assert meets(1.269, "about 1.27") and not meets(1.2649, "about 1.27")
    assert meets(0.0074, "below 0.008") and not meets(0.0081, "below 0.008")


def test_kiln_tiny_matches_an_independent_autograd_computation() -> None:
    # The inline weights are read straight from the TOML file and the network
    # is written out again with autograd.numpy; the autograd package (a
    # general-purpose reverse-mode differentiator) gives the reference slopes.
    folder = ROOT / "kiln-tiny"
    doc = tomllib.loads((folder / "model.toml").read_text(encoding="utf-8"))
    rows = np.loadtxt(folder / "data.csv", delimiter=",", skiprows=1)
    X, Y = rows[:, :2], rows[:, 2:]
    first, second = doc["layers"]
    W1, b1 = np.array(first["weights"]), np.array(first["biases"])
    W2, b2 = np.array(second["weights"]), np.array(second["biases"])

    def cost(W1: np.ndarray, b1: np.ndarray, W2: np.ndarray, b2: np.ndarray) -> np.ndarray:
        hidden = anp.tanh(anp.dot(X, W1) + b1)
        out = 1.0 / (1.0 + anp.exp(-(anp.dot(hidden, W2) + b2)))
        # half_squared_error: 1/2 * sum over outputs, mean over samples.
        return 0.5 * anp.sum((out - Y) ** 2) / X.shape[0]

    setup = setup_of("kiln-tiny")
    value, slopes = setup.network.cost_and_slopes(setup.theta0, setup.data.X, setup.data.Y)
    np.testing.assert_allclose(value, cost(W1, b1, W2, b2), rtol=1e-12)
    # The README quotes the starting cost to four significant figures.
    assert round(value, 5) == 0.02742
    expected = np.concatenate(
        [np.ravel(grad(cost, argnum=k)(W1, b1, W2, b2)) for k in range(4)]
    )
    # Flat order: L1.W row by row, L1.b, L2.W, L2.b (stepper.core.network).
    np.testing.assert_allclose(slopes, expected, rtol=1e-10, atol=1e-15)
    layout = setup.network.layout
    assert slopes[layout.lookup("L1.W[1,0]")] == pytest.approx(
        grad(cost, argnum=0)(W1, b1, W2, b2)[1, 0], rel=1e-10
    )
