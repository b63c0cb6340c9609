"""What the session says about its operations, and the nearest names for a name that does not exist.

Our own contract (README, "The app"): a perturbation says how many weights it
moved, how many frozen ones it left alone and by how much they actually moved;
undo and redo say what they took back and the cost change; settings are
reported as sentences. Every figure asserted here is recomputed from the
weights themselves, not taken from the session's own wording.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stepper import cli
from stepper.core.nearest import nearest_names
from stepper.errors import UsageError
from stepper.formats.model_file import load_setup
from stepper.session import Session

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
BAKERY = SCENARIOS / "bakery-demand" / "model.toml"
KILN = SCENARIOS / "kiln-tiny" / "model.toml"


@pytest.fixture
def session() -> Session:
    return Session(load_setup(BAKERY))


def test_perturbing_all_says_how_many_frozen_were_left_alone(session: Session) -> None:
    session.freeze([0, 5])
    before_theta, before_cost = session.theta.copy(), session.train_cost()
    session.perturb(0.01)
    moved = session.theta - before_theta
    assert np.count_nonzero(moved) == 35 and moved[0] == moved[5] == 0.0
    rms = float(np.sqrt(np.mean(moved[moved != 0] ** 2)))
    assert session.last_action == (f"perturbed 35 of 37 parameters (2 frozen, left alone) by {rms:.3g} rms "
                                   f"(noise sd 0.01): cost {before_cost:.6g} -> {session.train_cost():.6g}")
    session.unfreeze([0, 5])
    session.perturb(0.01)
    assert session.last_action is not None and session.last_action.startswith("perturbed all 37 parameters by ")


def test_undoing_a_perturbation_reports_the_change_made(session: Session) -> None:
    index = session.names.index("L1.W[2,3]")
    start_cost = session.train_cost()
    old = session.theta[index]
    session.perturb(0.5, [index])
    change = session.theta[index] - old
    after_cost = session.train_cost()
    assert session.last_action == (f"perturbed L1.W[2,3] by {change:+.3g} (noise sd 0.5): "
                                   f"cost {start_cost:.6g} -> {after_cost:.6g}")
    session.undo()
    assert session.last_action == f"undid perturbed L1.W[2,3] by {change:+.3g}: cost {after_cost:.6g} -> {start_cost:.6g}"
    session.redo()
    assert session.last_action == f"redid perturbed L1.W[2,3] by {change:+.3g}: cost {start_cost:.6g} -> {after_cost:.6g}"


def test_settings_are_sentences(session: Session) -> None:
    session.set_slope_source("numeric")
    assert session.last_action == "steps now take their slopes from finite differences (numeric)"
    session.set_slope_source("analytic")
    assert session.last_action == "steps now take their slopes from backpropagation (analytic)"
    session.set_batch_size(16)
    assert session.last_action == "each step now uses a mini-batch of 16 samples, drawn afresh"
    session.undo()
    assert session.last_action == "undid switch to mini-batches of 16"
    session.set_rule("adam")
    assert session.last_action == "update rule gd -> adam (its memory starts afresh)"


# -- names that do not exist -------------------------------------------------------------------


@pytest.mark.parametrize("text, near", [
    ("L1.W[9,2]", ["L1.W[3,2]"]),           # an index out of range, brought into range
    ("L1.W[3,9]", ["L1.W[3,5]"]),
    ("l1.w[3,2]", ["L1.W[3,2]"]),           # the key in another case
    ("L3.W[0,0]", ["L2.W[0,0]", "L1.W[0,0]"]),  # a layer that does not exist: the nearest layers
    ("L2.b[4]", ["L2.b[0]"]),
    ("L1.W[0,0,7]", ["L1.W[0,0]"]),         # an index too many
    ("L1.W[2]", ["L1.W[2,0]"]),             # an index too few
    ("quux", []),
])
def test_nearest_names(text: str, near: list[str]) -> None:
    layout = load_setup(BAKERY).network.layout    # L1.W 4x6, L1.b 6, L2.W 6x1, L2.b 1
    assert nearest_names(layout, text) == near
    for name in near:
        assert name in layout.index_of


@pytest.mark.parametrize("argv, message", [
    (["slice", str(KILN), "L1.W[9,2]"], f"no weight named 'L1.W[9,2]' in {KILN} (did you mean L1.W[1,1]?)"),
    (["explain", str(KILN), "L3.b[0]"], f"no weight named 'L3.b[0]' in {KILN} (did you mean L2.b[0] or L1.b[0]?)"),
    (["slice", str(KILN), "bias"], f"no weight named 'bias' in {KILN} (the model's arrays: L1.W 2x2, L1.b 2, "
                                   "L2.W 2x2, L2.b 2; a name looks like L1.W[0,0])"),
    (["run", str(KILN), "--freeze", "L1.b[5]"], "no parameter name matches 'L1.b[5]' (did you mean L1.b[1]?)"),
    (["run", str(KILN), "--freeze", "L3.*"], "no parameter name matches 'L3.*' (the model's arrays: L1.W 2x2, "
                                             "L1.b 2, L2.W 2x2, L2.b 2)"),
])
def test_commands_name_the_nearest_weights(capsys: pytest.CaptureFixture[str], argv: list[str],
                                           message: str) -> None:
    assert cli.main(argv) == 2
    assert capsys.readouterr().err == f"stepper: {message}\n"


def test_session_matching_names_the_nearest(session: Session) -> None:
    with pytest.raises(UsageError, match=r"did you mean L2\.W\[5,0\]\?"):
        session.matching("L2.W[7,0]")
