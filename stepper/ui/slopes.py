"""Keys of the numeric slopes: recompute them now, or after every step."""

from __future__ import annotations

from stepper.ui.base import AppBase


class SlopeKeys(AppBase):
    """Finite differences on demand."""

    def action_compute_check(self) -> None:
        if not self.busy():
            self.start_check()

    def action_compute_rest(self) -> None:
        """Every numeric slope the last check left out (a large model's check starts with a sample)."""
        if self.busy():
            return
        left = self.session.unchecked()
        if left is not None and left.size == 0:
            self.say("every numeric slope is computed already")
            return
        self.start_check(rest=True)

    def action_toggle_auto_check(self) -> None:
        # A preference the session keeps (it decides nothing with it); not an undoable operation.
        self.session.set_refresh_after_step(not self.session.refresh_numeric_after_step)
        state = "on" if self.session.refresh_numeric_after_step else "off"
        self.say(f"numeric slopes after every step: {state}")
        self._show_status()
