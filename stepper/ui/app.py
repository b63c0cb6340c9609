"""The Stepper app: the weight table, the cost plot and the status line over one session.

The app is the only caller of the session. Each key runs an ``action_*``
method that calls one session operation, shows a ``StepperError`` as a
notification (the session refuses bad input before changing anything), and
redraws every widget from a fresh :class:`~stepper.ui.snapshot.Snapshot`.

:class:`StepperApp` only lays out the widgets and wires the keys of
:mod:`stepper.ui.keys` to the handler modules, one per concern:

- :mod:`stepper.ui.descent`: steps, rate, update rule, slope source, mini-batches, rate preview;
- :mod:`stepper.ui.slopes`: the numeric slopes;
- :mod:`stepper.ui.edits`: changes to weights, undo and redo, and the table's view;
- :mod:`stepper.ui.why`: the "why" panels;
- :mod:`stepper.ui.settings`: the training settings (L2 term, decay, clipping, schedule);
- :mod:`stepper.ui.outcome`: the samples screen, the metric plot, histograms, the comparison;
- :mod:`stepper.ui.ranges`: the rate range test;
- :mod:`stepper.ui.files`: checkpoints, help and quit;
- :mod:`stepper.ui.jobs`: long work in thread workers;

all built on :class:`stepper.ui.base.AppBase`, which holds the shared state and helpers.
"""

from __future__ import annotations

import logging
import os
from contextlib import contextmanager
from pathlib import Path
from typing import ClassVar, Iterator

from textual.app import ComposeResult
from textual.binding import BindingType
from textual.containers import Container

from stepper.formats import user_code
from stepper.errors import UsageError
from stepper.session import Session
from stepper.ui.base import DEFAULT_BUDGET, DEFAULT_NOISE, log
from stepper.ui.comparepanel import ComparePanel
from stepper.ui.costplot import CostPlot
from stepper.ui.descent import DescentKeys
from stepper.ui.edits import EditKeys, ViewKeys
from stepper.ui.factorpanel import FactorPanel
from stepper.ui.files import FileKeys
from stepper.ui.healthpanel import HealthPanel
from stepper.ui.histpanel import HistogramPanel
from stepper.ui.keybar import KeyBar
from stepper.ui.keys import bindings
from stepper.ui.metricplot import MetricPlot
from stepper.ui.panels import JobBar, StatusLine
from stepper.ui.rangepanel import RangePanel
from stepper.ui.ranges import RangeKeys
from stepper.ui.ratepanel import RatePanel
from stepper.ui.settings import SettingsKeys
from stepper.ui.slicepanel import SlicePanel
from stepper.ui.slopes import SlopeKeys
from stepper.ui.weights import WeightTable


#: Columns from which the plot column sits beside the table instead of below it.
WIDE = 140


class StepperApp(DescentKeys, SlopeKeys, EditKeys, ViewKeys, SettingsKeys, RangeKeys, FileKeys):
    """Debug the slopes and steps of one model with the keyboard.

    Every key is listed in :mod:`stepper.ui.keys` (and on the help screen, ``?``).
    """

    CSS_PATH = "app.tcss"
    TITLE = "stepper"
    ENABLE_COMMAND_PALETTE = False
    HORIZONTAL_BREAKPOINTS = [(0, "-narrow"), (WIDE, "-wide")]
    BINDINGS: ClassVar[list[BindingType]] = bindings("app")  # type: ignore[assignment]

    def compose(self) -> ComposeResult:
        yield StatusLine(id="status")
        with Container(id="main"):
            yield WeightTable(id="weights")
            with Container(id="side"):
                yield CostPlot(id="plot")
                yield MetricPlot(id="metrics")
                yield RatePanel(id="rates")
                yield SlicePanel(id="slice", classes="why")
                yield FactorPanel(id="factors", classes="why")
                yield HealthPanel(id="health", classes="why")
                yield HistogramPanel(id="histograms", classes="why")
                yield RangePanel(id="range", classes="why")
                yield ComparePanel(id="compare", classes="why")
        yield JobBar(id="job")
        yield KeyBar(id="keys")

    _table_cap: int | None = None

    def on_mount(self) -> None:
        self.sub_title = self.session.setup.name
        origin = self.session.setup.origin
        if origin is not None:
            self.table.sources = origin.source_names(self.session.net.layout)
            self.table.source_file = origin.file.name
        self.refresh_view()
        self.table.focus()
        self._fit_table()

    def on_resize(self) -> None:
        self._fit_table()

    def _fit_table(self) -> None:
        """Beside the plot (wide screens) the table takes no more columns than its lines need."""
        width = self.table.natural_width() if self.size.width >= WIDE else None
        if width != self._table_cap:
            self._table_cap = width
            self.table.styles.max_width = width


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


#: Seconds a custom layer's call may take on the screen's thread before it is abandoned.
USER_CODE_SECONDS = 10.0


def run_app(session: Session, log_file: Path, noise: float = DEFAULT_NOISE,
            numeric_budget: float = DEFAULT_BUDGET) -> int:
    """Run the app on the terminal until the user quits; returns the exit code.

    ``numeric_budget``: seconds a numeric pass may take to be redone by itself after every change.
    """
    with log_to_file(log_file), user_code.limit_main_thread(USER_CODE_SECONDS):
        # A custom layer's call on the screen's thread that does not return within
        # USER_CODE_SECONDS is abandoned (its layer's failure), so the screen never freezes.
        log.info("open %s", session.setup.path)
        StepperApp(session, noise=noise, numeric_budget=numeric_budget).run()
        if user_code.running():
            # A user's code is still stuck in a worker (a call that ignores being stopped):
            # the journal holds every step; end here rather than wait for it for ever.
            log.info("a custom layer's code did not stop; quitting without it")
            session.close()
            logging.shutdown()
            os._exit(0)
    return 0
