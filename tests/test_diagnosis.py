"""Saying why slopes disagree (stepper.core.diagnosis), each pattern on a deliberately broken layer.

The layer below is ``out = tanh(X W + b)`` with a hand-written backward pass,
correct unless its ``bug`` option breaks one line the way people do. What each
bug does to the slopes is calculus, not a convention of ours: the cost is the
mean of per-sample costs, so ``dOut`` already carries ``1/n`` and a second
average divides by ``n`` again (numeric / analytic = n); multiplying the sum by
``n`` undoes the average (ratio 1/n); a dropped or doubled factor 2 or a flipped
sign shows as that constant; and a wrong ``dX`` reaches only the layers before
(the chain rule, e.g. Goodfellow, Bengio & Courville, *Deep Learning*, 2016,
section 6.5). The network around it (conftest.CUSTOM_MODEL) has 30 samples.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from stepper import cli
from stepper.core.diagnosis import diagnose, ratio_meaning, shared_ratio
from stepper.core.gradcheck import iter_check
from stepper.core.input_slopes import check_input_slopes
from stepper.core.layers import Dense
from stepper.core.numeric import run_to_end
from stepper.formats.model_file import load_setup

N_SAMPLES = 30

LAYER = '''\
import numpy as np


class Squash:
    bias_keys = ("b",)

    def __init__(self, n_in, units, options):
        self.n_in = n_in
        self.n_out = units
        self.bug = options.get("bug", "")

    def init(self, rng):
        return {"W": rng.normal(0.0, 0.7, (self.n_in, self.n_out)), "b": rng.normal(0.0, 0.3, self.n_out)}

    def forward(self, params, X):
        A = np.tanh(X @ params["W"] + params["b"])
        return A, (X, A)

    def backward(self, params, cache, dOut):
        X, A = cache
        dZ = dOut * (1.0 - A * A)
        dW = X.T @ dZ
        db = dZ.sum(axis=0)
        dX = dZ @ params["W"].T
        bug = self.bug
        if bug == "bias averaged twice":
            db = dZ.mean(axis=0)
        elif bug == "weights not averaged":
            dW = dW * X.shape[0]
        elif bug == "weights doubled":
            dW = 2.0 * dW
        elif bug == "weights halved":
            dW = 0.5 * dW
        elif bug == "bias sign":
            db = -db
        elif bug == "bias forgets the squash":
            db = dOut.sum(axis=0)
        elif bug == "weights forget the squash":
            dW = X.T @ dOut
        elif bug == "dX forgets the squash":
            dX = dOut @ params["W"].T
        elif bug == "dX sign":
            dX = -dX
        elif bug == "all wrong":
            dW = X.T @ dOut
            db = dOut.sum(axis=0) + 0.01
        return {"W": dW, "b": db}, dX
'''

Diagnosed = tuple[list[tuple[str, str]], Path]


@pytest.fixture
def broken(custom_model: Callable[..., Path]) -> Callable[[str], Diagnosed]:
    """``broken(bug)``: the hints for the network around the layer with that bug, and the model's path."""

    def run(bug: str) -> Diagnosed:
        model = custom_model(LAYER, "squash.py", "Squash", f'options = {{ bug = "{bug}" }}')
        setup = load_setup(model)
        net, X, Y = setup.network, setup.data.X, setup.data.Y
        assert X.shape[0] == N_SAMPLES
        result = run_to_end(iter_check(net, setup.theta0, X, Y))
        assert result is not None
        inputs = [check_input_slopes(net, setup.theta0, X, Y, i)
                  for i, layer in enumerate(net.layers) if not isinstance(layer, Dense)]
        return [(h.code, h.text) for h in diagnose(net, result, X.shape[0], inputs)], model

    return run


LABEL = "L2 (custom 2->3 squash.py:Squash)"


def test_a_correct_layer_gets_no_hint(broken: Callable[[str], Diagnosed]) -> None:
    assert broken("")[0] == []


@pytest.mark.parametrize("bug, hint", [
    ("bias averaged twice",
     f"L2.b: numeric / analytic = 30 (the number of samples) on every disagreeing entry (3): the analytic slope "
     f"was divided by the number of samples once too often, as if averaged over the samples twice; look at "
     f"L2.b's slope in the backward of {LABEL}."),
    ("weights not averaged",
     "L2.W: numeric / analytic = 1/30 (one over the number of samples) on every disagreeing entry (6): the "
     "analytic slope is summed over the samples without the 1/n of the average; look at L2.W's slope in "
     f"the backward of {LABEL}."),
    ("weights doubled",
     "L2.W: numeric / analytic = 1/2 on every disagreeing entry (6): the analytic slope has an extra factor of 2 "
     f"(such as a one-half dropped from the cost); look at L2.W's slope in the backward of {LABEL}."),
    ("weights halved",
     "L2.W: numeric / analytic = 2 on every disagreeing entry (6): the analytic slope lost a factor of 2 (such as "
     f"the 2 from squaring); look at L2.W's slope in the backward of {LABEL}."),
    ("bias sign",
     "L2.b: numeric / analytic = -1 on every disagreeing entry (3): the analytic slope has the wrong sign; look at "
     f"L2.b's slope in the backward of {LABEL}."),
])
def test_a_shared_ratio_is_named(broken: Callable[[str], Diagnosed], bug: str, hint: str) -> None:
    hints, _ = broken(bug)
    assert hints[0] == ("ratio", hint)
    # The broken array is one kind, so "only biases" or "only weights" follows.
    assert [code for code, _ in hints[1:]] == ["biases_only" if "L2.b" in hint else "weights_only"]


def test_only_the_biases(broken: Callable[[str], Diagnosed]) -> None:
    hints, _ = broken("bias forgets the squash")
    assert len(hints) == 1
    code, text = hints[0]
    assert code == "biases_only"
    assert text.startswith(f"In {LABEL} only biases disagree (L2.b; numeric / analytic from ")
    assert text.endswith(", not one factor) and every weight agrees: look at the slope of L2.b in that "
                         "layer's backward.")


def test_only_the_weights(broken: Callable[[str], Diagnosed]) -> None:
    hints, _ = broken("weights forget the squash")
    assert [code for code, _ in hints] == ["weights_only"]
    assert hints[0][1].startswith(f"In {LABEL} only weights disagree (L2.W; numeric / analytic from ")


def test_a_wrong_dx_is_named_as_the_cause_of_the_earlier_layers(broken: Callable[[str], Diagnosed]) -> None:
    hints, _ = broken("dX forgets the squash")
    assert hints == [("input_slopes",
                      f"The backward of {LABEL} returns a wrong input slope dX; L1 disagrees because of it (its own "
                      "parameters agree): fix the dX that L2's backward returns first.")]


def test_a_wrong_dx_with_a_shared_ratio(broken: Callable[[str], Diagnosed]) -> None:
    hints, _ = broken("dX sign")
    assert hints == [("input_slopes",
                      f"The backward of {LABEL} returns a wrong input slope dX (numeric / analytic = -1 on every "
                      "disagreeing entry: the analytic slope has the wrong sign); L1 disagrees because of it (its "
                      "own parameters agree): fix the dX that L2's backward returns first.")]


def test_no_pattern(broken: Callable[[str], Diagnosed]) -> None:
    hints, _ = broken("all wrong")
    assert [code for code, _ in hints] == ["unexplained"]
    assert hints[0][1].startswith("9 slopes in L2 disagree with no common pattern (a shared ratio, only biases "
                                  "or only weights, a wrong dX); the largest relative error is L2.")


# -- in stepper check --------------------------------------------------------------------------


def test_check_text_gives_the_cause_instead_of_the_worst_weight(broken: Callable[[str], Diagnosed],
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    _, model = broken("bias sign")
    assert cli.main(["check", str(model), "--worst", "3"]) == 1
    out = capsys.readouterr().out
    summary = out[out.index("\ncost "):out.index("\nlayer health")]
    assert "\nworst " not in summary
    why = summary[summary.index("why"):summary.index("result")]
    assert " ".join(why.split()) == (
        "why L2.b: numeric / analytic = -1 on every disagreeing entry (3): the analytic slope has the wrong sign; "
        "look at L2.b's slope in the backward of L2 (custom 2->3 squash.py:Squash). why In L2 (custom 2->3 "
        "squash.py:Squash) only biases disagree (L2.b) and every weight agrees: look at the slope of L2.b in that "
        "layer's backward.")
    assert all(len(line) <= 79 for line in why.splitlines())


def test_check_json_carries_the_hints(broken: Callable[[str], Diagnosed], capsys: pytest.CaptureFixture[str]) -> None:
    _, model = broken("weights not averaged")
    assert cli.main(["check", str(model), "--json"]) == 1
    doc = json.loads(capsys.readouterr().out)
    first = doc["hints"][0]
    assert (first["code"], first["layer"], first["arrays"]) == ("ratio", 2, ["L2.W"])
    assert first["ratio"] == pytest.approx(1 / 30, rel=1e-6)
    assert [h["code"] for h in doc["hints"]] == ["ratio", "weights_only"]


def test_a_passing_check_still_names_its_worst_weight(capsys: pytest.CaptureFixture[str]) -> None:
    model = Path(__file__).resolve().parents[1] / "scenarios" / "kiln-tiny"
    assert cli.main(["check", str(model)]) == 0
    out = capsys.readouterr().out
    assert "\nworst       L" in out and "\nwhy" not in out
    assert cli.main(["check", str(model), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["hints"] == []


# -- the ratio rules on their own ------------------------------------------------------------


def test_shared_ratio_holds_within_its_tolerance_and_not_beyond() -> None:
    a = np.array([1.0, -2.0, 4.0])
    assert shared_ratio(a, 3.0 * a) == pytest.approx(3.0)
    assert shared_ratio(a, 3.0 * a * np.array([1.0, 1.0009, 1.0])) == pytest.approx(3.0)
    assert shared_ratio(a, 3.0 * a * np.array([1.0, 1.0011, 1.0])) is None
    assert shared_ratio(np.array([0.0, 1.0]), np.array([1.0, 1.0])) is None
    assert shared_ratio(np.array([np.nan, 1.0]), np.array([1.0, 1.0])) is None


@pytest.mark.parametrize("ratio, written", [(442.0, "442 (the number of samples)"),
                                            (1 / 442, "1/442 (one over the number of samples)"),
                                            (2.0, "2"), (0.5, "1/2"), (-1.0, "-1"), (2.46, "2.46"),
                                            (441.0, "441")])
def test_ratio_names(ratio: float, written: str) -> None:
    assert ratio_meaning(ratio, 442)[0] == written
