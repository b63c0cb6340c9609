"""Rate preview: the cost one step at each candidate rate would reach, without taking the step.

Our own contract, checked against the thing it promises: for every rate the
previewed cost equals the cost after really making that step and undoing it,
and the preview leaves the session exactly as it was.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"


@pytest.fixture(scope="module")
def bakery():  # type: ignore[no-untyped-def]
    return load_setup(ROOT / "bakery-demand" / "model.toml")


def moving_session(setup, rule: str, source: str = "analytic") -> Session:  # type: ignore[no-untyped-def]
    s = Session(setup, rate=0.05)
    s.set_rule(rule)
    s.freeze_matching("L1.b[*]")
    s.set_slope_source(source)
    s.step(4)
    return s


@pytest.mark.parametrize("source", ["analytic", "numeric"])
@pytest.mark.parametrize("rule", ["gd", "momentum", "adam"])
def test_preview_equals_step_then_undo(bakery, rule: str, source: str) -> None:  # type: ignore[no-untyped-def]
    s = moving_session(bakery, rule, source)
    theta, state, history, version = s.theta.copy(), s.rule_state.copy(), list(s.history), s.version
    preview = s.preview_rates()
    # Nothing moved.
    assert s.theta.tobytes() == theta.tobytes()
    assert s.rule_state.equals(state)
    assert s.history == history
    assert s.version == version
    assert [rate for rate, _ in preview] == pytest.approx([0.05 * f for f in (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1, 2, 4, 8, 16)])
    for rate, cost in preview:
        original = s.rate
        s.set_rate(rate)
        s.step()
        assert cost == s.train_cost(), f"rate {rate}"
        s.undo()
        s.undo()
        assert s.rate == original
    assert s.theta.tobytes() == theta.tobytes()
    assert s.rule_state.equals(state)


def test_best_preview_rate_picks_the_lowest_cost(bakery) -> None:  # type: ignore[no-untyped-def]
    s = moving_session(bakery, "gd")
    preview = s.preview_rates([0.001, 0.01, 0.1, 1.0, 3.0, 30.0])
    costs = [c for _, c in preview]
    best = s.best_preview_rate(preview)
    assert best == preview[int(np.argmin(costs))][0]
    assert Session.best_preview_rate([(0.1, 2.0), (0.2, 1.0), (0.4, math.inf)]) == 0.2


def test_a_diverging_rate_previews_as_infinite_cost(bakery) -> None:  # type: ignore[no-untyped-def]
    s = moving_session(bakery, "gd")
    theta = s.theta.copy()
    preview = s.preview_rates([0.01, 1e300])
    assert math.isfinite(preview[0][1])
    assert preview[1][1] == math.inf
    assert s.best_preview_rate(preview) == 0.01
    assert s.theta.tobytes() == theta.tobytes()
