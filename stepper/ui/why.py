"""Keys of the "why" panels: the cost along a weight, its slope's factors, layer health.

The panels are view only: their figures are computed from the snapshot's copy of
the weights (:mod:`stepper.ui.insight`), never from the live session.
"""

from __future__ import annotations

from textual import on

from stepper.errors import StepperError, UsageError
from stepper.ui.base import AppBase, parse_float
from stepper.ui.factorpanel import FactorPanel
from stepper.ui.healthpanel import HealthPanel
from stepper.ui.slicepanel import SlicePanel
from stepper.ui.snapshot import Snapshot
from stepper.ui.weights import WeightTable

#: The panels shown in place of the cost plot, by name, and their keys: the "why" panels (the
#: slice, the slope factors, the layer health) and the training views of stepper.ui.outcome.
WHY_KEY = {"slice": "t", "factors": "i", "health": "h", "histograms": "H", "range": "E", "compare": "D"}
#: The panels this module draws; the others are drawn by :meth:`AppBase.show_side_view`.
OWN = ("slice", "factors", "health")


class WhyKeys(AppBase):
    """Show one panel at a time, and the keys that steer it (span, sample)."""

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
        self._show_status()  # the key bar puts the panel's own keys first

    def _shows(self, name: str) -> bool:
        """True when panel ``name`` is shown; otherwise says which key shows it."""
        if self.why != name:
            self.say(f"the {name} panel is not shown ({WHY_KEY[name]} shows it)", error=True)
            return False
        return True

    @on(WeightTable.Selected)
    def _selected(self, event: WeightTable.Selected) -> None:
        if self.why in ("slice", "factors", "health", "histograms") and event.index != self._shown_index:
            self._show_why()

    # -- the slice's span ------------------------------------------------------------------

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

    # -- the factors' sample ---------------------------------------------------------------

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

    # -- drawing ---------------------------------------------------------------------------

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
        if self.why not in OWN:
            self.show_side_view(snap, index)
            return
        try:
            if self.why == "slice":
                self._show_slice(snap, index)
            elif self.why == "factors":
                self._show_factors(snap, index)
            else:
                self.query_one(HealthPanel).show(self.figures.health(snap, self._input_checks, index))
        except StepperError as exc:  # the user's layer raised
            self._why_note(snap, index, f"cannot be computed here: {exc.message}")
            self._problem(exc.message)

    def _why_note(self, snap: Snapshot, index: int | None, note: str) -> None:
        """The shown "why" panel says ``note`` instead of figures."""
        if self.why not in OWN:
            self.side_view_note(note)
            return
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
            channel = " h shows the health of the channel it feeds." if self.figures.feeds_channel(index) else ""
            panel.show_note(f"slope factors of {snap.names[index]}",
                            f"{figures}. t shows the cost along it; # computes its slope by finite "
                            f"differences.{channel}")
            return
        self._shown_samples = (figures.result.sample, figures.result.n_samples)
        panel.show(figures)
