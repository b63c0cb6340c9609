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
from textual.screen import ModalScreen
from textual.worker import Worker

from stepper.errors import StepperError, UsageError
from stepper.ui.costplot import CostPlot
from stepper.ui.dialogs import AskScreen
from stepper.ui.insight import Figures, InputChecks, SliceFigures
from stepper.ui.keys import KEYS
from stepper.ui.panels import RatePanel, StatusLine
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


class AppBase(App[None]):
    """The app's state and shared helpers; the handler modules add the keys."""

    def __init__(self, session: Session, *, noise: float = DEFAULT_NOISE, default_steps: int = 100) -> None:
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
        self._snapshot_problem: str | None = None
        self._worker_waiting = False

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

    def _show_why(self) -> None:
        """Draw the shown "why" panel (:mod:`stepper.ui.why` gives the body)."""
        raise NotImplementedError

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """The main screen's keys do nothing while a dialog is open (Textual would still run them)."""
        if action in _MAIN_ACTIONS and isinstance(self.screen, ModalScreen):
            return False
        return True

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
