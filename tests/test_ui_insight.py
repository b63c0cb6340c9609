"""The "why" panels of the app (t slice, i factors, h health) and custom layers in the app.

Each test drives the real app headless at 80x24 or 100x30 and checks that a
panel shows what the core functions give for the selected weight, and that it
follows the selection, the steps and the rate. The core's numbers are checked
against published facts in tests/test_insight_*.py; here each panel is also
anchored once to SciPy (scipy.differentiate, scipy.optimize.approx_fprime), so
what the user reads is known to be the slope and curvature of the cost.
"""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest
from scipy.differentiate import derivative, hessian
from scipy.optimize import approx_fprime
from textual.pilot import Pilot

from stepper.core.breakdown import slope_breakdown
from stepper.core.health import layer_health
from stepper.core.slice import cost_slice
from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model
from stepper.session import Session
from stepper.ui.app import StepperApp
from stepper.ui.dialogs import AskScreen
from stepper.ui.factorpanel import FactorPanel
from stepper.ui.healthpanel import HealthPanel
from stepper.ui.keys import KEYS
from stepper.ui.panels import StatusLine
from stepper.ui.slicepanel import SlicePanel, SlicePlot

from pilot_keys import answer, press


SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
SIZES = [(80, 24), (100, 30)]


async def jump(app: StepperApp, pilot: Pilot[Any], name: str) -> None:
    """Put the table's cursor on weight ``name`` (what ``j`` does, without its dialog)."""
    app.table.select(app.session.net.layout.index_of[name])
    await pilot.pause()


def errors(said: list[tuple[str, str]]) -> list[str]:
    return [message for message, severity in said if severity == "error"]


def flat(text: str) -> str:
    """Panel text with its line breaks and indents made single spaces (lines wrap by width)."""
    return " ".join(text.split())


def shows(text: str, expected: str) -> bool:
    """``expected`` appears in ``text``, both with whitespace runs made single spaces."""
    return flat(expected) in flat(text)


def slice_text(app: StepperApp) -> str:
    return app.query_one(SlicePanel).figures_text


def panel_text(app: StepperApp, panel: type[FactorPanel] | type[HealthPanel]) -> str:
    return str(app.query_one(panel).content)


def cost_along(session: Session, index: int) -> Callable[[Any], Any]:
    """The training cost as a function of weight ``index`` alone, elementwise over an array of values."""
    net, theta, data = session.net, session.theta.copy(), session.setup.data

    def along(values: Any) -> Any:
        values = np.asarray(values, dtype=np.float64)
        out = np.empty(values.shape)
        for k, value in np.ndenumerate(values):
            moved = theta.copy()
            moved[index] = value
            out[k] = net.cost(moved, data.X, data.Y)
        return out

    return along


# -- t: the slice ----------------------------------------------------------------------------


@pytest.mark.parametrize("size", SIZES)
def test_t_shows_the_cost_along_the_selected_weight(size: tuple[int, int], drive) -> None:
    session = Session(load_setup(default_model()))
    data = session.setup.data

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        panel = app.query_one(SlicePanel)
        assert not panel.display
        await press(app, pilot, "down", "down", "down", "t")
        assert panel.display and not app.plot.display  # in the cost plot's place below 140 columns
        index = app.table.selected
        assert index == 3
        core = cost_slice(session.net, session.theta, data.X, data.Y, index, session.rate)
        text = flat(slice_text(app))
        assert shows(text, f"slope {core.slope: .4e}")
        assert shows(text, f"curvature {core.curvature: .4e}")
        assert shows(text, f"rate x curv. {core.rate_curvature:.3g}: {core.regime.upper()}")
        assert shows(text, f"one step {core.value:.4g} -> {core.landing:.4g}")
        assert shows(text, "LeCun et al. 1998")
        assert session.names[3] in (panel.border_title or "")
        # What the panel says is the slope and curvature of the cost along that weight, by
        # SciPy's adaptive finite differences (scipy.differentiate.derivative and hessian).
        along = cost_along(session, index)
        assert float(derivative(along, session.theta[index]).df) == pytest.approx(core.slope, rel=1e-6)
        second = hessian(lambda x: along(x[0]), np.array([session.theta[index]])).ddf
        assert float(second[0, 0]) == pytest.approx(core.curvature, rel=1e-5)
        # The plot: drawn to the widget's size, with the curve, the current point and the tangent.
        plot = app.query_one(SlicePlot)
        lines = plot.plot_lines()
        assert len(lines) == plot.content_size.height
        assert all(len(line) <= plot.content_size.width for line in lines)
        body = "".join(lines)
        assert "*" in body and "O" in body and "." in body
        assert app.table.region.height >= 7  # the table keeps a few rows on screen

        # Another weight: the panel follows the selection.
        await press(app, pilot, "down")
        other = cost_slice(session.net, session.theta, data.X, data.Y, 4, session.rate)
        assert shows(slice_text(app), f"curvature {other.curvature: .4e}")
        assert session.names[4] in (panel.border_title or "")
        await press(app, pilot, "t")
        assert not panel.display and app.plot.display

    drive(session, check, size)


def test_span_keys_widen_narrow_and_type_the_sweep(drive) -> None:
    session = Session(load_setup(default_model()))
    data = session.setup.data

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "greater_than_sign")
        assert "the slice panel is not shown (t shows it)" in errors(said)
        await press(app, pilot, "end", "t")
        plot = app.query_one(SlicePlot)
        value = session.theta[-1]
        # The span: > and < double and halve it, T types it, an empty answer goes back to automatic.
        assert shows(slice_text(app), "span +-1 automatic")
        await press(app, pilot, "greater_than_sign")
        assert shows(slice_text(app), "span +-2 set")
        await press(app, pilot, "less_than_sign", "less_than_sign")
        assert shows(slice_text(app), "span +-0.5 set")
        assert plot.plot_lines()[-1].split()[0] == f"{value - 0.5:.3g}"  # the x axis's first tick
        await pilot.press("T")
        await answer(app, pilot, "0.3")
        assert shows(slice_text(app), "span +-0.3 set")
        await pilot.press("T")
        await answer(app, pilot, "wide")
        assert any("'wide' is not a number" in m for m in errors(said))
        await pilot.press("T")
        await answer(app, pilot, "")
        assert shows(slice_text(app), "span +-1 automatic")

        # The rate is part of the verdict: doubling it doubles rate x curvature.
        await press(app, pilot, "plus")
        doubled = cost_slice(session.net, session.theta, data.X, data.Y, session.net.n_params - 1, session.rate)
        assert doubled.rate == pytest.approx(0.2)
        assert shows(slice_text(app), f"rate x curv. {doubled.rate_curvature:.3g}:")

    drive(session, check, (80, 24))


# -- i: the factors --------------------------------------------------------------------------


@pytest.mark.parametrize("size", SIZES)
def test_i_takes_the_selected_weights_slope_apart(size: tuple[int, int], drive) -> None:
    session = Session(load_setup(default_model()))
    data = session.setup.data
    index = session.net.layout.index_of["L1.W[3,2]"]

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await jump(app, pilot, "L1.W[3,2]")
        await press(app, pilot, "i")
        panel = app.query_one(FactorPanel)
        assert panel.display
        core = slope_breakdown(session.net, session.theta, data.X, data.Y, index)
        text = panel_text(app, FactorPanel)
        mean = "".join(f"{v: .4e}".rjust(13) for v in core.means())
        assert f"mean of {core.n_samples}".ljust(20) + mean in text
        one = "".join(f"{v: .4e}".rjust(13) for v in core.at(core.sample))
        assert f"sample {core.sample} (most)".ljust(20) + one in text
        assert shows(text, f"sum of products {core.total: .6e}")
        assert shows(text, "matches")
        assert shows(text, f"input 3 ({data.input_names[3]})")
        # The sum of the products is the slope of the cost along the weight (SciPy's forward
        # differences, scipy.optimize.approx_fprime).
        reference = approx_fprime(np.array([session.theta[index]]),
                                  lambda w: float(cost_along(session, index)(w[0])), 1e-7)[0]
        assert core.total == pytest.approx(reference, rel=1e-4)

        # The selection moves: the panel follows.
        await press(app, pilot, "down")
        assert app.table.selected == index + 1
        nxt = slope_breakdown(session.net, session.theta, data.X, data.Y, index + 1)
        assert "".join(f"{v: .4e}".rjust(13) for v in nxt.means()) in panel_text(app, FactorPanel)
        assert f"factors of {session.names[index + 1]}" in (panel.border_title or "")

    drive(session, check, size)


def test_sample_keys_move_through_the_samples_and_a_saturated_unit_is_flagged(drive) -> None:
    session = Session(load_setup(default_model()))
    data = session.setup.data
    index = session.net.layout.index_of["L1.W[3,2]"]

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await jump(app, pilot, "L1.W[3,2]")
        await press(app, pilot, "i")
        core = slope_breakdown(session.net, session.theta, data.X, data.Y, index)
        # Samples: . and , move, I types one, an empty answer goes back to the largest product.
        n = core.n_samples
        await press(app, pilot, "full_stop")
        assert f"sample {(core.sample + 1) % n} " in panel_text(app, FactorPanel)
        await press(app, pilot, "comma", "comma")
        assert f"sample {(core.sample - 1) % n} " in panel_text(app, FactorPanel)
        await pilot.press("I")
        await answer(app, pilot, "5")
        five = slope_breakdown(session.net, session.theta, data.X, data.Y, index, 5)
        assert "sample 5 ".ljust(20) + "".join(f"{v: .4e}".rjust(13) for v in five.at(5)) in \
            panel_text(app, FactorPanel)
        await pilot.press("I")
        await answer(app, pilot, str(n))
        assert f"sample {n}: the training set has samples 0 to {n - 1}" in errors(said)

        # Another weight keeps the chosen sample.
        await press(app, pilot, "down")
        nxt = slope_breakdown(session.net, session.theta, data.X, data.Y, index + 1, 5)
        assert "sample 5 ".ljust(20) + "".join(f"{v: .4e}".rjust(13) for v in nxt.at(5)) in \
            panel_text(app, FactorPanel)
        await pilot.press("I")
        await answer(app, pilot, "")
        largest = slope_breakdown(session.net, session.theta, data.X, data.Y, index + 1).sample
        assert f"sample {largest} (most)" in panel_text(app, FactorPanel)

        # A saturated unit is flagged: with a bias of 30, tanh'(z) = 1 - tanh(z)^2 is below
        # 1e-20 on every sample here (a textbook identity), far under the 0.01 threshold.
        await jump(app, pilot, "L1.b[2]")
        await pilot.press("e")
        await answer(app, pilot, "30")
        await jump(app, pilot, "L1.W[3,2]")
        assert shows(panel_text(app, FactorPanel), "unit 2 of layer 1 is saturated on 100% of the samples")

    drive(session, check, (80, 24))


def test_i_on_a_custom_layers_parameter_says_why_there_are_no_factors(drive) -> None:
    session = Session(load_setup(SCENARIOS / "hive-gate-fixed" / "model.toml"))

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await jump(app, pilot, "L2.b[0]")
        await press(app, pilot, "i")
        assert shows(panel_text(app, FactorPanel), "belongs to a custom layer")
        assert not errors(said)
        await press(app, pilot, "full_stop")
        assert errors(said) == ["this weight has no factors to show sample by sample (see the panel)"]

    drive(session, check, (80, 24))


# -- h: layer health -------------------------------------------------------------------------


@pytest.mark.parametrize("size", SIZES)
def test_h_shows_layer_health_and_follows_steps_and_the_rate(size: tuple[int, int], drive) -> None:
    session = Session(load_setup(default_model()))
    data = session.setup.data

    def expect(app: StepperApp) -> None:
        core = layer_health(session.net, session.theta, data.X, data.Y, session.rate)
        text = panel_text(app, HealthPanel)
        for e in core.layers:
            row = next(line for line in text.splitlines() if line.startswith(f"L{e.index + 1} "))
            assert f"{e.weight_norm:.3e}" in row and f"{e.slope_norm:.3e}" in row
            assert f"{e.update_ratio:.1e} {e.ratio_verdict}" in row
        assert f"slopes on the way back: {core.trend} " in flat(text)
        assert f"layer health at rate {session.rate:g}" == app.query_one(HealthPanel).border_title

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "h")
        assert app.query_one(HealthPanel).display
        expect(app)
        text = panel_text(app, HealthPanel)
        assert "1e-4 to 1e-2" in flat(text) and "common practice" in text
        assert ("[ ]" in text) == (size[0] >= 100)  # the gauge where there is room
        assert all(len(line) <= size[0] - 2 for line in text.splitlines())
        # The size of layer 1's weight slopes is that of SciPy's finite-difference gradient.
        layer1 = [i for i, name in enumerate(session.names) if name.startswith("L1.W")]
        grad = approx_fprime(session.theta.copy(), lambda t: session.net.cost(t, data.X, data.Y), 1e-7)
        assert np.linalg.norm(grad[layer1]) == pytest.approx(
            layer_health(session.net, session.theta, data.X, data.Y, session.rate).layers[0].slope_norm, rel=1e-4)
        await press(app, pilot, "s", "s")
        expect(app)
        await press(app, pilot, "plus")
        expect(app)
        await press(app, pilot, "z", "z")
        expect(app)

    drive(session, check, size)


def test_h_follows_the_cursor_to_the_channel_a_kernel_weight_feeds(drive) -> None:
    # glaze-defects with channel 6's bias far below zero: that channel is dead. The panel names it,
    # and with the cursor on one of its kernel weights gives that channel's own figures, which are
    # the core's (checked against scipy.signal.correlate in test_layers_health.py).
    session = Session(load_setup(SCENARIOS / "glaze-defects" / "model.toml"))
    session.set_value(session.net.layout.lookup("L1.b[6]"), -100.0)
    data = session.setup.data

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "h")
        text = flat(panel_text(app, HealthPanel))
        assert "1 dead channels: 6" in text
        await jump(app, pilot, "L1.K[6,0,2,1]")
        text = flat(panel_text(app, HealthPanel))
        assert "L1.K[6,0,2,1] feeds L1 channel 6: ReLU passes on 0.0% of samples x positions" in text
        assert "DEAD" in text
        await jump(app, pilot, "L4.W[17,5]")
        units = layer_health(session.net, session.theta, data.X, data.Y, session.rate).layers[3]
        assert units.unit_weights is not None
        text = flat(panel_text(app, HealthPanel))
        assert f"L4.W[17,5] feeds L4 unit 5: ReLU passes on {100 * units.active[5]:.1f}% of samples" in text
        assert f"|weights in| {units.unit_weights[5]:.3e}" in text
        await press(app, pilot, "i")
        assert "h shows the health of the channel" not in flat(panel_text(app, FactorPanel))
        await jump(app, pilot, "L1.b[2]")
        assert "h shows the health of the channel it feeds" in flat(panel_text(app, FactorPanel))

    drive(session, check, (80, 24))


# -- custom layers in the app ----------------------------------------------------------------


def test_the_buggy_gate_shows_its_three_wrong_slopes_and_why(drive) -> None:
    session = Session(load_setup(SCENARIOS / "hive-gate-buggy" / "model.toml"))
    data = session.setup.data
    # The true slopes, by SciPy's forward differences of the cost (scipy.optimize.approx_fprime).
    reference = approx_fprime(session.theta.copy(), lambda t: session.net.cost(t, data.X, data.Y), 1e-7)
    wrong = [session.net.layout.index_of[f"L2.b[{j}]"] for j in range(3)]

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        # The numeric slopes are current by themselves (a pass is well under the budget).
        assert session.check is not None and not session.check_is_stale
        await press(app, pilot, "o", "o", "o", "o")  # ordered by relative error, largest first
        assert app.table.sort_key == "rel_error"
        rows = [app.table.render_line(y).text for y in range(1, 5)]
        assert {row[2:].split()[0] for row in rows[:3]} == {session.names[i] for i in wrong}
        assert all(" disagree " in row for row in rows[:3]) and "disagree" not in rows[3]
        status = flat(str(app.query_one(StatusLine).content))
        assert "62 agree, 3 disagree" in status
        # The status says why, as `stepper check` does: only the layer's biases disagree.
        assert "why: In L2 (custom 5->3 gate.py:GatedUnits) only biases disagree" in status
        check_result = session.check
        assert check_result is not None
        disagree = set(np.flatnonzero(check_result.verdict == "disagree").tolist())
        assert disagree == set(wrong)
        # The numeric column is the true slope; the analytic one (the buggy backward) is not.
        np.testing.assert_allclose(check_result.numeric[wrong], reference[wrong], rtol=1e-4)
        assert np.all(np.abs(check_result.analytic[wrong] - reference[wrong]) > 1e-3)
        # The layer's input slopes (dX) are right: the health panel says so.
        await press(app, pilot, "h")
        assert shows(panel_text(app, HealthPanel), "L2 custom 5->3 input slopes (dX): agree:")

    # A budget no pass reaches, so that the automatic pass runs whatever the machine's load.
    drive(session, check, (80, 24), numeric_budget=60.0)


def test_the_fixed_gate_agrees_everywhere(drive) -> None:
    session = Session(load_setup(SCENARIOS / "hive-gate-fixed" / "model.toml"))

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "number_sign")
        assert session.check is not None
        status = flat(str(app.query_one(StatusLine).content))
        assert f"numeric slopes: {session.net.n_params} agree " in status and "why:" not in status
        assert not errors(said)
        # During a run the custom layer's code is not called from two threads: the slice
        # waits for the run's next screen update, then shows the weights of that moment.
        await pilot.press("S")
        assert isinstance(app.screen, AskScreen)
        app.screen.query_one("#answer").value = "1000000"  # type: ignore[attr-defined]
        await pilot.press("enter")  # not press(): that waits for the job to end
        while session.step_count < 3:
            await asyncio.sleep(0.01)
        app.action_toggle_slice()  # what t does, checked before the next screen update can come
        panel = app.query_one(SlicePanel)
        assert "follows at the running job's next screen update" in flat(panel.figures_text)
        while "=" not in (panel.border_title or ""):
            await asyncio.sleep(0.02)
        assert shows(panel.figures_text, "rate x curv.")
        await press(app, pilot, "x")
        assert app.job is None and session.step_count >= 3

    drive(session, check, (100, 30))


#: A custom layer that refuses weights outside a band, the way a user's own sanity check would:
#: out = X @ M + t, raising in the pass the options name when M[0, 0] leaves [low, high];
#: ``dx_factor`` other than 1 makes its dX wrong on purpose.
FRAGILE = '''\
import numpy as np


class Fragile:
    bias_keys = ("t",)

    def __init__(self, n_in, units, options):
        self.n_in, self.n_out = n_in, units
        self.low, self.high = float(options["low"]), float(options["high"])
        self.check_in = options["check_in"]
        self.dx_factor = float(options.get("dx_factor", 1.0))

    def _check(self, params, where):
        value = params["M"][0, 0]
        if where == self.check_in and not self.low <= value <= self.high:
            raise ValueError(f"M[0,0] = {value:.6g} left the band this layer supports")

    def init(self, rng):
        return {"M": rng.normal(0.0, 0.5, (self.n_in, self.n_out)), "t": np.zeros(self.n_out)}

    def forward(self, params, X):
        self._check(params, "forward")
        return X @ params["M"] + params["t"], X

    def backward(self, params, X, dOut):
        self._check(params, "backward")
        return {"M": X.T @ dOut, "t": dOut.sum(axis=0)}, self.dx_factor * (dOut @ params["M"].T)
'''


@pytest.fixture
def fragile_model(custom_model):
    """Write the Fragile layer's model into tmp_path: ``fragile_model(low, high, check_in, dx_factor=1.0)``."""

    def write(low: float, high: float, check_in: str, dx_factor: float = 1.0) -> Path:
        options = (f'options = {{ low = {low!r}, high = {high!r}, check_in = "{check_in}", '
                   f'dx_factor = {dx_factor!r} }}')
        return custom_model(FRAGILE, "fragile.py", "Fragile", options)

    return write


def test_a_layer_raising_in_forward_during_a_step_is_a_message_and_changes_nothing(tmp_path: Path, fragile_model, drive) -> None:
    start = load_setup(fragile_model(-1e9, 1e9, "forward")).theta0
    m00 = float(start[load_setup(tmp_path / "model.toml").network.layout.index_of["L2.M[0,0]"]])
    # Any step that moves M[0, 0] makes the layer's forward pass raise on the new weights.
    session = Session(load_setup(fragile_model(m00 - 1e-12, m00 + 1e-12, "forward")))
    theta = session.theta.copy()

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "s")
        assert session.step_count == 0 and np.array_equal(session.theta, theta)
        assert any("forward raised ValueError" in m and "left the band" in m for m in errors(said))
        await pilot.press("S")
        await answer(app, pilot, "3")  # the same through the worker
        assert session.step_count == 0 and np.array_equal(session.theta, theta)
        assert app.job is None and app.is_running
        await press(app, pilot, "h")
        assert "layer health at rate" in (app.query_one(HealthPanel).border_title or "")

    drive(session, check, (80, 24))


def test_a_layer_raising_in_backward_shows_in_every_view_and_undo_recovers(fragile_model, drive) -> None:
    session = Session(load_setup(fragile_model(-2.0, 2.0, "backward")))

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await jump(app, pilot, "L2.M[0,0]")
        await press(app, pilot, "t")
        await pilot.press("e")
        await answer(app, pilot, "2.5")  # the cost is fine there, the backward pass raises
        assert session.theta[app.table.selected] == 2.5
        status = flat(str(app.query_one(StatusLine).content))
        assert "problem: " in status and "backward raised ValueError" in status
        assert sum("backward raised ValueError" in m for m in errors(said)) == 1  # said once
        assert shows(slice_text(app), "cannot be computed here")
        theta = session.theta.copy()
        await press(app, pilot, "s")
        assert session.step_count == 0 and np.array_equal(session.theta, theta)
        await press(app, pilot, "number_sign")
        assert session.check is None
        assert sum("backward raised ValueError" in m for m in errors(said)) >= 3  # the step, the check
        await jump(app, pilot, "L1.W[0,0]")  # a dense weight: its factors need the backward pass
        for key, panel in (("i", FactorPanel), ("h", HealthPanel)):
            await press(app, pilot, key)
            assert shows(panel_text(app, panel), "cannot be computed here")
        await press(app, pilot, "z")
        assert "problem" not in str(app.query_one(StatusLine).content)
        assert "|weights|" in panel_text(app, HealthPanel)
        await press(app, pilot, "s", "number_sign")
        assert session.step_count == 1 and session.check is not None
        assert app.is_running

    drive(session, check, (80, 24), numeric_budget=0.0)


def test_a_wrong_dx_shows_in_the_layers_before_and_in_the_health_panel(fragile_model, drive) -> None:
    session = Session(load_setup(fragile_model(-1e9, 1e9, "neither", dx_factor=2.0)))
    data = session.setup.data
    # The true slopes, by SciPy's forward differences of the cost (scipy.optimize.approx_fprime).
    reference = approx_fprime(session.theta.copy(), lambda t: session.net.cost(t, data.X, data.Y), 1e-7)
    layer1 = [i for i, name in enumerate(session.names) if name.startswith("L1.")]

    async def check(app: StepperApp, pilot: Pilot[Any], said: list[tuple[str, str]]) -> None:
        await press(app, pilot, "h", "number_sign")
        result = session.check
        assert result is not None
        # A dX twice too large doubles every slope of layer 1; the custom layer's own agree.
        assert set(np.flatnonzero(result.verdict == "disagree").tolist()) == set(layer1)
        np.testing.assert_allclose(result.numeric[layer1], reference[layer1], rtol=1e-4, atol=1e-9)
        # The status names the custom layer's backward as the cause, not the innocent layer 1.
        status = flat(str(app.query_one(StatusLine).content))
        assert "why: " in status and "L2" in status.split("why: ")[1].split("last:")[0]
        assert shows(panel_text(app, HealthPanel), "L2 custom 2->3 input slopes (dX): disagree")
        await press(app, pilot, "s")
        assert shows(panel_text(app, HealthPanel), "(weights changed since; # again)")

    drive(session, check, (100, 30), numeric_budget=0.0)


# -- keys ------------------------------------------------------------------------------------


def test_no_key_is_bound_twice() -> None:
    # Keys of one screen must differ; the samples screen (d) is a screen of its own, over the main one,
    # whose keys are off while it is open, so it may use the same keys for its own list.
    for screen in ({"app", "table"}, {"rows", "rows-screen"}):
        names = [name for key in KEYS if key.scope in screen for name in key.keys.split(",")]
        assert len(names) == len(set(names)), screen
    assert {key.scope for key in KEYS} == {"app", "table", "rows", "rows-screen"}
