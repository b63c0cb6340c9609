"""The rate range test: it changes nothing, and each rate ends where real steps would.

"Changes nothing" is compared bit for bit (our own contract, as for undo):
weights, rule memory, frozen mask, step count, history, mini-batch generator,
undo stack and journal. "Where real steps would" is checked by making the same
steps for real on a second session and comparing the cost, so the test and the
session's own stepping must agree exactly.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from stepper.core.ratetest import log_rates
from stepper.core.schedules import Schedule
from stepper.formats.model_file import load_setup
from stepper.session import Session

ROOT = Path(__file__).resolve().parents[1] / "scenarios"


def fingerprint(s: Session) -> tuple[Any, ...]:
    return (s.theta.tobytes(), s.frozen.tobytes(), s.rule, s.rule_state.t,
            tuple((k, v.tobytes()) for k, v in sorted(s.rule_state.arrays.items())), s.step_count, s.rate,
            s.batch_size, tuple(s.history), json.dumps(s.batch_rng.bit_generator.state, sort_keys=True),
            None if s.last_update is None else s.last_update.tobytes(), s.can_undo, s.can_redo, s.l2, s.weight_decay, s.clip_norm, s.schedule)


def busy(name: str, journal: Path | None = None) -> Session:
    """A session in motion: Adam memory, mini-batches, a frozen weight, decay, clipping and a schedule."""
    s = Session(load_setup(ROOT / name / "model.toml"), journal=journal, rate=0.02, rule="adam", seed=3)
    s.set_batch_size(16)
    s.freeze([2])
    s.set_weight_decay(0.01)
    s.set_clip_norm(0.5)
    s.set_schedule(Schedule("cosine", steps=60, warmup=5))
    s.step(7)
    return s


def test_range_test_changes_nothing(tmp_path: Path) -> None:
    journal = tmp_path / "j.jsonl"
    s = busy("seed-sorter", journal)
    before = fingerprint(s)
    lines = journal.read_bytes()
    result = s.range_test([1e-4, 1e-2, 1.0, 1e3], steps=12)
    assert fingerprint(s) == before
    assert journal.read_bytes() == lines  # nothing journaled
    assert result.rates.size == 4 and s.range_result is result and not s.range_is_stale
    s.close()


def test_cancelled_range_test_changes_nothing() -> None:
    s = busy("bakery-demand")
    before = fingerprint(s)
    job = s.iter_range_test(None, 20)
    for done, _ in job:
        if done >= 30:
            job.close()
            break
    assert fingerprint(s) == before
    assert s.range_result is None


@pytest.mark.parametrize("k", [0, 2])
def test_each_rate_ends_where_real_steps_end(k: int) -> None:
    s = busy("seed-sorter")
    rates = [0.003, 0.03, 0.3]
    result = s.range_test(rates, steps=9)
    twin = busy("seed-sorter")
    twin.set_rate(rates[k])
    twin.step(9)
    assert result.train[k] == twin.train_cost()
    assert result.val is not None and result.val[k] == twin.val_cost()


def test_a_diverging_rate_is_marked() -> None:
    s = Session(load_setup(ROOT / "bakery-demand" / "model.toml"), rate=0.1)
    result = s.range_test([0.05, 1e6], steps=30)
    assert result.diverged_at[0] is None and np.isfinite(result.train[0])
    assert result.diverged_at[1] is not None and result.train[1] == np.inf
    assert result.best == 0


def test_default_rates_are_log_spaced_around_the_rate() -> None:
    s = Session(load_setup(ROOT / "kiln-tiny" / "model.toml"), rate=0.2)
    low, high, count = s.default_range()
    rates = log_rates(low, high, count)
    assert rates[0] == pytest.approx(0.002) and rates[-1] == pytest.approx(2.0)
    ratios = rates[1:] / rates[:-1]
    np.testing.assert_allclose(ratios, ratios[0], rtol=1e-12)  # even steps on a log axis


def test_a_change_makes_the_result_stale() -> None:
    s = Session(load_setup(ROOT / "kiln-tiny" / "model.toml"), rate=0.2)
    s.range_test([0.1, 0.2], steps=2)
    assert not s.range_is_stale
    s.set_rate(0.7)  # the test's rates are its own: a new rate changes nothing it found
    assert not s.range_is_stale
    s.set_rule("momentum")  # no weight moved, yet the test would now go differently
    assert s.range_is_stale
