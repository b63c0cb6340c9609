"""The numeric slopes: kept current by themselves while they are cheap, and the keys that ask for them.

After every change (and at start-up) the app recomputes the numeric slopes on
its own thread, before it draws, when the last pass took no longer than the
budget (``--numeric-budget``, default 50 ms): a small model's table always
shows both slopes and a verdict that is current. A pass that runs past the
budget is stopped there; its speed so far gives the estimate that the status
line shows, and from then on the slopes wait for ``#`` (a job with a progress
bar) or for ``a`` (after every step, whatever it costs). A ``#`` pass that
comes in under the budget lets the automatic passes start again.
"""

from __future__ import annotations

import math
import time
from typing import Callable

from stepper.errors import StepperError
from stepper.ui.base import AppBase, log
from stepper.ui.insight import InputChecks

class SlopeKeys(AppBase):
    """Finite differences: by themselves under the budget, on demand above it."""

    def action_compute_check(self) -> None:
        if self.busy():
            return
        left = self.session.unchecked()
        inputs = self._input_checks
        inputs_current = not self.figures.custom or (inputs is not None and inputs.version == self.session.version)
        if left is not None and inputs_current:
            # Current already (the automatic pass, or an earlier #): a job would only hold up the keys.
            rest = f"; C computes the {left.size:,} left out" if left.size else ""
            self.say(f"the numeric slopes are current: nothing changed since they were computed{rest}")
            return
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
        self.say(f"numeric slopes after every step, whatever they cost: {state}")

    def keep_numeric_current(self) -> None:
        """Recompute the numeric slopes here and now when they are out of date and a pass fits the budget."""
        session = self.session
        if self.job is not None or not session.check_is_stale or self.numeric_budget <= 0:
            if self.numeric_budget <= 0 and self.numeric_reason is None:
                self.numeric_reason = "automatic passes are off (--numeric-budget 0)"
            return
        if self.numeric_seconds is not None and self.numeric_seconds > self.numeric_budget:
            return
        if self._numeric_failed_at == session.version:
            return  # the user's layer raised at these weights: not again at every redraw
        start = time.monotonic()
        deadline = start + self.numeric_budget
        job = session.iter_refresh_check(session.default_check())
        version = session.version
        begun: float | None = None  # when the pass's set-up (a forward pass) was done: its first report
        try:
            for done, total in job:
                begun = time.monotonic() if begun is None else begun
                if time.monotonic() > deadline and done < total:
                    elapsed = time.monotonic() - start
                    ready = begun - start
                    estimate = ready + (elapsed - ready) * total / done if done else math.inf
                    self.numeric_pass_took(estimate, estimated=True)
                    log.info("numeric slopes: automatic pass stopped at %d of %d after %.3f s", done, total, elapsed)
                    return
        except StepperError as exc:
            self._numeric_failed_at = version
            self._problem(exc.message)
            return
        finally:
            job.close()
        if self.figures.custom and not self._input_slopes_within(deadline, version):
            self.numeric_pass_took(time.monotonic() - start, estimated=True)
            return
        self.numeric_pass_took(time.monotonic() - start)

    def _input_slopes_within(self, deadline: float, version: int) -> bool:
        """The custom layers' input-slope checks, done before ``deadline``; False when they were not."""
        late: Callable[[], bool] = lambda: time.monotonic() > deadline  # noqa: E731
        try:
            checks = self.figures.input_slopes(self.session.theta.copy(), late, self.session.training_net())
        except StepperError as exc:
            self._numeric_failed_at = version
            self._problem(exc.message)
            return True
        if checks is None or late():
            return False
        self._input_checks_done(InputChecks(version, checks))
        return True
