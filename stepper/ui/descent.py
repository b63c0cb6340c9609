"""Keys of descent: steps, the rate, the update rule, the slope source, mini-batches, the rate preview."""

from __future__ import annotations

import math

from stepper.formats import user_code
from stepper.core.optimizers import RULES
from stepper.errors import StepperError, UsageError
from stepper.session import SLOPE_SOURCES
from stepper.ui.base import AppBase, parse_count, parse_float
from stepper.ui.dialogs import ChoiceScreen
from stepper.ui.ratepanel import search_rates

RULE_TEXT = {
    "gd": "plain gradient descent",
    "momentum": "gradient descent with momentum 0.9",
    "adam": "Adam (Kingma & Ba 2015 defaults)",
}


class DescentKeys(AppBase):
    """Step, run N steps, cancel, and the settings a step follows."""

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
        # A custom layer's code that does not return is stopped too (stepper.formats.user_code).
        stopped = user_code.abandon("cancelled with x")
        self.say(f"cancelling {self.job}..." + (" (stopping a custom layer's code that is still running)"
                                               if stopped else ""))

    def after_steps(self) -> None:
        """Recompute numeric slopes when the user asked for that after every step."""
        if self.session.refresh_numeric_after_step and self.job is None:
            self.start_check()

    # -- settings --------------------------------------------------------------------------

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

    # -- rate preview ----------------------------------------------------------------------

    def action_toggle_preview(self) -> None:
        shown = not self.show_rates
        if shown and self.why is not None and not self.screen.has_class("-wide"):
            # Below WIDE columns a panel (t, i, h, H, E, D) stands in place of the cost plot and
            # of the preview beside it: close it, or the preview would be switched on unseen.
            self._toggle_why(self.why)
        self.show_preview(shown)

    def action_adopt_best_rate(self) -> None:
        if self.busy():
            return
        try:
            search = search_rates(self.session.preview_rates)
        except StepperError as exc:
            self.say(exc.message, error=True)
            return
        best = search.best
        if best is None:
            self.say(search.note() or "no rate to adopt", error=True)
            return
        if math.isclose(best, self.session.rate, rel_tol=1e-12):
            self.say(f"the current rate {best:g} is already the best of the preview")
            return
        if self.apply(lambda: self.session.set_rate(best)) and search.edge is not None:
            self.say(f"rate {best:g} adopted; {search.note()}")
