"""The app on a large model: numeric slopes on a sample first (rows left out marked), C for the rest; undo levels shown.

A model counts as large above ``FULL_CHECK_UP_TO`` weights; the tests lower that
limit so the bundled default scenario (37 weights) plays a large model and the
keys run in a moment. The numbers are checked against a check of every weight
(tests/test_core_numeric.py checks those against published references).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from textual.pilot import Pilot

from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model
from stepper.session import Session
from stepper.session import checking as session_checking
from stepper.ui.app import StepperApp
from stepper.ui.panels import StatusLine

from pilot_keys import press


@pytest.fixture
def session(monkeypatch: pytest.MonkeyPatch) -> Session:
    monkeypatch.setattr(session_checking, "FULL_CHECK_UP_TO", 20)
    monkeypatch.setattr(session_checking, "CHECK_SAMPLE", 12)
    return Session(load_setup(default_model()))


def status(app: StepperApp) -> str:
    """The status line's words (it packs its fields to the width, so line breaks fall anywhere)."""
    return " ".join(str(app.query_one(StatusLine).content).split())


def verdict_cells(app: StepperApp) -> list[str]:
    """The verdict column of every row, in the table's order."""
    return [app.table.row_cells(int(i))[5].strip() for i in app.table.rows]


def test_sample_first_then_the_rest(session: Session, drive: Any) -> None:
    n = session.net.n_params
    full = Session(session.setup).refresh_check()

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "number_sign")
        assert session.check is not None
        computed = session.check.verdict != ""
        # 12 of the 37, at least one from each of the 4 arrays.
        assert computed.sum() == 12
        assert {session.net.layout.block_of(int(i)).prefix for i in np.flatnonzero(computed)} == {
            "L1.W", "L1.b", "L2.W", "L2.b"}
        assert f"of 12 checked (C: all {n:,})" in status(app)
        cells = verdict_cells(app)
        assert cells.count("skipped") == n - 12 and cells.count("agree") == 12
        np.testing.assert_allclose(session.check.numeric[computed], full.numeric[computed], rtol=1e-9)

        await press(app, pilot, "C")
        assert bool(np.all(session.check.verdict != ""))
        assert "checked (C:" not in status(app) and f"numeric slopes: {n} agree" in status(app)
        assert "skipped" not in verdict_cells(app)
        np.testing.assert_allclose(session.check.numeric, full.numeric, rtol=1e-9)

        await press(app, pilot, "C")
        assert ("every numeric slope is computed already", "information") in said

    drive(session, check)


def test_after_a_step_the_rest_means_every_weight(session: Session, drive: Any) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "number_sign", "s")
        assert session.unchecked() is None  # the weights moved: the sample no longer holds
        await press(app, pilot, "C")
        assert bool(np.all(session.check.verdict != "")) and not session.check_is_stale

    drive(session, check)


def test_status_line_counts_undo_levels(session: Session, drive: Any) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert " undo " not in status(app)
        await press(app, pilot, "s", "s", "plus")
        assert " undo 3 " in status(app)
        await press(app, pilot, "z")
        assert " undo 2 " in status(app)
        session.undo_budget = 1  # the next level alone is over budget: only it stays
        await press(app, pilot, "s")
        assert " undo 1 " in status(app)

    drive(session, check)
