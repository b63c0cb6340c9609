"""Undo within a memory budget: one array per level, the oldest levels dropped first, exact all the same.

Properties of our own design (stepper/session/undo.py), checked bit for bit:
a level keeps the weights' difference once (not a copy before and a copy
after), undo and redo still give back every bit, and past the budget the
oldest levels go first while the newest still undo exactly.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from stepper.formats.model_file import load_setup
from stepper.session import Session, undo_budget
from stepper.session import undo as undo_module

BAKERY = Path(__file__).resolve().parents[1] / "scenarios" / "bakery-demand" / "model.toml"


@pytest.fixture(scope="module")
def setup():  # type: ignore[no-untyped-def]
    return load_setup(BAKERY)


def bits(s: Session) -> tuple[bytes, ...]:
    """The weights and the rule's memory, as bytes."""
    return (s.theta.tobytes(), *(a.tobytes() for _, a in sorted(s.rule_state.arrays.items())),
            str(s.rule_state.t).encode())


def test_budget_scales_with_the_model() -> None:
    mib = 1024 * 1024
    assert undo_budget(1_000) == 32 * mib                 # the floor
    assert undo_budget(1_000_000) == 8 * 8 * 1_000_000     # eight copies of the weights
    assert undo_budget(10_000_000) == 256 * mib           # the ceiling


@pytest.mark.parametrize("rule", ["gd", "momentum", "adam"])
def test_a_step_keeps_one_array_per_array_of_the_model(setup: Any, rule: str) -> None:
    s = Session(setup, rate=0.05, rule=rule)
    s.step(1)
    arrays = 1 + len(s.rule_state.arrays)  # the weights and the rule's memory
    change = s._undo[-1]
    assert arrays * 8 * s.net.n_params <= change.nbytes() < arrays * 8 * s.net.n_params + 4096
    s.perturb(0.1)  # every weight: indices and one difference of values
    assert s._undo[-1].nbytes() < 2 * 8 * s.net.n_params + 4096


@pytest.mark.parametrize("rule", ["momentum", "adam"])
def test_levels_undo_and_redo_bit_for_bit(setup: Any, tmp_path: Path, rule: str) -> None:
    s = Session(setup, rate=0.05, rule=rule)
    seen = [bits(s)]
    operations = [lambda: s.step(2), lambda: s.perturb(0.2), lambda: s.step(1), lambda: s.reset(),
                  lambda: s.set_value(3, 0.5), lambda: s.perturb(0.1, [0, 7, 9], seed=3), lambda: s.step(4)]
    for operation in operations:
        operation()
        seen.append(bits(s))
    assert s.undo_levels == len(operations)
    for expected in reversed(seen[:-1]):
        s.undo()
        assert bits(s) == expected
    assert s.undo_levels == 0 and s.redo_levels == len(operations)
    for expected in seen[1:]:
        s.redo()
        assert bits(s) == expected


def test_past_the_budget_the_oldest_levels_go_first(setup: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    s = Session(setup, rate=0.05)
    s.step(1)
    one_step = s._undo[-1].nbytes()  # the step's difference, its cost history entry and its small fields
    s.undo()
    s.undo_budget = 3 * one_step + one_step // 2  # room for three steps, not four
    seen = [bits(s)]
    for _ in range(10):
        s.step(1)
        seen.append(bits(s))
    assert s.undo_levels == 3
    for expected in reversed(seen[-4:-1]):
        assert s.undo() is not None
        assert bits(s) == expected
    assert s.undo() is None and bits(s) == seen[7]  # steps 1 to 7 can no longer be taken back


def test_one_level_is_kept_even_when_it_alone_is_over_budget(setup: Any) -> None:
    s = Session(setup, rate=0.05, rule="adam")
    s.undo_budget = 1
    start = bits(s)
    s.step(1)
    s.step(1)
    assert s.undo_levels == 1
    s.undo()
    s.undo()
    assert bits(s) != start and s.step_count == 1


def test_the_differences_are_exact_for_any_floats() -> None:
    # XOR of the bit patterns: every float64, NaN payloads and signed zeros included, comes back.
    rng = np.random.default_rng(0)
    a = rng.normal(size=1000) * 10.0 ** rng.integers(-300, 300, size=1000)
    b = a + rng.normal(size=1000) * 1e-3
    a[:6] = [np.nan, -0.0, np.inf, -np.inf, 5e-324, 0.0]
    b[:6] = [0.0, 0.0, -np.inf, np.nan, -5e-324, -0.0]
    before, after = undo_module.compact({"theta": a.copy()}, {"theta": b.copy()})
    assert before["theta_bits"] is after["theta_bits"]
    state = b.copy()
    undo_module.flip(state, before["theta_bits"])
    assert state.tobytes() == a.tobytes()
    assert undo_module.flipped(state, after["theta_bits"]).tobytes() == b.tobytes()
