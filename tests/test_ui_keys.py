"""Every key of the app, driven through Textual's pilot on the bundled default scenario.

Each test presses keys in a headless app (animations off), waits for workers,
and checks both the session's state and what the table or status line shows.
The numbers a key produces are the session's business (tests/test_session_*);
here one step is also checked against SciPy's finite-difference gradient, so
the table is known to show what gradient descent gives.
"""

from __future__ import annotations

import asyncio
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy.optimize import approx_fprime
from textual.pilot import Pilot

from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model
from stepper.session import Session
from stepper.ui.app import StepperApp
from stepper.ui.dialogs import AskScreen, ChoiceScreen, ConfirmScreen, HelpScreen, QuitScreen, help_rows
from stepper.ui.keys import KEYS
from stepper.ui.panels import JobBar, StatusLine
from stepper.ui.ratepanel import RatePanel
from stepper.ui.rowsscreen import RowList, RowsScreen
from stepper.ui.weights import WeightTable

from pilot_keys import answer, press


@pytest.fixture
def session() -> Session:
    return Session(load_setup(default_model()))


def status(app: StepperApp) -> str:
    """The status line's words, its line breaks as single spaces (it packs fields to the width)."""
    return " ".join(str(app.query_one(StatusLine).content).split()) + " "


def cell_number(app: StepperApp, y: int, column: int) -> float:
    """The number in column ``column`` (1: value, 2: analytic, 3: numeric) of table line ``y``."""
    return float(row_text(app, y)[2:].split()[column])


def row_text(app: StepperApp, y: int) -> str:
    """Screen line ``y`` of the table (0 is the header)."""
    return app.table.render_line(y).text


def errors(said: list[tuple[str, str]]) -> list[str]:
    return [message for message, severity in said if severity == "error"]


# -- descent ---------------------------------------------------------------------------------


def test_s_takes_one_gradient_descent_step(session: Session, drive) -> None:
    setup = session.setup
    theta0 = setup.theta0.copy()
    X, Y = setup.data.X, setup.data.Y
    # Reference slope: SciPy's forward differences of the same cost (scipy.optimize.approx_fprime).
    reference = approx_fprime(theta0, lambda t: setup.network.cost(t, X, Y), 1e-7)

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s")
        assert session.step_count == 1
        np.testing.assert_allclose(session.theta, theta0 - 0.1 * reference, atol=1e-6)
        assert "step 1 " in status(app)
        assert "1 step" in status(app)  # the last action, with its effect on the cost
        # The table shows the value to its width's digits (at least four, here more).
        assert cell_number(app, 1, 1) == pytest.approx(session.theta[0], rel=1e-9)

    drive(session, check)


def test_shift_s_runs_n_steps_in_a_worker_with_a_progress_bar(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.press("S")
        assert isinstance(app.screen, AskScreen)
        await answer(app, pilot, "25")
        assert session.step_count == 25
        assert app.job is None
        assert not app.query_one(JobBar).has_class("-running")
        assert "step 25 " in status(app)
        assert len(session.history) == 26
        # The 25 steps are one undo unit.
        await press(app, pilot, "z")
        assert session.step_count == 0

    drive(session, check)


def test_shift_s_refuses_a_count_that_is_not_a_whole_number(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.press("S")
        await answer(app, pilot, "many")
        assert session.step_count == 0
        assert any("'many' is not a whole number" in m for m in errors(said))
        await pilot.press("S")
        await answer(app, pilot, "0")
        assert any("at least 1" in m for m in errors(said))

    drive(session, check)


def test_x_cancels_a_long_run_and_keeps_the_steps_done(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.press("S")
        assert isinstance(app.screen, AskScreen)
        app.screen.query_one("#answer").value = "1000000"  # type: ignore[attr-defined]
        await pilot.press("enter")
        while session.step_count < 3:
            await asyncio.sleep(0.01)
        assert app.job == "steps"
        assert app.query_one(JobBar).has_class("-running")
        # Other session operations are refused while the run goes on; the view stays usable.
        await pilot.press("s")
        assert any("busy" in m for m in errors(said))
        await pilot.press("o")
        assert app.table.sort_key == "value"
        await pilot.press("x")
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert app.job is None
        done = session.step_count
        assert 3 <= done < 1_000_000
        assert f"step {done} " in status(app)
        assert any("cancelled" in m for m, _ in said)
        await press(app, pilot, "z")
        assert session.step_count == 0

    drive(session, check)


def test_escape_also_cancels_and_says_when_nothing_runs(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "x")
        assert ("nothing is running", "information") in said

    drive(session, check)


def test_plus_equals_and_minus_double_and_halve_the_rate(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "plus")
        assert session.rate == pytest.approx(0.2)
        await press(app, pilot, "equals_sign")
        assert session.rate == pytest.approx(0.4)
        await press(app, pilot, "minus", "minus", "minus")
        assert session.rate == pytest.approx(0.05)
        assert "rate 0.05 " in status(app)

    drive(session, check)


def test_r_types_a_rate_and_refuses_text(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.press("r")
        await answer(app, pilot, "0.025")
        assert session.rate == 0.025
        await pilot.press("r")
        await answer(app, pilot, "fast")
        assert session.rate == 0.025
        assert any("'fast' is not a number" in m for m in errors(said))
        await pilot.press("r")
        await answer(app, pilot, "-1")
        assert session.rate == 0.025
        assert any("must be a positive number" in m for m in errors(said))

    drive(session, check)


def test_u_chooses_the_update_rule(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "u")
        assert isinstance(app.screen, ChoiceScreen)
        await press(app, pilot, "3")
        assert session.rule == "adam"
        await press(app, pilot, "u", "up", "enter")
        assert session.rule == "momentum"
        assert " momentum " in status(app)
        await press(app, pilot, "u", "escape")
        assert session.rule == "momentum"

    drive(session, check)


def test_g_switches_the_slope_source(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "g")
        assert session.slope_source == "numeric"
        assert "numeric slopes" in status(app)
        await press(app, pilot, "s")
        assert session.step_count == 1
        await press(app, pilot, "g")
        assert session.slope_source == "analytic"

    drive(session, check)


def test_m_sets_the_mini_batch_size(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.press("m")
        await answer(app, pilot, "8")
        assert session.batch_size == 8
        assert "batch 8" in status(app)
        await pilot.press("m")
        await answer(app, pilot, "100000")
        assert session.batch_size == 8
        assert any("batch size 100000" in m for m in errors(said))
        await pilot.press("m")
        await answer(app, pilot, "")
        assert session.batch_size is None
        assert "batch 8" not in status(app)

    drive(session, check)


def test_v_shows_the_rate_preview_and_shift_v_adopts_the_best(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        panel = app.query_one(RatePanel)
        assert not panel.display
        await press(app, pilot, "v")
        assert panel.display
        preview = session.preview_rates()
        best = session.best_preview_rate(preview)
        assert preview[0][0] < best < preview[-1][0]  # inside the ladder: no widening needed here
        text = panel.text
        assert "best" in text and "now" in text
        assert f">{best:<10.4g}" in text
        await press(app, pilot, "V")
        assert session.rate == best
        await press(app, pilot, "v")
        assert not panel.display

    drive(session, check)


@pytest.mark.parametrize("size", [(80, 24), (200, 50)])
def test_v_with_a_panel_over_the_plot_shows_the_preview(session: Session, drive, size: tuple[int, int]) -> None:
    # Below 140 columns a panel (here the histograms) stands where the plot and the preview are: v
    # closes it rather than switch the preview on unseen. From 140 columns both are shown.
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        panel = app.query_one(RatePanel)
        await press(app, pilot, "H")
        assert app.why == "histograms"
        await press(app, pilot, "v")
        assert panel.display and panel.region.width > 0 and panel.region.height > 0
        assert app.why == (None if size[0] < 140 else "histograms")

    drive(session, check, size)


# -- slopes ----------------------------------------------------------------------------------


def test_number_sign_computes_numeric_slopes_and_fills_the_table(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert "numeric slopes not computed" in status(app)
        assert row_text(app, 1).rstrip().endswith("-")
        await press(app, pilot, "number_sign")
        assert session.check is not None and not session.check_is_stale
        n = session.net.n_params
        assert f"{n} agree" in status(app)
        assert " agree " in row_text(app, 1)
        # After a step the numbers are marked stale (with automatic passes off, as here).
        await press(app, pilot, "s")
        assert "numeric slopes stale" in status(app)
        assert "numeric*" in row_text(app, 0)

    drive(session, check, numeric_budget=0.0)


def test_a_recomputes_numeric_slopes_after_every_step(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "a")
        assert session.refresh_numeric_after_step
        assert "numeric after every step" in status(app)
        await press(app, pilot, "s")
        assert session.check is not None and not session.check_is_stale
        await press(app, pilot, "a")
        assert not session.refresh_numeric_after_step
        await press(app, pilot, "s")
        assert session.check_is_stale

    drive(session, check, numeric_budget=0.0)


# -- weights ---------------------------------------------------------------------------------


def test_f_freezes_and_unfreezes_the_selected_weight(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "down", "f")
        assert app.table.selected == 1
        assert session.frozen[1] and session.frozen.sum() == 1
        assert row_text(app, 2).rstrip().endswith("yes")
        before = session.theta[1]
        await press(app, pilot, "s")
        assert session.theta[1] == before
        await press(app, pilot, "f")
        assert not session.frozen.any()

    drive(session, check)


def test_shift_f_freezes_the_whole_layer(session: Session, drive) -> None:
    layer = session.net.layout.layer_index

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "end", "F")
        assert np.array_equal(session.frozen, layer == layer[-1])
        await press(app, pilot, "F")
        assert not session.frozen.any()

    drive(session, check)


def test_p_perturbs_the_selected_weight_and_shift_p_all(session: Session, drive) -> None:
    theta0 = session.theta.copy()

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "down", "down", "p")
        changed = np.flatnonzero(session.theta != theta0)
        assert changed.tolist() == [2]
        await press(app, pilot, "P")
        assert np.all(session.theta != theta0)
        assert "perturbed all 37 parameters by " in status(app)

    drive(session, check)


def test_e_types_a_value_for_the_selected_weight(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "e")
        assert isinstance(app.screen, AskScreen)
        assert float(app.screen.query_one("#answer").value) == session.theta[0]  # type: ignore[attr-defined]
        await answer(app, pilot, "1.5")
        assert session.theta[0] == 1.5
        assert cell_number(app, 1, 1) == 1.5
        await press(app, pilot, "e")
        await answer(app, pilot, "big")
        assert session.theta[0] == 1.5
        assert any("'big' is not a number" in m for m in errors(said))

    drive(session, check)


def test_shift_r_resets_and_z_undoes_and_shift_z_redoes(session: Session, drive) -> None:
    theta0 = session.theta.copy()

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "s")
        after_two = session.theta.copy()
        await press(app, pilot, "R")
        assert np.array_equal(session.theta, theta0)
        await press(app, pilot, "z")
        assert np.array_equal(session.theta, after_two)
        await press(app, pilot, "z", "z")
        assert np.array_equal(session.theta, theta0)
        assert session.step_count == 0
        await press(app, pilot, "z")
        assert ("nothing to undo", "information") in said
        await press(app, pilot, "Z")
        assert session.step_count == 1
        assert "redid" in status(app)

    drive(session, check)


def test_a_divergent_step_is_a_message_and_changes_nothing(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.press("r")
        await answer(app, pilot, "1e200")
        theta = session.theta.copy()
        await press(app, pilot, "s")
        assert session.step_count == 0
        assert np.array_equal(session.theta, theta)
        assert any("step refused" in m for m in errors(said))
        # Same through the worker.
        await pilot.press("S")
        await answer(app, pilot, "3")
        assert session.step_count == 0
        assert app.job is None

    drive(session, check)


# -- table -----------------------------------------------------------------------------------


def test_cursor_keys_move_the_selection(session: Session, drive) -> None:
    n = session.net.n_params

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        table = app.table
        await press(app, pilot, "down", "down")
        assert table.selected == 2
        await press(app, pilot, "up")
        assert table.selected == 1
        await press(app, pilot, "end")
        assert table.selected == n - 1
        await press(app, pilot, "home")
        assert table.selected == 0
        await press(app, pilot, "pagedown")
        assert table.selected == table.page_rows
        await press(app, pilot, "pageup")
        assert table.selected == 0
        assert row_text(app, 1).startswith(">")

    drive(session, check)


def test_o_orders_by_columns_and_shift_o_flips(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        table = app.table
        await press(app, pilot, "o")
        assert table.sort_key == "value"
        sizes = np.abs(session.theta[table.rows])
        assert np.all(np.diff(sizes) <= 0)
        assert "largest first" in (table.border_title or "")
        await press(app, pilot, "O")
        sizes = np.abs(session.theta[table.rows])
        assert np.all(np.diff(sizes) >= 0)
        await press(app, pilot, "o")
        assert table.sort_key == "analytic"
        slopes = np.abs(session.analytic_slopes()[table.rows])
        assert np.all(np.diff(slopes) <= 0)
        # The largest slope is on the first row of the screen.
        assert row_text(app, 1)[2:].split()[0] == session.names[int(np.argmax(np.abs(session.analytic_slopes())))]

    drive(session, check)


def test_brackets_filter_by_layer_and_slash_by_name(session: Session, drive) -> None:
    layer = session.net.layout.layer_index
    n = session.net.n_params

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        table = app.table
        await press(app, pilot, "right_square_bracket")
        assert np.array_equal(table.rows, np.flatnonzero(layer == 0))
        await press(app, pilot, "right_square_bracket")
        assert np.array_equal(table.rows, np.flatnonzero(layer == 1))
        await press(app, pilot, "right_square_bracket")
        assert table.rows.size == n
        await press(app, pilot, "left_square_bracket")
        assert np.array_equal(table.rows, np.flatnonzero(layer == 1))
        await press(app, pilot, "left_square_bracket", "left_square_bracket")
        assert table.rows.size == n
        await pilot.press("slash")
        await answer(app, pilot, "L1.b[*]")
        assert [session.names[i] for i in table.rows] == [f"L1.b[{k}]" for k in range(6)]
        assert "6 of" in (table.border_title or "")
        await pilot.press("slash")
        await answer(app, pilot, "")
        assert table.rows.size == n

    drive(session, check)


def test_j_jumps_to_a_weight_by_name(session: Session, drive) -> None:
    target = session.net.layout.index_of["L2.W[3,0]"]

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "right_square_bracket")  # only layer 1 shown: the jump clears it
        await pilot.press("j")
        await answer(app, pilot, "L2.W[3, 0]")
        assert app.table.selected == target
        assert app.table.layer_filter is None
        await pilot.press("j")
        await answer(app, pilot, "L9.W[0,0]")
        assert app.table.selected == target
        assert any("no weight is called 'L9.W[0,0]'" in m for m in errors(said))

    drive(session, check)


def test_y_switches_the_plot_to_a_log_axis(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "s", "s")
        plot = app.plot
        linear = plot.plot_lines()
        await press(app, pilot, "y")
        assert plot.log_scale and plot.is_log
        assert "log" in (plot.border_title or "")
        assert plot.plot_lines() != linear
        await press(app, pilot, "y")
        assert not plot.log_scale

    drive(session, check)


# -- files -----------------------------------------------------------------------------------


def test_w_saves_a_checkpoint_and_l_loads_it(session: Session, tmp_path: Path, drive) -> None:
    target = tmp_path / "ck" / "saved.safetensors"

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "s")
        saved_theta = session.theta.copy()
        await pilot.press("w")
        assert isinstance(app.screen, AskScreen)
        assert app.screen.query_one("#answer").value == str(session.default_checkpoint_path())  # type: ignore[attr-defined]
        await answer(app, pilot, str(target))
        assert target.is_file()
        assert not session.dirty
        assert "unsaved" not in status(app)
        await press(app, pilot, "s")
        assert "unsaved" in status(app)
        # Saving over an existing file asks first; any key but y keeps the old file.
        await pilot.press("w")
        await answer(app, pilot, str(target))
        assert isinstance(app.screen, ConfirmScreen)
        await press(app, pilot, "n")
        assert session.dirty
        await pilot.press("l")
        await answer(app, pilot, str(target))
        assert np.array_equal(session.theta, saved_theta)
        assert session.step_count == 2
        await pilot.press("l")
        await answer(app, pilot, str(tmp_path / "missing.safetensors"))
        assert len(errors(said)) == 1
        assert session.step_count == 2

    drive(session, check)


def test_loading_a_checkpoint_of_another_model_is_a_message(session: Session, tmp_path: Path, drive) -> None:
    other = tmp_path / "other.safetensors"
    wrong = tmp_path / "wrong.safetensors"
    wrong.write_bytes(b"this is not a checkpoint")
    Session(load_setup(default_model())).save_checkpoint(other)

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s")
        theta = session.theta.copy()
        await pilot.press("l")
        await answer(app, pilot, str(wrong))
        assert np.array_equal(session.theta, theta)
        assert errors(said) and str(wrong) in errors(said)[0]

    drive(session, check)


# -- app -------------------------------------------------------------------------------------


def test_question_mark_lists_every_key(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "question_mark")
        assert isinstance(app.screen, HelpScreen)
        listed = {text for _, _, text in help_rows()}
        assert listed == {key.help for key in KEYS}
        await press(app, pilot, "escape")
        assert not isinstance(app.screen, HelpScreen)
        await press(app, pilot, "f1")
        assert isinstance(app.screen, HelpScreen)

    drive(session, check)


def test_main_keys_do_nothing_while_a_dialog_is_open(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "question_mark", "s", "plus", "R")
        assert isinstance(app.screen, HelpScreen)
        await press(app, pilot, "escape", "u", "s")  # the rule list is open: s is not a step
        assert isinstance(app.screen, ChoiceScreen)
        await press(app, pilot, "escape")
        assert session.step_count == 0 and session.rate == 0.1 and not session.dirty

    drive(session, check)


def test_q_quits_at_once_without_changes(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "q")

    app = drive(session, check)
    assert app.return_code == 0
    assert not app.is_running


def test_q_with_unsaved_changes_asks_and_stays_on_other_keys(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "q")
        assert isinstance(app.screen, QuitScreen)
        await press(app, pilot, "k")
        assert not isinstance(app.screen, QuitScreen)
        assert app.is_running
        await press(app, pilot, "q", "y")

    app = drive(session, check)
    assert not app.is_running
    assert session.step_count == 1


def test_q_then_w_saves_first_and_then_quits(session: Session, tmp_path: Path, drive) -> None:
    target = tmp_path / "before-quit.safetensors"

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "q", "w")
        assert isinstance(app.screen, AskScreen)
        await answer(app, pilot, str(target))

    app = drive(session, check)
    assert target.is_file()
    assert not session.dirty
    assert not app.is_running


def test_every_key_in_the_map_has_an_action() -> None:
    app_actions = {name[len("action_"):] for name in dir(StepperApp) if name.startswith("action_")}
    table_actions = {name[len("action_"):] for name in dir(WeightTable) if name.startswith("action_")}
    rows_actions = {name[len("action_"):] for name in dir(RowList) if name.startswith("action_")}
    screen_actions = {name[len("action_"):] for name in dir(RowsScreen) if name.startswith("action_")}
    actions = {"app": app_actions, "table": table_actions, "rows": rows_actions, "rows-screen": screen_actions}
    for key in KEYS:
        action = key.action.split("(")[0]
        assert action in actions[key.scope], key


# -- screens ---------------------------------------------------------------------------------


def test_layout_stacks_on_narrow_terminals_and_sits_side_by_side_on_wide_ones(session: Session, drive) -> None:
    async def narrow(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.pause()
        table, plot = app.table.region, app.plot.region
        assert plot.y >= table.bottom
        assert table.width == 80
        assert app.table.line_width() <= table.width

    async def wide(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await pilot.pause()
        table, plot = app.table.region, app.plot.region
        assert plot.x >= table.right
        assert plot.y == table.y

    drive(session, narrow, size=(80, 24))
    drive(Session(load_setup(default_model())), wide, size=(160, 40))


def test_no_color_keeps_verdicts_readable(session: Session, monkeypatch: pytest.MonkeyPatch, drive) -> None:
    # README: "Verdicts are words, so they read without colour (NO_COLOR is respected)".
    # The first four weights are given one verdict each; with NO_COLOR set, each row must
    # name its own verdict in a word of its own, and carry no colour.
    import dataclasses

    monkeypatch.setenv("NO_COLOR", "1")
    result = session.refresh_check()
    verdict = result.verdict.copy()
    verdict[:4] = ["agree", "doubtful", "disagree", "kink"]
    session.check = dataclasses.replace(result, verdict=verdict)
    words = ["agree", "doubtful", "disagree", "kink"]

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        assert app.no_color
        names = session.net.layout.names
        for row, word in enumerate(words, start=1):
            line = app.table.render_line(row)
            text = line.text
            assert names[row - 1] in text.split()[:2], text
            assert f" {word}" in text, text
            assert not [w for w in words if w != word and f" {w} " in f"{text} "], text
            filtered = line
            for line_filter in app.get_line_filters():
                filtered = filtered.apply_filter(line_filter, app.background_colors[0])
            assert all(seg.style is None or (seg.style.color is None and seg.style.bgcolor is None)
                       for seg in filtered), text
        shown = status(app)
        for count, word in [(result.verdict.size - 3, "agree"), (1, "doubtful"), (1, "disagree"), (1, "kink")]:
            assert f"{count} {word}" in shown, shown

    drive(session, check, size=(80, 24))


def test_status_and_rows_fit_80_columns(session: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "number_sign", "s")
        for line in str(app.query_one(StatusLine).content).splitlines():
            assert len(line) <= 78, line
        assert len(row_text(app, 1).rstrip()) <= 80
        assert math.isfinite(session.train_cost())

    drive(session, check, size=(80, 24))
