"""Comparing two sets of weights: norms by ``numpy.linalg.norm``, cosines by ``scipy.spatial.distance.cosine``.

SciPy's ``cosine`` is the cosine distance ``1 - u.v / (|u| |v|)``, so the
cosine is one minus it. The slopes the change is compared with come from
``autograd`` on the kiln-tiny cost written out again (test_session_rules).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.distance import cosine as cosine_distance

from stepper.core.weightdiff import compare_weights, cosine
from stepper.formats.model_file import load_setup
from stepper.session import Session
from test_session_rules import kiln_cost_slopes

ROOT = Path(__file__).resolve().parents[1] / "scenarios"


def test_cosine_matches_scipy() -> None:
    rng = np.random.default_rng(0)
    u, v = rng.normal(size=50), rng.normal(size=50)
    assert cosine(u, v) == pytest.approx(1.0 - cosine_distance(u, v), rel=1e-12)
    assert cosine(u, -2.0 * u) == pytest.approx(-1.0)
    assert np.isnan(cosine(u, np.zeros(50)))


def test_comparison_of_two_checkpoints(tmp_path: Path) -> None:
    setup = load_setup(ROOT / "kiln-tiny" / "model.toml")
    s = Session(setup, rate=0.5)
    a = s.theta.copy()
    s.step(3)
    b = s.theta.copy()
    d = compare_weights(setup.network, a, b, setup.data.X, setup.data.Y, top=3)
    slopes_of = kiln_cost_slopes(s)
    # Costs of each side: the session's own history holds them.
    assert d.cost_a == s.history[0].train_cost and d.cost_b == s.history[-1].train_cost
    change = b - a
    layer_of = setup.network.layout.layer_index
    for move in d.layers:
        part = layer_of == move.index
        assert move.change == pytest.approx(np.linalg.norm(change[part]), rel=1e-14)
        assert move.before == pytest.approx(np.linalg.norm(a[part]), rel=1e-14)
        assert move.relative == pytest.approx(np.linalg.norm(change[part]) / np.linalg.norm(a[part]), rel=1e-14)
    assert d.cosine_a == pytest.approx(1.0 - cosine_distance(change, slopes_of(a)), rel=1e-9)
    assert d.cosine_b == pytest.approx(1.0 - cosine_distance(change, slopes_of(b)), rel=1e-9)
    assert d.cosine_a < -0.9  # plain descent went against the slope where it started
    assert d.moved.tolist() == np.argsort(-np.abs(change), kind="stable")[:3].tolist()


def test_session_compares_with_a_saved_checkpoint(tmp_path: Path) -> None:
    s = Session(load_setup(ROOT / "bakery-demand" / "model.toml"), rate=0.05)
    path = s.save_checkpoint(tmp_path / "start.safetensors")
    s.step(5)
    d = s.compare_with(path)
    assert d.cost_a == s.history[0].train_cost and d.cost_b == s.train_cost()
    assert d.val_a == s.history[0].val_cost and d.val_b == s.val_cost()
    np.testing.assert_array_equal(d.b, s.theta)


def test_each_side_runs_at_its_own_step_and_running_statistics(tmp_path: Path) -> None:
    # fan-bearing has dropout (a mask per step) and batch norm (running statistics for the
    # validation cost): each side's costs are those the session recorded at that side's step.
    # The reference is the session's own history, computed as the steps were made.
    s = Session(load_setup(ROOT / "fan-bearing" / "model.toml"), rate=0.05)
    s.step(3)
    path = s.save_checkpoint(tmp_path / "three.safetensors")
    s.step(4)
    d = s.compare_with(path)
    assert d.cost_a == s.history[3].train_cost and d.val_a == s.history[3].val_cost
    assert d.cost_b == s.history[7].train_cost and d.val_b == s.history[7].val_cost
    start = s.compare_to(s.setup.theta0)
    assert start.cost_a == s.history[0].train_cost and start.val_a == s.history[0].val_cost


def test_diff_command_runs_each_checkpoint_at_its_own_state(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from stepper.cli import main

    s = Session(load_setup(ROOT / "fan-bearing" / "model.toml"), rate=0.05)
    s.step(2)
    a = s.save_checkpoint(tmp_path / "a.safetensors")
    s.step(3)
    b = s.save_checkpoint(tmp_path / "b.safetensors")
    assert main(["diff", str(a), str(b), "--json"]) == 0  # built-in layers run no user code: no --model needed
    import json

    doc = json.loads(capsys.readouterr().out)
    assert doc["train_cost"] == {"a": s.history[2].train_cost, "b": s.history[5].train_cost}
    assert doc["validation_cost"] == {"a": s.history[2].val_cost, "b": s.history[5].val_cost}
