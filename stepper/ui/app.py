"""The Stepper app: the weight table, the cost plot and the status line over one session.

The app is the only caller of the session. Each key runs an ``action_*``
method that calls one session operation, shows a ``StepperError`` as a
notification (the session refuses bad input before changing anything), and
redraws every widget from a fresh :class:`~stepper.ui.snapshot.Snapshot`.

Long operations (N steps, numeric slopes) run in a thread worker that drives
the session's progress generator, checks for cancellation between items and
pushes progress back with ``call_from_thread``. While one runs, every other
operation on the session is refused with a message; the table, the plot and
the help stay usable. The worker itself reports its end, so the session is
never touched by two threads at once.
"""

from __future__ import annotations

import logging
import math
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Callable, ClassVar, Generator, Iterator

from textual import on, work
from textual.app import App, ComposeResult
from textual.binding import BindingType
from textual.containers import Container
from textual.screen import ModalScreen
from textual.widgets import Footer
from textual.worker import Worker, get_current_worker

from stepper.core.optimizers import RULES
from stepper.errors import StepperError, UsageError
from stepper.session import SLOPE_SOURCES, Session
from stepper.ui.costplot import CostPlot
from stepper.ui.dialogs import AskScreen, ChoiceScreen, ConfirmScreen, HelpScreen, QuitScreen
from stepper.ui.factorpanel import FactorPanel
from stepper.ui.healthpanel import HealthPanel
from stepper.ui.insight import Figures, InputChecks, SliceFigures
from stepper.ui.keys import KEYS, bindings
from stepper.ui.panels import JobBar, RatePanel, StatusLine
from stepper.ui.slicepanel import SlicePanel
from stepper.ui.snapshot import HistoryArrays, Snapshot, take
from stepper.ui.weights import WeightTable

log = logging.getLogger("stepper.ui")

#: Actions of the main screen's keys (their names without arguments).
_MAIN_ACTIONS = frozenset(k.action.split("(")[0] for k in KEYS if k.scope == "app")

#: Seconds between screen updates while a job runs (progress and, for steps, table and plot).
UPDATE_EVERY = 0.2
#: Standard deviation of the noise ``p`` and ``P`` add, unless the command line says otherwise.
DEFAULT_NOISE = 0.01
#: The "why" panels by name (the slice, the slope factors, the layer health) and their keys.
WHY_KEY = {"slice": "t", "factors": "i", "health": "h"}

RULE_TEXT = {
    "gd": "plain gradient descent",
    "momentum": "gradient descent with momentum 0.9",
    "adam": "Adam (Kingma & Ba 2015 defaults)",
}


def parse_float(text: str, what: str) -> float:
    """A typed number, or UsageError naming what was expected."""
    try:
        value = float(text.strip())
    except ValueError:
        raise UsageError(f"{what}: {text.strip()!r} is not a number") from None
    if not math.isfinite(value):
        raise UsageError(f"{what}: {text.strip()!r} is not a finite number")
    return value


def parse_count(text: str, what: str) -> int:
    """A typed whole number of at least 1, or UsageError."""
    try:
        value = int(text.strip())
    except ValueError:
        raise UsageError(f"{what}: {text.strip()!r} is not a whole number") from None
    if value < 1:
        raise UsageError(f"{what}: {value} must be at least 1")
    return value


class StepperApp(App[None]):
    """Debug the slopes and steps of one model with the keyboard.

    Every key is listed in :mod:`stepper.ui.keys` (and on the help screen, ``?``).
    """

    CSS_PATH = "app.tcss"
    TITLE = "stepper"
    ENABLE_COMMAND_PALETTE = False
    HORIZONTAL_BREAKPOINTS = [(0, "-narrow"), (140, "-wide")]
    BINDINGS: ClassVar[list[BindingType]] = bindings("app")  # type: ignore[assignment]

    def __init__(self, session: Session, *, noise: float = DEFAULT_NOISE, default_steps: int = 100) -> None:
        super().__init__()
        self.session = session
        self.noise = noise
        self.default_steps = default_steps
        #: The running job ("steps" or "check"), or None.
        self.job: str | None = None
        self._worker: Worker[None] | None = None
        self.snapshot: Snapshot | None = None
        self.show_rates = False
        self._history = HistoryArrays()
        #: The "why" panel shown (a key of WHY_KEY), or None; view settings, not model state.
        self.why: str | None = None
        #: Half-width of the slice's sweep (None: the core's default), and the sample the factors show.
        self.span: float | None = None
        self.sample: int | None = None
        self.figures = Figures(session.net, session.setup.data)
        self._shown_slice: SliceFigures | None = None
        self._shown_samples: tuple[int, int] | None = None  # (sample shown, number of samples)
        self._shown_index: int | None = None
        self._input_checks: InputChecks | None = None
        self._last_error: str | None = None
        self._snapshot_problem: str | None = None
        self._worker_waiting = False

    # -- layout ----------------------------------------------------------------------------

    def compose(self) -> ComposeResult:
        yield StatusLine(id="status")
        with Container(id="main"):
            yield WeightTable(id="weights")
            with Container(id="side"):
                yield CostPlot(id="plot")
                yield RatePanel(id="rates")
                yield SlicePanel(id="slice", classes="why")
                yield FactorPanel(id="factors", classes="why")
                yield HealthPanel(id="health", classes="why")
        yield JobBar(id="job")
        yield Footer()

    @property
    def table(self) -> WeightTable:
        return self.query_one(WeightTable)

    @property
    def plot(self) -> CostPlot:
        return self.query_one(CostPlot)

    def on_mount(self) -> None:
        self.sub_title = self.session.setup.name
        self.refresh_view()
        self.table.focus()

    def refresh_view(self) -> None:
        """Redraw every widget from a new snapshot of the session (on the app's thread only)."""
        snap = take(self.session, self._history)
        self.snapshot = snap
        self.table.show(snap)
        self.plot.show(snap)
        self._show_status()
        if snap.problem != self._snapshot_problem:
            # Said when it appears (unless the operation's own message just said it), not on every redraw.
            self._snapshot_problem = snap.problem
            if snap.problem is not None and snap.problem != self._last_error:
                self.say(snap.problem, error=True)
        if self.show_rates and self.job != "steps":
            self._show_rates()
        self._show_why()

    def _show_status(self) -> None:
        if self.snapshot is not None:
            job = None if self.job is None else f"running: {self.job} (x cancels)"
            self.query_one(StatusLine).show(self.snapshot, self.session.refresh_numeric_after_step, job)

    def _show_rates(self) -> None:
        try:
            preview = self.session.preview_rates()
        except StepperError as exc:  # a custom layer's code raised
            self.query_one(RatePanel).show([], self.session.rate, None)
            self._problem(exc.message)
            return
        best = self.session.best_preview_rate(preview) if preview else None
        self.query_one(RatePanel).show(preview, self.session.rate, best)

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """The main screen's keys do nothing while a dialog is open (Textual would still run them)."""
        if action in _MAIN_ACTIONS and isinstance(self.screen, ModalScreen):
            return False
        return True

    # -- helpers ---------------------------------------------------------------------------

    def say(self, message: str, error: bool = False) -> None:
        """A notification; never markup, since weight names contain brackets."""
        if error:
            self._last_error = message
        self.notify(message, severity="error" if error else "information", markup=False,
                    timeout=8 if error else 4)

    def _problem(self, message: str) -> None:
        """An error found while drawing (not asked for by a key): said once, not on every redraw."""
        log.info("problem: %s", message)
        if message != self._last_error:
            self.say(message, error=True)

    def busy(self) -> bool:
        """True (and says so) when a job runs and the session must not be touched."""
        if self.job is not None:
            self.say(f"busy: {self.job} is running (x cancels it)", error=True)
            return True
        return False

    def apply(self, operation: Callable[[], Any]) -> bool:
        """Run one session operation; a StepperError becomes a message. Returns success."""
        if self.busy():
            return False
        try:
            operation()
        except StepperError as exc:
            log.info("refused: %s", exc.message)
            self.say(exc.message, error=True)
            self.refresh_view()
            return False
        self.refresh_view()
        return True

    def selected(self) -> int | None:
        """Flat index of the selected weight, or None (and a message) when no row is shown."""
        index = self.table.selected
        if index is None:
            self.say("no weight is selected (the filter shows no rows)", error=True)
        return index

    def ask(self, title: str, prompt: str, value: str, then: Callable[[str], object], placeholder: str = "") -> None:
        """Ask for a typed value; ``then`` runs with it unless the user cancels."""

        def answered(text: str | None) -> None:
            if text is not None:
                then(text)

        self.push_screen(AskScreen(title, prompt, value, placeholder), answered)

    # -- descent ---------------------------------------------------------------------------

    def action_step(self) -> None:
        if self.session.slope_source == "numeric" and not self.busy():
            # Finite differences of every weight can take a while: keep the screen responsive.
            self.start_steps(1)
        elif self.apply(lambda: self.session.step(1)):
            self.after_steps()

    def action_run_steps(self) -> None:
        if self.busy():
            return

        def run(text: str) -> None:
            try:
                n = parse_count(text, "number of steps")
            except UsageError as exc:
                self.say(exc.message, error=True)
                return
            self.default_steps = n
            self.start_steps(n)

        self.ask("Run steps", "How many steps?", str(self.default_steps), run)

    def action_cancel_job(self) -> None:
        if self._worker is None:
            self.say("nothing is running")
            return
        self._worker.cancel()
        self.say(f"cancelling {self.job}...")

    def action_double_rate(self) -> None:
        self.apply(lambda: self.session.set_rate(self.session.rate * 2.0))

    def action_halve_rate(self) -> None:
        self.apply(lambda: self.session.set_rate(self.session.rate / 2.0))

    def action_type_rate(self) -> None:
        if self.busy():
            return
        self.ask("Rate", "New learning rate (a positive number):", f"{self.session.rate:g}",
                 lambda text: self.apply(lambda: self.session.set_rate(parse_float(text, "rate"))))

    def action_choose_rule(self) -> None:
        if self.busy():
            return

        def chosen(rule: str | None) -> None:
            if rule is not None and rule != self.session.rule:
                self.apply(lambda: self.session.set_rule(rule))

        choices = [(name, RULE_TEXT.get(name, "")) for name in RULES]
        self.push_screen(ChoiceScreen("Update rule", choices, self.session.rule), chosen)

    def action_toggle_source(self) -> None:
        other = [s for s in SLOPE_SOURCES if s != self.session.slope_source][0]
        self.apply(lambda: self.session.set_slope_source(other))

    def action_type_batch(self) -> None:
        if self.busy():
            return
        current = "" if self.session.batch_size is None else str(self.session.batch_size)

        def chosen(text: str) -> None:
            self.apply(lambda: self.session.set_batch_size(
                None if text.strip() in ("", "full") else parse_count(text, "batch size")))

        self.ask("Mini-batch size", f"Samples per step, 1 to {self.session.setup.data.n_train} "
                 "(empty: the full training set):", current, chosen)

    def action_toggle_preview(self) -> None:
        self.show_rates = not self.show_rates
        self.query_one(RatePanel).set_class(self.show_rates, "-shown")
        if self.show_rates and self.job is None:
            self._show_rates()  # otherwise the end of the job fills it

    def action_adopt_best_rate(self) -> None:
        if self.busy():
            return
        try:
            preview = self.session.preview_rates()
        except StepperError as exc:
            self.say(exc.message, error=True)
            return
        best = self.session.best_preview_rate(preview)
        if math.isclose(best, self.session.rate, rel_tol=1e-12):
            self.say(f"the current rate {best:g} is already the best of the preview")
            return
        self.apply(lambda: self.session.set_rate(best))

    def after_steps(self) -> None:
        """Recompute numeric slopes when the user asked for that after every step."""
        if self.session.refresh_numeric_after_step and self.job is None:
            self.start_check()

    # -- slopes ----------------------------------------------------------------------------

    def action_compute_check(self) -> None:
        if not self.busy():
            self.start_check()

    def action_toggle_auto_check(self) -> None:
        # A preference the session keeps (it decides nothing with it); not an undoable operation.
        self.session.set_refresh_after_step(not self.session.refresh_numeric_after_step)
        state = "on" if self.session.refresh_numeric_after_step else "off"
        self.say(f"numeric slopes after every step: {state}")
        self._show_status()

    # -- weights ---------------------------------------------------------------------------

    def action_freeze_weight(self) -> None:
        index = self.selected()
        if index is not None:
            self.apply(lambda: self.session.toggle_freeze([index]))

    def action_freeze_layer(self) -> None:
        index = self.selected()
        if index is not None:
            layer = int(self.session.net.layout.layer_index[index])
            self.apply(lambda: self.session.toggle_freeze(self.session.layer_indices(layer)))

    def action_perturb_weight(self) -> None:
        index = self.selected()
        if index is not None:
            self.apply(lambda: self.session.perturb(self.noise, [index]))

    def action_perturb_all(self) -> None:
        self.apply(lambda: self.session.perturb(self.noise))

    def action_edit_value(self) -> None:
        index = self.selected()
        if index is None or self.busy():
            return
        name = self.session.names[index]
        self.ask(f"Value of {name}", "New value:", f"{self.session.theta[index]:.17g}",
                 lambda text: self.apply(lambda: self.session.set_value(index, parse_float(text, name))))

    def action_reset(self) -> None:
        self.apply(self.session.reset)

    def action_undo(self) -> None:
        names: list[str | None] = []
        if self.apply(lambda: names.append(self.session.undo())) and names[0] is None:
            self.say("nothing to undo")

    def action_redo(self) -> None:
        names: list[str | None] = []
        if self.apply(lambda: names.append(self.session.redo())) and names[0] is None:
            self.say("nothing to redo")

    # -- table and plot (view only, allowed while a job runs) -------------------------------

    def action_next_order(self) -> None:
        self.table.next_order()

    def action_flip_order(self) -> None:
        self.table.flip_order()

    def action_next_layer(self) -> None:
        self.table.step_layer(1)

    def action_previous_layer(self) -> None:
        self.table.step_layer(-1)

    def action_filter_names(self) -> None:
        self.ask("Filter", "Show names matching (* and ? are wildcards; empty shows all):",
                 self.table.pattern, self.table.set_pattern, placeholder="e.g. L1.W*")

    def action_jump(self) -> None:
        layout = self.session.net.layout

        def go(text: str) -> None:
            try:
                index = layout.lookup(text.strip())
            except KeyError:
                self.say(f"no weight is called {text.strip()!r} (names look like {layout.names[0]})",
                         error=True)
                return
            self.table.select(index)

        self.ask("Jump", "Weight name:", "", go, placeholder=f"e.g. {layout.names[-1]}")

    def action_toggle_log(self) -> None:
        self.plot.log_scale = not self.plot.log_scale

    @on(WeightTable.ViewChanged)
    def _view_changed(self, event: WeightTable.ViewChanged) -> None:
        log.debug("table: %s", event.description)

    @on(WeightTable.Selected)
    def _selected(self, event: WeightTable.Selected) -> None:
        if self.why in ("slice", "factors") and event.index != self._shown_index:
            self._show_why()

    # -- why: slice, factors, health (view only; computed from the snapshot) ----------------

    def action_toggle_slice(self) -> None:
        self._toggle_why("slice")

    def action_toggle_factors(self) -> None:
        self._toggle_why("factors")

    def action_toggle_health(self) -> None:
        self._toggle_why("health")

    def _toggle_why(self, name: str) -> None:
        """Show panel ``name`` in place of the cost plot (beside it on wide screens), or hide it."""
        self.why = None if self.why == name else name
        for panel in self.query(".why"):
            panel.set_class(panel.id == self.why, "-shown")
        self.query_one("#side").set_class(self.why is not None, "-why")
        self._shown_index = None
        self._show_why()

    def _shows(self, name: str) -> bool:
        """True when panel ``name`` is shown; otherwise says which key shows it."""
        if self.why != name:
            self.say(f"the {name} panel is not shown ({WHY_KEY[name]} shows it)", error=True)
            return False
        return True

    def action_widen_span(self) -> None:
        self._scale_span(2.0)

    def action_narrow_span(self) -> None:
        self._scale_span(0.5)

    def _scale_span(self, factor: float) -> None:
        if not self._shows("slice"):
            return
        if self._shown_slice is None:
            self.say("no slice is drawn to widen or narrow (see the panel)", error=True)
            return
        self.span = self._shown_slice.span * factor
        self._show_why()

    def action_type_span(self) -> None:
        if not self._shows("slice"):
            return
        current = "" if self.span is None else f"{self.span:g}"

        def chosen(text: str) -> None:
            if not text.strip():
                self.span = None
            else:
                try:
                    span = parse_float(text, "span")
                    if span <= 0:
                        raise UsageError(f"span: {span:g} must be positive")
                except UsageError as exc:
                    self.say(exc.message, error=True)
                    return
                self.span = span
            self._show_why()

        self.ask("Span of the slice", "Half-width of the sweep around the value (empty: automatic):",
                 current, chosen)

    def action_next_sample(self) -> None:
        self._step_sample(1)

    def action_previous_sample(self) -> None:
        self._step_sample(-1)

    def _step_sample(self, delta: int) -> None:
        if not self._shows("factors"):
            return
        if self._shown_samples is None:
            self.say("this weight has no factors to show sample by sample (see the panel)", error=True)
            return
        shown, n = self._shown_samples
        self.sample = (shown + delta) % n
        self._show_why()

    def action_type_sample(self) -> None:
        if not self._shows("factors"):
            return
        n = self.session.setup.data.n_train

        def chosen(text: str) -> None:
            if not text.strip():
                self.sample = None
            else:
                try:
                    sample = int(text.strip())
                except ValueError:
                    self.say(f"sample: {text.strip()!r} is not a whole number", error=True)
                    return
                if not 0 <= sample < n:
                    self.say(f"sample {sample}: the training set has samples 0 to {n - 1}", error=True)
                    return
                self.sample = sample
            self._show_why()

        current = "" if self.sample is None else str(self.sample)
        self.ask("Sample", f"Training sample to show, 0 to {n - 1} (empty: the largest product):",
                 current, chosen)

    def _show_why(self) -> None:
        """Compute and draw the shown "why" panel from the current snapshot."""
        snap = self.snapshot
        if self.why is None or snap is None:
            return
        index = self.table.selected
        if self.job is not None and self.figures.custom and not self._worker_waiting:
            # A custom layer's code is not known to be safe on two threads at once: the
            # panel follows at the job's next screen update (or its end).
            self._why_note(snap, index, "follows at the running job's next screen update (a custom layer's "
                                        "code runs on one thread at a time)")
            return
        self._shown_index = index
        try:
            if self.why == "slice":
                self._show_slice(snap, index)
            elif self.why == "factors":
                self._show_factors(snap, index)
            else:
                self.query_one(HealthPanel).show(self.figures.health(snap, self._input_checks))
        except StepperError as exc:  # the user's layer raised
            self._why_note(snap, index, f"cannot be computed here: {exc.message}")
            self._problem(exc.message)

    def _why_note(self, snap: Snapshot, index: int | None, note: str) -> None:
        """The shown "why" panel says ``note`` instead of figures."""
        name = "" if index is None else f" {snap.names[index]}"
        panel: SlicePanel | FactorPanel | HealthPanel
        if self.why == "slice":
            panel, title = self.query_one(SlicePanel), f"cost along{name}"
        elif self.why == "factors":
            panel, title = self.query_one(FactorPanel), f"slope factors of{name}"
        else:
            panel, title = self.query_one(HealthPanel), "layer health"
        panel.show_note(title, note)
        self._shown_slice = None
        self._shown_samples = None

    def _show_slice(self, snap: Snapshot, index: int | None) -> None:
        panel = self.query_one(SlicePanel)
        if index is None:
            self._shown_slice = None
            panel.show_note("cost along a weight", "no weight is selected (the filter shows no rows)")
            return
        figures = self.figures.slice(snap, index, self.span)
        self._shown_slice = figures
        panel.show(figures)

    def _show_factors(self, snap: Snapshot, index: int | None) -> None:
        panel = self.query_one(FactorPanel)
        if index is None:
            self._shown_samples = None
            panel.show_note("slope factors", "no weight is selected (the filter shows no rows)")
            return
        figures = self.figures.factors(snap, index, self.sample)
        if isinstance(figures, str):
            self._shown_samples = None
            panel.show_note(f"slope factors of {snap.names[index]}",
                            f"{figures}. t shows the cost along it; c compares its slope with finite differences.")
            return
        self._shown_samples = (figures.result.sample, figures.result.n_samples)
        panel.show(figures)

    # -- files -----------------------------------------------------------------------------

    def action_save(self) -> None:
        self.save_then(None)

    def save_then(self, after: Callable[[], None] | None) -> None:
        """Ask for a path and save a checkpoint there; then run ``after`` if the save worked."""
        if self.busy():
            return

        def write(path: Path) -> None:
            if self.apply(lambda: self.session.save_checkpoint(path)):
                self.say(f"saved {path}")
                if after is not None:
                    after()

        def chosen(text: str) -> None:
            if not text.strip():
                self.say("no path given: nothing saved", error=True)
                return
            path = Path(text.strip()).expanduser()
            if path.exists():
                self.push_screen(ConfirmScreen(f"{path} exists. Overwrite it? (y: yes, any other key: no)"),
                                 lambda yes: write(path) if yes else self.say("nothing saved"))
            else:
                write(path)

        self.ask("Save checkpoint", "Path of the checkpoint (.safetensors):",
                 str(self.session.default_checkpoint_path()), chosen)

    def action_load(self) -> None:
        if self.busy():
            return
        last = self.session.last_checkpoint
        proposal = str(last) if last is not None else str(self.session.session_folder()) + "/"

        def chosen(text: str) -> None:
            path = Path(text.strip()).expanduser()
            if self.apply(lambda: self.session.load_checkpoint(path)):
                self.say(self.session.last_action or f"loaded {path}")

        self.ask("Load checkpoint", "Path of the checkpoint to load (undo takes it back):", proposal, chosen)

    # -- app -------------------------------------------------------------------------------

    def action_help(self) -> None:
        self.push_screen(HelpScreen())

    async def action_quit(self) -> None:
        if self.job is not None:
            self.say(f"{self.job} is running: x cancels it, then q quits", error=True)
            return
        if not self.session.dirty:
            self.exit()
            return

        def answered(choice: str | None) -> None:
            if choice == "quit":
                self.exit()
            elif choice == "save":
                self.save_then(self.exit)

        self.push_screen(QuitScreen(), answered)

    # -- jobs ------------------------------------------------------------------------------

    def start_steps(self, n: int) -> None:
        self._begin("steps", n)
        self._worker = self._steps_worker(n)

    def start_check(self) -> None:
        self._begin("numeric slopes", self.session.net.n_params)
        self._worker = self._check_worker()

    def _begin(self, job: str, total: int) -> None:
        self.job = job
        self.query_one(JobBar).start(job, total)
        self._show_status()

    @work(thread=True, exclusive=True, group="session", exit_on_error=False)
    def _steps_worker(self, n: int) -> None:
        self._run_job("steps", self.session.iter_steps(n), redraw=True)

    @work(thread=True, exclusive=True, group="session", exit_on_error=False)
    def _check_worker(self) -> None:
        self._run_job("numeric slopes", self.session.iter_refresh_check(), redraw=False,
                      then=self._check_input_slopes)

    def _run_job(self, name: str, job: Generator[tuple[int, int], None, object], redraw: bool,
                 then: Callable[[Worker[None]], bool] | None = None) -> None:
        """Drive the session's ``job`` in the current worker thread, then ``then``, and report the end.

        ``job`` yields ``(done, total)``; the worker's cancellation is checked
        before each item, progress goes to the screen at most every
        UPDATE_EVERY seconds (with the table and plot too when ``redraw``).
        ``then`` runs after a job that was not cancelled and returns whether it
        was cancelled itself. A StepperError ends the job and is reported.
        """
        worker = get_current_worker()
        error: StepperError | None = None
        cancelled = False
        last = time.monotonic()
        try:
            for done, total in job:
                if worker.is_cancelled:
                    cancelled = True
                    break
                now = time.monotonic()
                if now - last >= UPDATE_EVERY:
                    last = now
                    self._from_worker(self._job_progress, done, total, redraw)
            if not cancelled and then is not None:
                cancelled = then(worker)
        except StepperError as exc:
            error = exc
        finally:
            job.close()
        self._from_worker(self._job_done, name, error, cancelled)

    def _check_input_slopes(self, worker: Worker[None]) -> bool:
        """As `stepper check` does: the custom layers' dX against numeric input slopes; True if cancelled."""
        if not self.figures.custom:
            return False
        version = self.session.version
        checks = self.figures.input_slopes(self.session.theta.copy(), lambda: worker.is_cancelled)
        if checks is None:
            return True
        self._from_worker(self._input_checks_done, InputChecks(version, checks))
        return False

    def _input_checks_done(self, checks: InputChecks) -> None:
        self._input_checks = checks
        for c in checks.checks:
            if not c.passed:
                bad = c.counts["disagree"]
                self.say(f"custom layer L{c.layer + 1} ({c.label}): its backward pass's dX disagrees with "
                         f"numeric input slopes on {bad} of {c.analytic.size} entries (h: layer health)",
                         error=True)

    def _from_worker(self, callback: Callable[..., None], *args: Any) -> None:
        """``call_from_thread`` that gives up quietly when the app has already closed."""
        try:
            self.call_from_thread(callback, *args)
        except RuntimeError:
            log.info("app closed before a job update could be shown")

    def _job_progress(self, done: int, total: int, redraw: bool) -> None:
        self.query_one(JobBar).advance(done, total)
        if redraw:
            # The worker waits in call_from_thread until this returns: the session is still.
            self._worker_waiting = True
            try:
                self.refresh_view()
            finally:
                self._worker_waiting = False

    def _job_done(self, job: str, error: StepperError | None, cancelled: bool) -> None:
        self.job = None
        self._worker = None
        self.query_one(JobBar).stop()
        self.refresh_view()
        if error is not None:
            log.info("%s stopped: %s", job, error.message)
            self.say(error.message, error=True)
        elif cancelled:
            self.say(f"{job} cancelled" + (f"; kept: {self.session.last_action}" if job == "steps" else ""))
        elif job == "steps":
            self.after_steps()


@contextmanager
def log_to_file(log_file: Path) -> Iterator[None]:
    """Send every log record and warning to ``log_file`` (appending) for the duration.

    Textual draws the screen on stderr, so nothing else may write there while
    the app runs. A log file that cannot be opened is a UsageError naming it.
    """
    try:
        log_file.parent.mkdir(parents=True, exist_ok=True)
        handler = logging.FileHandler(log_file, encoding="utf-8")
    except OSError as exc:
        raise UsageError(f"{log_file}: cannot write the log file ({exc.strerror or exc}); "
                         "choose another with --log") from None
    handler.setFormatter(logging.Formatter("%(asctime)s %(name)s %(levelname)s %(message)s"))
    root = logging.getLogger()
    saved_level, saved_handlers = root.level, root.handlers[:]
    root.handlers = [handler]
    root.setLevel(logging.INFO)
    logging.captureWarnings(True)
    try:
        yield
    finally:
        logging.captureWarnings(False)
        root.handlers = saved_handlers
        root.setLevel(saved_level)
        handler.close()


def run_app(session: Session, log_file: Path, noise: float = DEFAULT_NOISE) -> int:
    """Run the app on the terminal until the user quits; returns the exit code."""
    with log_to_file(log_file):
        log.info("open %s", session.setup.path)
        StepperApp(session, noise=noise).run()
    return 0
