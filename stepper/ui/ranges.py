"""Keys of the rate range test: run it as a job (E), adopt its lowest rate (B).

The test runs in a thread worker on the session's progress generator
(:meth:`~stepper.session.Session.iter_range_test`), with the job bar and ``x``
to cancel; it changes nothing of the session. Its panel is drawn by
:mod:`stepper.ui.outcome`.
"""

from __future__ import annotations

import math

from textual import work

from stepper.core.numeric import Progress
from stepper.core.ratetest import DEFAULT_STEPS, RangeResult, log_rates
from stepper.errors import UsageError
from stepper.ui.base import parse_count, parse_float
from stepper.ui.jobs import Jobs
from stepper.ui.outcome import OutcomeKeys

JOB = "rate range test"


def parse_range(text: str) -> tuple[float, float, int, int]:
    """``LOW HIGH COUNT STEPS`` typed in one line; UsageError naming what is wrong."""
    words = text.replace(",", " ").split()
    if len(words) != 4:
        raise UsageError(f"range test: expected 4 numbers (lowest rate, highest rate, how many rates, steps at "
                         f"each), got {len(words)}")
    low, high = parse_float(words[0], "lowest rate"), parse_float(words[1], "highest rate")
    count, steps = parse_count(words[2], "how many rates"), parse_count(words[3], "steps at each rate")
    if not 0 < low <= high:
        raise UsageError(f"range test: rates {low:g} to {high:g} must be positive, the first no larger")
    return low, high, count, steps


class RangeKeys(OutcomeKeys, Jobs):
    """The range test and adopting its best rate."""

    _range_steps = DEFAULT_STEPS

    def action_range_test(self) -> None:
        if self.busy():
            return
        low, high, count = self.session.default_range()

        def start(text: str) -> None:
            try:
                low, high, count, steps = parse_range(text)
                rates = log_rates(low, high, count).tolist()
                job = self.session.iter_range_test(rates, steps)  # checks the counts before the job starts
            except UsageError as exc:
                self.say(exc.message, error=True)
                return
            self._range_steps = steps
            if self.why != "range":
                self._toggle_why("range")
            self._begin(JOB, len(rates) * steps)
            self._worker = self._range_worker(job)

        self.ask("Rate range test", "Lowest rate, highest rate, how many rates (spaced evenly on a log axis), "
                 "steps at each. Every rate starts from the current state; nothing is kept:",
                 f"{low:.3g} {high:.3g} {count} {self._range_steps}", start)

    @work(thread=True, exclusive=True, group="session", exit_on_error=False)
    def _range_worker(self, job: Progress[RangeResult]) -> None:
        self._run_job(JOB, job, redraw=False)

    def action_adopt_range_rate(self) -> None:
        if self.busy():
            return
        result = self.session.range_result
        if result is None:
            self.say("no range test yet: E runs one", error=True)
            return
        best = result.best
        if best is None:
            self.say("every rate of the range test diverged: nothing to adopt (E again with lower rates)",
                     error=True)
            return
        rate = float(result.rates[best])
        if math.isclose(rate, self.session.rate, rel_tol=1e-12):
            self.say(f"the rate is already {rate:g}, the range test's lowest")
            return
        stale = " (the state changed since the test: E again to be sure)" if self.session.range_is_stale else ""
        if self.apply(lambda: self.session.set_rate(rate)):
            self.say(f"rate {rate:g} from the range test{stale}")
