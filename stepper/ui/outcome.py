"""Keys of what training did: the samples screen, the metric plot, histograms, the comparison with a checkpoint.

Each view is drawn from the session's read-only figures
(:mod:`stepper.session.measures`) on the app's thread; none changes the model.
The histograms and the comparison are panels shown in place of the cost plot,
one at a time like the "why" panels (:mod:`stepper.ui.why` switches them); the
range test's panel is drawn here too, its keys are in :mod:`stepper.ui.ranges`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from stepper.core.histograms import QUANTITIES
from stepper.core.weightdiff import Nets
from stepper.errors import StepperError
from stepper.ui.comparepanel import CompareFigures, ComparePanel
from stepper.ui.histpanel import HistFigures, HistogramPanel
from stepper.ui.metricplot import MetricPlot
from stepper.ui.rangepanel import RangePanel
from stepper.ui.rowsscreen import RowsScreen
from stepper.ui.snapshot import Snapshot
from stepper.ui.why import WhyKeys


class OutcomeKeys(WhyKeys):
    """The samples screen (d), the metric plot (%), histograms (H, ;), the comparison (D)."""

    #: What the histogram panel counts (one of QUANTITIES); a view setting.
    quantity = QUANTITIES[0]
    #: The checkpoint the comparison panel compares with, and its weights (read once); view settings.
    compare_path: Path | None = None
    _compare_theta: NDArray[np.float64] | None = None
    _compare_nets: Nets | None = None
    _compare_shown: tuple[int, Path] | None = None

    # -- samples ---------------------------------------------------------------------------

    def action_show_rows(self) -> None:
        if self.busy():
            return
        try:
            table = self.session.row_table("both")
        except StepperError as exc:
            self.say(exc.message, error=True)
            return
        snap = self.snapshot
        screen = RowsScreen(table, self.session.task, self.session.setup.data.target_names,
                            None if snap is None else snap.metrics, self.session.net.loss)
        self.push_screen(screen, self._row_chosen)

    def _row_chosen(self, chosen: tuple[bool, int] | None) -> None:
        if chosen is None:
            return
        validation, sample = chosen
        if validation:
            self.say(f"validation row {sample} takes no part in the slopes, so it has no slope factors "
                     "(enter on a training row)", error=True)
            return
        self.sample = sample
        if self.why != "factors":
            self.action_toggle_factors()
        else:
            self._show_why()
        self.say(f"slope factors of training sample {sample} (, . step through the samples)")

    # -- the metric plot -------------------------------------------------------------------

    def action_toggle_metric_plot(self) -> None:
        plot = self.query_one(MetricPlot)
        shown = not plot.has_class("-shown")
        plot.set_class(shown, "-shown")
        self.session.set_track_metrics(shown)
        if shown and self.snapshot is not None:
            plot.show(self.snapshot)
            self.say("the metric plot records from the next step on (steps made while it was hidden have "
                     "no figure)" if not np.isfinite(self.snapshot.train_metric).any() else "metric plot shown")

    def show_metric_plot(self, snap: Snapshot) -> None:
        """Redraw the metric plot when it is shown (called with every new snapshot)."""
        plot = self.query_one(MetricPlot)
        if plot.has_class("-shown"):
            plot.show(snap)

    # -- histograms ------------------------------------------------------------------------

    def action_toggle_histograms(self) -> None:
        self._toggle_why("histograms")

    def action_next_histogram(self) -> None:
        if not self._shows("histograms"):
            return
        self.quantity = QUANTITIES[(QUANTITIES.index(self.quantity) + 1) % len(QUANTITIES)]
        self._show_why()

    def _show_histograms(self, snap: Snapshot, index: int | None) -> None:
        panel = self.query_one(HistogramPanel)
        if index is None:
            panel.show_note("histograms", "no weight is selected (the filter shows no rows): the histograms "
                                          "show the selected weight's layer")
            return
        layer = int(snap.layer[index])
        spread = self.session.spreads()[layer]
        panel.show(HistFigures(layer, spread.label, self.quantity, spread.hists[self.quantity], snap.version))

    # -- the comparison --------------------------------------------------------------------

    def action_compare_checkpoint(self) -> None:
        if self.busy():
            return
        proposal = self.compare_path or self.session.last_checkpoint
        text = str(proposal) if proposal is not None else str(self.session.session_folder()) + "/"

        def chosen(answer: str) -> None:
            path = Path(answer.strip()).expanduser()
            try:
                theta, nets = self.session.checkpoint_side(path)
            except StepperError as exc:
                self.say(exc.message, error=True)
                return
            self.compare_path, self._compare_theta, self._compare_shown = path, theta, None
            self._compare_nets = nets
            if self.why != "compare":
                self._toggle_why("compare")
            else:
                self._show_why()

        self.ask("Compare with a checkpoint", "Path of the checkpoint to compare the current weights with "
                 "(nothing is loaded):", text, chosen)

    def _show_compare(self, snap: Snapshot) -> None:
        panel = self.query_one(ComparePanel)
        if self.compare_path is None or self._compare_theta is None:
            panel.show_note("compare with a checkpoint", "D asks for the checkpoint to compare with")
            return
        if self._compare_shown == (snap.version, self.compare_path):
            return
        diff = self.session.compare_to(self._compare_theta, snap.value, nets_a=self._compare_nets)
        panel.show(CompareFigures(self.compare_path, diff, snap.names))
        self._compare_shown = (snap.version, self.compare_path)

    # -- drawing ---------------------------------------------------------------------------

    def show_side_view(self, snap: Snapshot, index: int | None) -> None:
        try:
            if self.why == "histograms":
                self._show_histograms(snap, index)
            elif self.why == "compare":
                self._show_compare(snap)
            elif self.why == "range":
                self._show_range()
        except StepperError as exc:  # a custom layer's code raised
            self.side_view_note(f"cannot be computed here: {exc.message}")
            self._problem(exc.message)

    def _show_range(self) -> None:
        panel = self.query_one(RangePanel)
        if self.job == "rate range test":
            panel.show_note("rate range test", "running: the job bar shows its progress; x cancels "
                                               "(nothing of the session changes either way)")
            return
        result = self.session.range_result
        if result is None:
            panel.show_note("rate range test", "E runs a range test: k steps at each of several rates from the "
                                               "current state, nothing kept")
            return
        panel.show(result, self.session.range_is_stale)

    def side_view_note(self, note: str) -> None:
        panel: HistogramPanel | ComparePanel | RangePanel
        if self.why == "histograms":
            panel, title = self.query_one(HistogramPanel), "histograms"
        elif self.why == "compare":
            panel, title = self.query_one(ComparePanel), "compare with a checkpoint"
            self._compare_shown = None
        else:
            panel, title = self.query_one(RangePanel), "rate range test"
        panel.show_note(title, note)
