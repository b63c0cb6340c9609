"""The training views of the app at 80x24: samples (d), metric plot (%), histograms (H ;),
range test (E B), comparison with a checkpoint (D) and the training settings (k).

Each test drives the real app headless and checks what the screen shows
against an outside reference where there is one: scikit-learn's
``accuracy_score`` and ``log_loss`` for the metrics and row losses,
``numpy.histogram`` for the bars, ``numpy.linalg.norm`` for the comparison.
The range test is checked to change nothing of the session, bit for bit.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sklearn.metrics import accuracy_score, log_loss
from textual.pilot import Pilot

from stepper.core.schedules import Schedule
from stepper.formats.model_file import load_setup
from stepper.session import Session
from stepper.ui.app import StepperApp
from stepper.ui.comparepanel import ComparePanel
from stepper.ui.costplot import TRAIN_MARK
from stepper.ui.dialogs import AskScreen, ChoiceScreen
from stepper.ui.factorpanel import FactorPanel
from stepper.ui.histpanel import HistogramPanel
from stepper.ui.metricplot import MetricPlot
from stepper.ui.rangepanel import RangePanel
from stepper.ui.rowsscreen import RowList, RowsScreen
from stepper.ui.panels import StatusLine
from pilot_keys import answer, press
from test_ui_keys import errors

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
SIZE = (80, 24)


@pytest.fixture
def sorter() -> Session:
    return Session(load_setup(SCENARIOS / "seed-sorter" / "model.toml"), rate=0.5)


def accuracies(session: Session) -> tuple[float, float]:
    """Training and validation accuracy by scikit-learn, from the network's outputs."""
    data = session.setup.data
    out = []
    for X, Y in ((data.X, data.Y), (data.X_val, data.Y_val)):
        said = np.argmax(session.net.predict(session.theta, X), axis=1)
        out.append(accuracy_score(np.argmax(Y, axis=1), said))
    return out[0], out[1]


def state(s: Session) -> tuple[Any, ...]:
    return (s.theta.tobytes(), s.frozen.tobytes(), s.rule_state.t,
            tuple((k, v.tobytes()) for k, v in sorted(s.rule_state.arrays.items())), s.step_count,
            tuple(s.history), json.dumps(s.batch_rng.bit_generator.state, sort_keys=True), s.can_undo)


# -- status and samples ----------------------------------------------------------------------------


def test_status_shows_accuracy_as_sklearn_counts_it(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "s")
        train, val = accuracies(sorter)
        text = " ".join(str(app.query_one(StatusLine).content).split())
        assert f" acc {100 * train:.0f}%/{100 * val:.0f}% rate 0.5 " in text, text

    drive(sorter, check, SIZE)


def test_samples_screen_lists_the_worst_rows_and_picks_one_for_the_factors(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "d")
        screen = app.screen
        assert isinstance(screen, RowsScreen)
        rows = screen.query_one(RowList)
        table = screen.table
        assert rows.rows.size == 300
        first = int(rows.rows[0])
        # The first row has the largest loss of all 300; its loss is log_loss on that one row.
        assert table.loss[first] == table.loss.max()
        true = int(np.argmax(table.target[first]))
        assert table.loss[first] == pytest.approx(log_loss([true], [table.output[first]], labels=[0, 1, 2]))
        assert rows.render_line(1).text.startswith("> ")
        # tab: training rows only; o: file order; the third training row in file order is sample 2.
        await press(app, pilot, "tab")
        assert rows.rows.size == 240 and not table.validation[rows.rows].any()
        await press(app, pilot, "o")
        lines = table.line[rows.rows]
        assert np.all(np.diff(lines) > 0)
        await press(app, pilot, "down", "down", "enter")
        assert not isinstance(app.screen, RowsScreen)
        assert app.why == "factors" and app.sample == 2
        assert "sample 2" in str(app.query_one(FactorPanel).content)

    drive(sorter, check, SIZE)


def test_a_validation_row_has_no_factors(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "d", "tab", "tab", "enter")
        assert any("takes no part in the slopes" in m for m in errors(said))
        assert app.why != "factors"

    drive(sorter, check, SIZE)


# -- metric plot ----------------------------------------------------------------------------------


def test_metric_plot_records_accuracy_from_then_on(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s")  # before the plot: no figure recorded
        await press(app, pilot, "percent_sign")
        plot = app.query_one(MetricPlot)
        assert plot.display and sorter.track_metrics
        await press(app, pilot, "S")
        await answer(app, pilot, "4")
        assert sorter.history[1].train_metric is None
        last = sorter.history[-1]
        train, val = accuracies(sorter)
        assert (last.train_metric, last.val_metric) == pytest.approx((train, val))
        assert "recorded since step 2" in plot.border_title
        assert any(TRAIN_MARK in line for line in plot.plot_lines())
        await press(app, pilot, "percent_sign")
        assert not plot.display and not sorter.track_metrics

    drive(sorter, check, SIZE)


# -- histograms -----------------------------------------------------------------------------------


def test_histograms_count_the_selected_layer(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s", "H")
        panel = app.query_one(HistogramPanel)
        assert app.why == "histograms"
        W1 = sorter.net.views(sorter.theta)[0]["W"]
        counts, edges = np.histogram(W1, bins=20)  # numpy.histogram, the reference
        assert panel.border_title.startswith("L1 dense 4->8 tanh: WEIGHTS")
        assert f"{W1.size} values from {edges[0]:.3g} to {edges[-1]:.3g}" in panel.summary_text
        assert f"mean {W1.mean():.3g}" in panel.summary_text
        await press(app, pilot, "semicolon")
        assert "SLOPES" in panel.border_title
        await press(app, pilot, "semicolon")
        update = sorter.last_update
        assert update is not None
        layer1 = sorter.net.views(update)[0]["W"]
        assert f"mean {layer1.mean():.3g}" in panel.summary_text
        app.table.select(sorter.net.layout.index_of["L2.W[0,0]"])
        await pilot.pause()
        assert panel.border_title.startswith("L2 dense 8->3 softmax: weights slopes UPDATES")
        await press(app, pilot, "z")  # the step undone: there is no last update
        assert panel.summary_text.startswith("no last update")

    drive(sorter, check, SIZE)


# -- range test -----------------------------------------------------------------------------------


def test_range_test_runs_as_a_job_changes_nothing_and_b_adopts(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        sorter.set_batch_size(32)
        await press(app, pilot, "s", "E")
        before = state(sorter)
        assert isinstance(app.screen, AskScreen)
        await answer(app, pilot, "0.01 3 4 6")
        result = sorter.range_result
        assert result is not None and result.steps == 6
        np.testing.assert_allclose(result.rates, [0.01, 0.01 * 300 ** (1 / 3), 0.01 * 300 ** (2 / 3), 3.0])
        assert state(sorter) == before
        panel = app.query_one(RangePanel)
        best = result.best
        assert best is not None
        assert f"lowest: rate {result.rates[best]:.3g}" in panel.summary_text
        await press(app, pilot, "B")
        assert sorter.rate == result.rates[best]
        assert not sorter.range_is_stale  # the rate is not what the test starts from

    drive(sorter, check, SIZE)


def test_range_test_is_cancelled_with_x(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        before = state(sorter)
        await pilot.press("E")
        await pilot.pause()
        app.screen.query_one("#answer").value = "0.001 1 8 20000"  # type: ignore[attr-defined]
        await pilot.press("enter")
        await pilot.pause()
        assert app.job == "rate range test"
        await press(app, pilot, "x")
        assert app.job is None and sorter.range_result is None
        assert state(sorter) == before
        assert any("rate range test cancelled" in m for m, _ in said)

    drive(sorter, check, SIZE)


def test_range_test_refuses_bad_input(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "E")
        await answer(app, pilot, "1 0.1 4 5")
        await press(app, pilot, "B")
        assert errors(said) == ["range test: rates 1 to 0.1 must be positive, the first no larger",
                                "no range test yet: E runs one"]

    drive(sorter, check, SIZE)


# -- comparison -----------------------------------------------------------------------------------


def test_compare_with_a_checkpoint(sorter: Session, drive, tmp_path: Path) -> None:
    saved = sorter.save_checkpoint(tmp_path / "a.safetensors")
    a = sorter.theta.copy()

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "S")
        await answer(app, pilot, "5")
        await press(app, pilot, "D")
        await answer(app, pilot, str(saved))
        text = str(app.query_one(ComparePanel).content)
        change = sorter.theta - a
        assert f"change b - a: norm {np.linalg.norm(change):.4g}" in text
        assert f"{sorter.history[0].train_cost:.8g}" in text and f"{sorter.train_cost():.8g}" in text
        await press(app, pilot, "s")  # the panel follows the weights
        assert f"{sorter.train_cost():.8g}" in str(app.query_one(ComparePanel).content)
        await press(app, pilot, "D")
        await answer(app, pilot, str(tmp_path / "missing.safetensors"))
        assert any("no such file" in m for m in errors(said))

    drive(sorter, check, SIZE)


# -- settings -------------------------------------------------------------------------------------


def test_training_settings_dialog(sorter: Session, drive) -> None:
    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "k")
        assert isinstance(app.screen, ChoiceScreen)
        await press(app, pilot, "1")
        await answer(app, pilot, "0.01")
        assert sorter.l2 == 0.01
        assert "L2 0.01 (" in str(app.query_one(StatusLine).content)
        await press(app, pilot, "k", "4")
        await answer(app, pilot, "cosine:steps=10,warmup=2")
        assert sorter.schedule == Schedule("cosine", steps=10, warmup=2)
        assert "rate 0.5 x0.5" in str(app.query_one(StatusLine).content)  # warm-up: (0 + 1) / 2
        await press(app, pilot, "k", "3")
        await answer(app, pilot, "-1")
        await press(app, pilot, "k", "4")
        await answer(app, pilot, "cosine")
        assert errors(said)[-2:] == ["clipping norm -1 must be a positive number (or none)",
                                     "schedule: a cosine schedule needs steps"]
        await press(app, pilot, "z", "z")
        assert (sorter.l2, sorter.schedule) == (0.0, Schedule())

    drive(sorter, check, SIZE)
