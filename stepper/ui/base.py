"""What every key handler of the app shares: the session, the view settings and one redraw.

:class:`AppBase` holds the app's state (the session it drives, the running job,
the "why" panel shown and its settings) and the helpers each handler uses:
``apply`` runs one session operation and turns a ``StepperError`` into a
message, ``busy`` refuses while a job runs, ``ask`` opens a dialog for a typed
value, ``refresh_view`` redraws every widget from a fresh
:class:`~stepper.ui.snapshot.Snapshot`. The handlers, one module per concern
(:mod:`~stepper.ui.descent`, :mod:`~stepper.ui.slopes`, :mod:`~stepper.ui.edits`,
:mod:`~stepper.ui.why`, :mod:`~stepper.ui.files`, :mod:`~stepper.ui.jobs`), are
subclasses of it that :class:`~stepper.ui.app.StepperApp` puts together.
"""

from __future__ import annotations

import logging
import math
import os
from typing import TYPE_CHECKING, Any, Callable, Sequence

from textual.app import App
from textual.filter import LineFilter
from textual.notifications import SeverityLevel
from textual.screen import ModalScreen
from textual.worker import Worker

from stepper.errors import DivergenceError, StepperError, UsageError
from stepper.ui.costplot import CostPlot
from stepper.ui.dialogs import AskScreen
from stepper.ui.insight import Figures, InputChecks, SliceFigures
from stepper.ui.keys import KEYS
from stepper.ui.keybar import KeyBar
from stepper.ui.panels import Note, StatusInfo, StatusLine
from stepper.ui.ratepanel import RatePanel, RateSearch, search_rates
from stepper.ui.snapshot import HistoryArrays, Snapshot, take
from stepper.ui.theme import THEME, AsciiOnly, NoColour, drawing_mode
from stepper.ui.weights import WeightTable

if TYPE_CHECKING:
    from stepper.session import Session

log = logging.getLogger("stepper.ui")

#: Actions of the main screen's keys (their names without arguments).
_MAIN_ACTIONS = frozenset(k.action.split("(")[0] for k in KEYS if k.scope == "app")

#: Standard deviation of the noise ``p`` and ``P`` add, unless the command line says otherwise.
DEFAULT_NOISE = 0.01
#: Seconds a numeric pass may take to be redone by itself after every change (``--numeric-budget``).
DEFAULT_BUDGET = 0.05
#: A pass over the budget by less than this factor is tried once more before the automatic passes stop.
OVER_BUDGET_AGAIN = 4.0
#: What the app says after a refused or runaway step, instead of the session's general advice:
#: the keys that lead back (the rate preview opens by itself beside the plot).
BACK_KEYS = "V adopts the best rate of the preview, open beside the plot."
BACK_KEYS_KEPT = "Undo is z; V adopts the best rate of the preview, open beside the plot."


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


def duration_text(seconds: float) -> str:
    """``12 ms``, ``1.3 s``, ``4 min``: a duration as a person says it."""
    if seconds < 1.0:
        return f"{seconds * 1000:.0f} ms"
    if seconds < 120.0:
        return f"{seconds:.2g} s"
    return f"{seconds / 60:.0f} min"


class AppBase(App[None]):
    """The app's state and shared helpers; the handler modules add the keys."""

    def __init__(self, session: Session, *, noise: float = DEFAULT_NOISE, default_steps: int = 100,
                 numeric_budget: float = DEFAULT_BUDGET) -> None:
        super().__init__()
        self.register_theme(THEME)
        self.theme = THEME.name
        #: How the screen is drawn: "colour", "mono" (NO_COLOR) or "plain" (TERM=dumb); see stepper.ui.theme.
        self.drawing = drawing_mode(os.environ)
        if self.drawing != "colour":
            self.no_color = True  # Textual's :nocolor styles apply (reversed selection, ...)
        self._filters_added: list[LineFilter] = []
        if self.drawing != "colour":
            self._filters_added.append(NoColour())
        if self.drawing == "plain":
            self._filters_added.append(AsciiOnly())
        self.session = session
        self.noise = noise
        self.default_steps = default_steps
        #: The running job ("steps" or "numeric slopes"), or None.
        self.job: str | None = None
        self._worker: Worker[None] | None = None
        self.snapshot: Snapshot | None = None
        self.show_rates = False
        self._history = HistoryArrays()
        #: The "why" panel shown (a key of why.WHY_KEY), or None; view settings, not model state.
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
        #: The app's last message, shown in the status line until the next operation.
        self.note: Note | None = None
        #: Why the numeric slopes are not recomputed by themselves (a pass costs too much), or None.
        self.numeric_reason: str | None = None
        #: Seconds a numeric pass may take to be redone by itself after every change (0: never).
        self.numeric_budget = numeric_budget
        #: Seconds the last whole numeric pass took (or would take, estimated), or None before the first.
        self.numeric_seconds: float | None = None
        self._numeric_failed_at: int | None = None
        self._over_budget = 0
        self._steps_at_start = 0
        self._snapshot_problem: str | None = None
        self._worker_waiting = False
        #: q was pressed while a job ran: quit when it ends.
        self._quit_after_job = False

    def get_line_filters(self) -> Sequence[LineFilter]:
        """Textual's filters, then Stepper's: no colour at all (mono, plain), ASCII only (plain)."""
        return [*super().get_line_filters(), *self._filters_added]

    @property
    def table(self) -> WeightTable:
        return self.query_one(WeightTable)

    @property
    def plot(self) -> CostPlot:
        return self.query_one(CostPlot)

    # -- drawing ---------------------------------------------------------------------------

    def refresh_view(self) -> None:
        """Redraw every widget from a new snapshot of the session (on the app's thread only).

        Numeric slopes that are out of date are first recomputed, when a pass fits the budget.
        """
        self.keep_numeric_current()
        snap = take(self.session, self._history)
        self.snapshot = snap
        self.table.show(snap)
        self.plot.show(snap)
        self.show_metric_plot(snap)
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
            why = None
            if self.snapshot.has_check and not self.snapshot.stale and self.session.check is not None:
                inputs = self._input_checks
                current = inputs if inputs is not None and inputs.version == self.snapshot.version else None
                hints = self.figures.hints(self.session.check, current)
                why = hints[0] if hints else None
            info = StatusInfo(self.session.refresh_numeric_after_step, self.job, self.note, self.numeric_reason,
                              why, self.session.journal_problem)
            self.query_one(StatusLine).show(self.snapshot, info)
        context = {self.why} if self.why in ("slice", "factors", "histograms", "range") else set()
        if self.job is not None:
            context.add("job")
        self.query_one(KeyBar).set_context(frozenset(c for c in context if c is not None))

    def _show_rates(self) -> None:
        try:
            search = search_rates(self.session.preview_rates)
        except StepperError as exc:  # a custom layer's code raised
            self.query_one(RatePanel).show(RateSearch((), None, None, 0), self.session.rate)
            self._problem(exc.message)
            return
        self.query_one(RatePanel).show(search, self.session.rate)

    def _show_why(self) -> None:
        """Draw the shown "why" panel (:mod:`stepper.ui.why` gives the body)."""
        raise NotImplementedError

    def _toggle_why(self, name: str) -> None:
        """Show the "why" panel ``name``, or hide it when it is shown (:mod:`stepper.ui.why`)."""
        raise NotImplementedError

    def keep_numeric_current(self) -> None:
        """Recompute out-of-date numeric slopes when a pass fits the budget (:mod:`stepper.ui.slopes`)."""
        raise NotImplementedError

    def _input_checks_done(self, checks: InputChecks) -> None:
        """Keep the custom layers' input-slope checks (the health panel and the status line's hint read them)."""
        self._input_checks = checks

    def show_metric_plot(self, snap: Snapshot) -> None:
        """Redraw the metric plot beside the cost when it is shown (:mod:`stepper.ui.outcome`)."""
        raise NotImplementedError

    def show_side_view(self, snap: Snapshot, index: int | None) -> None:
        """Draw the shown training view (histograms, range test, comparison; :mod:`stepper.ui.outcome`)."""
        raise NotImplementedError

    def side_view_note(self, note: str) -> None:
        """The shown training view says ``note`` instead of figures."""
        raise NotImplementedError

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """The main screen's keys do nothing while a dialog is open (Textual would still run them)."""
        if action in _MAIN_ACTIONS and isinstance(self.screen, ModalScreen):
            return False
        return True

    def numeric_pass_took(self, seconds: float, estimated: bool = False) -> None:
        """Record how long a whole numeric pass takes (or would take), and say why if over the budget.

        One pass over the budget by less than OVER_BUDGET_AGAIN times is tried once
        more at the next change (a first pass also pays for warming up) before the
        automatic passes stop.
        """
        if seconds <= self.numeric_budget:
            self.numeric_seconds = seconds
            self.numeric_reason = None
            self._over_budget = 0
            return
        self._over_budget += 1
        if self._over_budget < 2 and seconds < OVER_BUDGET_AGAIN * self.numeric_budget:
            return
        self.numeric_seconds = seconds
        about = "about " if estimated else ""
        budget = ("automatic passes are off (--numeric-budget 0)" if self.numeric_budget <= 0 else
                  f"over the {duration_text(self.numeric_budget)} budget of --numeric-budget")
        self.numeric_reason = f"a pass takes {about}{duration_text(seconds)}, {budget}"

    # -- jobs (bodies in stepper.ui.jobs and stepper.ui.descent) -----------------------------

    def start_steps(self, n: int) -> None:
        """Run ``n`` steps in a worker."""
        raise NotImplementedError

    def start_check(self, rest: bool = False) -> None:
        """Recompute the numeric slopes in a worker (``rest``: those the last check left out)."""
        raise NotImplementedError

    def after_steps(self) -> None:
        """What follows a run of steps that ended normally."""
        raise NotImplementedError

    # -- helpers ---------------------------------------------------------------------------

    def say(self, message: str, error: bool = False) -> None:
        """A message in the status line (see :meth:`notify`); never markup, since weight names contain brackets."""
        if error:
            self._last_error = message
        self.notify(message, severity="error" if error else "information", markup=False,
                    timeout=8 if error else 4)

    def notify(self, message: str, *, title: str = "", severity: SeverityLevel = "information",
               timeout: float | None = None, markup: bool = True) -> None:
        """Stepper's messages go to the status line's last lines, wrapped whole, not to pop-ups.

        A pop-up would lie over the plot for seconds and cut paths mid-word at 80
        columns; the status line keeps the message, and a word (``problem:``) says
        it is one without colour. It stays until the next operation or message.
        """
        log.info("%s: %s", severity, message)
        self.note = Note(f"{title}: {message}" if title else message, error=severity != "information")
        self._show_status()

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
            self.refresh_view()
            self.refused(exc)
            return False
        self.note = None  # the session's own account of the operation shows now
        self.refresh_view()
        return True

    def refused(self, exc: StepperError, kept: bool = False) -> None:
        """Say why an operation or a job stopped; a step that blew up also gets the keys that lead back.

        ``kept``: steps of the job were made and kept (undo takes them back). A
        refused or runaway step opens the rate preview.
        """
        if not isinstance(exc, DivergenceError):
            self.say(exc.message, error=True)
            return
        # The session's message ends with general advice (a sentence on the rate preview); the
        # app names its keys instead.
        said = exc.message.rsplit(". ", 1)[0] + "." if ". " in exc.message else exc.message
        self.say(f"{said} {BACK_KEYS_KEPT if kept else BACK_KEYS}", error=True)
        self.show_preview()

    def show_preview(self, shown: bool = True) -> None:
        """Show (or hide) the rate preview beside the cost plot."""
        self.show_rates = shown
        self.query_one(RatePanel).set_class(shown, "-shown")
        if shown and self.job is None:
            self._show_rates()  # otherwise the end of the job fills it

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
