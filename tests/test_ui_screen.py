"""The screen tells the truth: stale slopes, automatic numeric passes, runaway costs, 80x24, the rate search.

Pilot tests of what the screen says; the numbers behind it are checked
elsewhere (tests/test_session_*, tests/test_core_*). Budgets are chosen far
from a pass's time (60 s, 1 ns) so that no test depends on the speed of a
shared machine.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import pytest
from textual.pilot import Pilot
from textual.widgets import Label

from stepper.core.nearest import nearest_names
from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model, scenarios_root
from stepper.session import Session
from stepper.ui.app import StepperApp
from stepper.ui.dialogs import AskScreen, ConfirmScreen
from stepper.ui.keybar import KeyBar, bar_items
from stepper.ui.keys import KEYS
from stepper.ui.panels import StatusLine
from stepper.ui.ratepanel import RatePanel, search_rates
from stepper.ui.snapshot import VERDICT_TEXT

from pilot_keys import answer, press


NEVER, ALWAYS = 1e-9, 60.0


@pytest.fixture
def session() -> Session:
    return Session(load_setup(default_model()))


def status_lines(app: StepperApp) -> list[str]:
    return str(app.query_one(StatusLine).content).splitlines()


def status(app: StepperApp) -> str:
    return " ".join(" ".join(status_lines(app)).split())


def rows(app: StepperApp) -> list[str]:
    table = app.table
    return [table.render_line(y).text for y in range(1, min(table.size.height, table.rows.size + 1))]


def verdict_cell(row: str) -> str:
    return row[2:].split()[5]


# -- 1. stale numeric slopes -------------------------------------------------------------------


def test_a_stale_numeric_slope_never_shows_a_verdict(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "number_sign")
        assert all(verdict_cell(r) == "agree" for r in rows(app))
        for keys in (("s",), ("number_sign", "p"), ("number_sign", "R"), ("number_sign", "e")):
            await press(app, pilot, *keys)
            if isinstance(app.screen, AskScreen):
                await answer(app, pilot, "0.5")
            shown = rows(app)
            assert shown and all(verdict_cell(r) == "stale" for r in shown), (keys, shown)
            assert not any(f" {word} " in r for r in shown for word in VERDICT_TEXT.values() if word != "-")
            assert "numeric slopes stale" in status(app) and " agree" not in status(app)
        # Ordered by a stale column, the title says so.
        await press(app, pilot, "o", "o", "o", "o", "o")
        assert app.table.sort_key == "verdict"
        assert "by verdict (stale)" in (app.table.border_title or "")

    drive(session, check, size=(100, 30), numeric_budget=0.0)


def test_numeric_slopes_stay_current_by_themselves_under_the_budget(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert session.check is not None and not session.check_is_stale  # at start-up
        for keys in (("s",), ("p",), ("R",), ("z",), ("plus",)):
            await press(app, pilot, *keys)
            assert session.check is not None and not session.check_is_stale, keys
            assert all(verdict_cell(r) == "agree" for r in rows(app))
        assert app.job is None  # on the app's own thread: no job, no "busy" for the next key
        assert not [m for m, s in said if s == "error"]

    drive(session, check, numeric_budget=ALWAYS)


def test_over_the_budget_the_status_says_why_the_slopes_are_not_current(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert session.check is None
        assert "over the 0 ms budget of --numeric-budget" in status(app)
        await press(app, pilot, "number_sign", "s")
        assert session.check_is_stale
        assert "numeric slopes stale" in status(app) and "--numeric-budget" in status(app)

    drive(session, check, numeric_budget=NEVER)


# -- 3. runaway costs and refused steps --------------------------------------------------------


def test_a_runaway_job_stops_says_so_and_leads_back(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "r")
        await answer(app, pilot, "5")
        await press(app, pilot, "S")
        await answer(app, pilot, "20")
        assert app.job is None
        made = session.step_count
        assert 0 < made < 20  # stopped before the 20 steps
        assert math.isfinite(session.train_cost())
        problem = [m for m, s in said if s == "error"][-1]
        assert f"stopped after {made} of 20 steps" in problem
        assert "Undo is z" in problem and "V adopts the best rate of the preview" in problem
        assert "problem: stopped after" in status(app)
        panel = app.query_one(RatePanel)
        assert panel.display and "best" in panel.text  # the preview opened by itself
        await press(app, pilot, "z")
        assert session.step_count == 0
        await press(app, pilot, "V")
        assert session.rate < 5
        await press(app, pilot, "S")
        await answer(app, pilot, "20")
        assert session.step_count == 20 and session.train_cost() < session.history[0].train_cost

    drive(session, check, size=(80, 24))


def test_a_refused_step_is_in_the_last_line_and_points_to_the_preview(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "r")
        await answer(app, pilot, "1e200")
        await press(app, pilot, "s")
        assert session.step_count == 0
        text = status(app)
        assert "problem: step refused at rate 1e+200" in text and "V adopts the best rate of the preview" in text
        assert "e.g. 1e+199" not in text
        assert app.query_one(RatePanel).display

    drive(session, check, size=(80, 24))


# -- 4. fitting 80x24 and using 200x50 ---------------------------------------------------------


def test_at_80x24_every_line_is_whole(session: Session, tmp_path: Path, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "u", "2", "m")
        await answer(app, pilot, "16")
        session.step_count = 12345  # five-digit steps, as after a long run (display only)
        await press(app, pilot, "s")
        width = app.query_one(StatusLine).content_size.width
        lines = status_lines(app)
        assert all(len(line) <= width and "…" not in line for line in lines), lines
        assert "momentum" in status(app) and "analytic slopes" in status(app) and "batch 16" in status(app)
        # A long message wraps at word boundaries, whole.
        long_path = tmp_path / ("a-folder-with-a-long-name-" * 3) / "checkpoint.safetensors"
        await press(app, pilot, "w")
        await answer(app, pilot, str(long_path))
        assert f"saved {long_path}" in said[-1][0]
        assert str(long_path) in "".join(line.strip() for line in status_lines(app))
        # The key bar: whole keys only, ending with help and quit.
        bar = app.query_one(KeyBar)
        assert len(bar.text) <= 80 and bar.text.rstrip().endswith("? help  q quit")
        # The overwrite question shows its question, the path and its keys.
        await press(app, pilot, "w")
        await answer(app, pilot, str(long_path))
        assert isinstance(app.screen, ConfirmScreen)
        await pilot.pause()
        shown = " ".join(
            " ".join(strip.text for strip in label.render_lines(label.region.reset_offset))
            for label in app.screen.query(Label))
        shown = " ".join(shown.split())
        assert "Overwrite the file?" in shown and "y overwrite it" in shown and "any other key no" in shown
        assert str(long_path).replace("-", "") in shown.replace(" ", "").replace("-", "")
        await press(app, pilot, "n")

    drive(session, check, size=(80, 24))


def test_the_wide_screen_is_used(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.pause()
        table = app.table
        # The table shows more digits where it has the room, and its lines fill it.
        assert table.digits > 4
        assert table.scrollable_content_region.width - table.line_width() < 3
        assert len(status_lines(app)) <= 3  # the settings fit in fewer lines

    drive(session, check, size=(200, 50))


def test_the_selected_row_stays_in_view_when_a_panel_opens(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, *(["down"] * 8))
        await press(app, pilot, "t")
        await pilot.pause()
        assert any(r.startswith(">") for r in rows(app))

    drive(session, check, size=(80, 24))


# -- 5. the model and its file -----------------------------------------------------------------


def test_the_status_names_the_model_and_its_file(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert status(app).startswith("bakery demand (bundled bakery-demand/model.toml)")

    drive(session, check)


def test_a_custom_layer_says_its_code_runs(drive) -> None:
    session = Session(load_setup(scenarios_root() / "hive-gate-fixed" / "model.toml"))

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert "runs the code of gate.py: open only files you trust" in status(app)

    drive(session, check, size=(80, 24))


# -- 6. the rate preview -----------------------------------------------------------------------


def _bowl(centre: float) -> Any:
    """A preview whose cost after one step is smallest at rate ``centre`` (a bowl in log2 of the rate)."""

    def preview(rates: Any) -> list[tuple[float, float]]:
        chosen = [0.1 * 2.0**k for k in range(-4, 5)] if rates is None else list(rates)
        return [(r, (math.log2(r) - math.log2(centre)) ** 2) for r in chosen]

    return preview


@pytest.mark.parametrize("centre,edge", [(0.1, None), (1e-4, None), (30.0, None), (1e-9, "smallest"),
                                         (1e5, "largest")])
def test_the_search_widens_toward_the_best(centre: float, edge: str | None) -> None:
    search = search_rates(_bowl(centre))
    assert search.edge == edge
    assert search.best is not None
    if edge is None:
        assert search.best == pytest.approx(centre, rel=0.5)  # within one rung (a factor of 2)
    note = search.note() or ""
    assert (edge or "widened" if centre not in (0.1,) else "") in note


def test_the_best_row_is_on_screen_at_80x24_and_the_edge_is_said(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "r")
        await answer(app, pilot, "5")
        await press(app, pilot, "v")
        panel = app.query_one(RatePanel)
        await pilot.pause()
        lines = panel.text.splitlines()
        assert len(lines) <= panel.content_size.height
        best = [line for line in lines if line.startswith(">")]
        assert best and "best" in best[0]
        search = search_rates(session.preview_rates)
        assert float(best[0][1:].split()[0]) == pytest.approx(search.best, rel=1e-3)
        assert search.widened > 0  # the best was the ladder's smallest rate: the search went below it

    drive(session, check, size=(80, 24))


# -- 9, 11, 12 ---------------------------------------------------------------------------------


def test_a_wrong_name_gets_the_nearest_names(session: Session, drive) -> None:
    layout = session.net.layout
    assert nearest_names(layout, "L2.W[9,0]") == ["L2.W[5,0]"]
    assert nearest_names(layout, "L3.b[0]")[0] == "L2.b[0]"
    assert nearest_names(layout, "L1.w[1,2]")[0] == "L1.W[1,2]"

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "j")
        await answer(app, pilot, "L2.W[9,0]")
        assert "did you mean L2.W[5,0]?" in said[-1][0]

    drive(session, check)


def test_unsaved_clears_when_undo_returns_to_the_saved_state(session: Session, tmp_path: Path, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "w")
        await answer(app, pilot, str(tmp_path / "one.safetensors"))
        assert " unsaved " not in status(app)
        await press(app, pilot, "s")
        assert " unsaved " in status(app)
        await press(app, pilot, "z")
        assert " unsaved " not in status(app)
        await press(app, pilot, "R")
        assert "step counter stays at 1" in status(app)

    drive(session, check)


def test_keys_of_our_own_and_a_bar_in_step_with_the_help() -> None:
    bound = {name for key in KEYS for name in key.keys.split(",")}
    # Check, best rate and run-N are no longer on letters that command-line debuggers use.
    assert not {"c", "b", "n"} & bound
    assert {"number_sign", "V", "S"} <= bound
    for width in (40, 80, 120, 200):
        keys = bar_items(width)
        assert all(k in KEYS and k.help for k in keys)
        assert [k.action for k in keys[-2:]] == ["help", "quit"] or width < 30
    assert len(bar_items(200)) > len(bar_items(80))
    # A key that belongs to the moment comes first: x while a job runs.
    assert bar_items(80, frozenset({"job"}))[0].action == "cancel_job"
    assert all(k.action != "cancel_job" for k in bar_items(200))


def test_the_slice_figures_fit_beside_the_plot_at_80x24(session: Session, drive) -> None:
    from textual.widgets import Static

    from stepper.ui.slicepanel import SlicePanel

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        for rate in ("0.1", "5"):
            await press(app, pilot, "r")
            await answer(app, pilot, rate)
            if app.why != "slice":
                await press(app, pilot, "t")
            await pilot.pause()
            box = app.query_one(SlicePanel).query_one("#slice-figures", Static)
            lines = str(box.content).splitlines()
            assert len(lines) <= box.content_size.height, lines
            assert all(len(line) <= box.content_size.width for line in lines), lines
            assert lines[-1].startswith("span +-")

    drive(session, check, size=(80, 24))
