"""Directional checks (``check --directions K``): each parameter array along random unit directions.

References: the slope along a direction is the derivative of ``t -> C(theta + t d)`` at 0
(the directional derivative, Nocedal & Wright, *Numerical Optimization*, 2nd ed., 2006,
section A.2), which ``scipy.differentiate.derivative`` computes by its own adaptive finite
differences, and which equals ``g . d`` for the gradient ``g`` that the ``autograd``
package computes from a forward pass written independently in tests/test_core_autograd.py.
"""

from __future__ import annotations

import json
from typing import Any, Callable

import autograd
import numpy as np
import pytest
from scipy.differentiate import derivative

from stepper.cli import main
from stepper.core.directional import iter_directional_check
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.numeric import run_to_end
from stepper.scenarios import resolve_model
from test_core_autograd import ref_cost_fn

DenseNet = Callable[..., tuple[Network, np.ndarray]]


def documented_directions(net: Network, k: int, seed: int) -> list[list[np.ndarray]]:
    """The directions as the module docstring describes the draw: Gaussian, normalised, array by array."""
    rng = np.random.default_rng(seed)
    out = []
    for block in net.layout.blocks:
        draws = []
        for _ in range(k):
            d = rng.standard_normal(block.size)
            draws.append(d / np.linalg.norm(d))
        out.append(draws)
    return out


@pytest.mark.parametrize("hidden,loss,output", [("tanh", "mean_squared_error", "identity"),
                                                 ("sigmoid", "binary_cross_entropy", "sigmoid"),
                                                 ("softplus", "categorical_cross_entropy", "softmax")])
def test_slopes_along_directions_match_references(dense_net: DenseNet, hidden: str, loss: str,
                                                  output: str) -> None:
    outputs = 3 if output == "softmax" else 1
    net, theta = dense_net(4, [(5, hidden), (outputs, output)], loss, seed=3)
    rng = np.random.default_rng(8)
    X = rng.normal(size=(12, 4))
    Y = np.eye(3)[rng.integers(0, 3, size=12)] if output == "softmax" else rng.uniform(0.1, 0.9, (12, 1))
    check = run_to_end(iter_directional_check(net, theta, X, Y, k=3, seed=11))
    assert check is not None and check.passed
    reference = ref_cost_fn(4, [(5, hidden, True), (outputs, output, True)], loss, X, Y)
    gradient = autograd.grad(reference)(theta)
    for array, draws in zip(check.arrays, documented_directions(net, 3, 11)):
        block = array.block
        for j, d in enumerate(draws):
            full = np.zeros(net.n_params)
            full[block.start : block.stop] = d
            along = derivative(lambda t: np.array([float(reference(theta + ti * full)) for ti in np.ravel(t)])
                               .reshape(np.shape(t)), 0.0)
            assert array.analytic[j] == pytest.approx(float(gradient @ full), rel=1e-9, abs=1e-13)
            assert array.numeric[j] == pytest.approx(float(along.df), rel=1e-6, abs=1e-10)
        assert array.verdict == "agree"


def test_wrong_backward_of_one_array_is_found(dense_net: DenseNet, monkeypatch: pytest.MonkeyPatch) -> None:
    # A deliberately wrong analytic slope: the tanh layer's dW comes out 2% too large.
    original = Dense.backward_from_z

    def wrong(self: Dense, params: Any, cache: Any, dZ: Any, *args: Any, **kwargs: Any) -> Any:
        grads, dX = original(self, params, cache, dZ, *args, **kwargs)
        if self.activation.name == "tanh":
            grads = dict(grads, W=grads["W"] * 1.02)
        return grads, dX

    monkeypatch.setattr(Dense, "backward_from_z", wrong)
    net, theta = dense_net(3, [(6, "tanh"), (1, "identity")], "mean_squared_error", seed=1)
    rng = np.random.default_rng(2)
    X, Y = rng.normal(size=(20, 3)), rng.normal(size=(20, 1))
    check = run_to_end(iter_directional_check(net, theta, X, Y, k=2))
    assert check is not None and not check.passed
    assert {a.block.prefix: a.verdict for a in check.arrays} == {
        "L1.W": "disagree", "L1.b": "agree", "L2.W": "agree", "L2.b": "agree"}
    # 2% too large along every direction: relative error 0.02 / 1.02.
    np.testing.assert_allclose(check.arrays[0].rel_error, 0.02 / 1.02, rtol=1e-4)


def test_kink_crossing_is_not_a_failure(dense_net: DenseNet) -> None:
    # One ReLU unit sits 1e-9 from its kink on the only sample: any move of L1 crosses it.
    net, theta = dense_net(1, [(2, "relu"), (1, "identity")], "half_squared_error", seed=0)
    views = net.views(theta)
    views[0]["W"][...] = [[1.0, -0.5]]
    views[0]["b"][...] = [-1.0 + 1e-9, 0.7]
    X, Y = np.array([[1.0]]), np.array([[2.0]])
    check = run_to_end(iter_directional_check(net, theta, X, Y, k=2))
    assert check is not None and check.passed
    verdicts = {a.block.prefix: a.verdict for a in check.arrays}
    assert verdicts["L1.W"] == verdicts["L1.b"] == "kink"
    assert verdicts["L2.W"] == verdicts["L2.b"] == "agree"


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(["check", *argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_buggy_custom_layer_is_found_array_by_array(capsys: pytest.CaptureFixture[str]) -> None:
    # The bundled buggy layer gets its bias slopes wrong (README, "Custom layers").
    code, out, err = run(capsys, str(resolve_model("hive-gate-buggy")), "--directions", "3")
    assert code == 1 and err == ""
    rows = {line.split()[0]: line for line in out.splitlines() if line.startswith(("L1.", "L2.", "L3."))}
    assert list(rows) == ["L1.W", "L1.b", "L2.W", "L2.b", "L2.V", "L2.c", "L3.W", "L3.b"]
    assert rows["L2.b"].endswith("XX  disagree")
    assert all(line.endswith("ok  agree") for name, line in rows.items() if name != "L2.b")
    assert "directions  8 arrays: 7 agree, 0 doubtful, 1 disagree, 0 kink" in out
    assert "result      FAIL: the slopes of L2.b disagree along random directions" in out
    assert "\nweight " not in out  # no weight-by-weight table unless --weights asks for one
    code, out, _ = run(capsys, str(resolve_model("hive-gate-fixed")), "--directions", "3")
    assert code == 0 and "result      PASS: every slope agrees" in out


def test_directions_in_json(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, str(resolve_model("hive-gate-buggy")), "--directions", "2", "--seed", "4",
                       "--method", "forward", "--json")
    doc = json.loads(out)
    assert code == 1 and doc["passed"] is False
    directions = doc["directions"]
    assert (directions["k"], directions["seed"], directions["method"]) == (2, 4, "forward")
    assert directions["counts"] == {"agree": 7, "kink": 0, "unresolved": 0, "doubtful": 0, "disagree": 1}
    by_name = {a["array"]: a for a in directions["arrays"]}
    assert by_name["L2.b"]["verdict"] == "disagree" and by_name["L2.b"]["entries"] == 3
    assert len(by_name["L1.W"]["numeric"]) == 2 and by_name["L1.W"]["layer"] == 1
    assert doc["weights"] == [] and doc["checked"]["count"] == 0
    # --weights as well: both checks, in one document.
    code, out, _ = run(capsys, str(resolve_model("hive-gate-fixed")), "--directions", "1", "--weights", "5",
                       "--json")
    doc = json.loads(out)
    assert code == 0 and len(doc["weights"]) == 8 and doc["directions"]["passed"] is True
