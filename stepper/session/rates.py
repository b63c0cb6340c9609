"""The rate range test of a session: many steps at several rates, from its current state, without committing."""

from __future__ import annotations

from typing import Sequence

import numpy as np

from stepper.core.numeric import Progress, run_to_end
from stepper.core.ratetest import (DEFAULT_COUNT, DEFAULT_STEPS, HIGH_FACTOR, LOW_FACTOR, RangeResult, Start,
                                   iter_range_test, log_rates)
from stepper.errors import UsageError
from stepper.session.core import SessionCore

#: Most rates and steps per rate a test may ask for (a typo must not start a job of days).
MAX_RATES = 64
MAX_STEPS = 100_000


class Rates(SessionCore):
    """The range test; its last result is kept in :attr:`range_result` (not part of the model's state)."""

    range_result: RangeResult | None = None
    _range_key: tuple[object, ...] | None = None

    def default_range(self) -> tuple[float, float, int]:
        """Lowest and highest rate and how many, around the current rate."""
        return self.rate * LOW_FACTOR, self.rate * HIGH_FACTOR, DEFAULT_COUNT

    @property
    def range_is_stale(self) -> bool:
        """True when what the test starts from has changed since the last test (or there was none).

        The current rate is not part of it: every rate of the test is its own.
        """
        return self.range_result is None or self._range_key != self._range_state()

    def _range_state(self) -> tuple[object, ...]:
        """What a range test starts from, in brief (the weights' and rule memory's versions, not their values)."""
        return (self.version, self.step_count, self.rule, self.rule_state.t, self.batch_size, self.descent,
                int(np.count_nonzero(self.frozen)), self.l2)

    def iter_range_test(
        self, rates: Sequence[float] | None = None, steps: int = DEFAULT_STEPS
    ) -> Progress[RangeResult]:
        """Run ``steps`` steps at each rate from the current state, yielding ``(done, total)``.

        Nothing of the session changes (weights, rule memory, frozen mask,
        mini-batch generator, history, step count); only :attr:`range_result`
        is set when the test finishes. Slopes come from backpropagation,
        whatever the slope source. Default rates: :meth:`default_range`.
        """
        if rates is None:
            low, high, count = self.default_range()
            chosen = log_rates(low, high, count)
        else:
            chosen = np.asarray(list(rates), dtype=np.float64)
        if chosen.size < 1 or chosen.size > MAX_RATES:
            raise UsageError(f"a range test tries 1 to {MAX_RATES} rates, not {chosen.size}")
        if not np.all(np.isfinite(chosen) & (chosen > 0)):
            raise UsageError("every rate of a range test must be a positive number")
        if not 1 <= steps <= MAX_STEPS:
            raise UsageError(f"a range test makes 1 to {MAX_STEPS} steps per rate, not {steps}")
        key = self._range_state()
        start = Start(self.theta.copy(), self.rule_state.copy(), self.frozen.copy(), self.step_count,
                      self.batch_size, self.batch_rng.bit_generator.state, self.descent, self.epoch_position,
                      self.state.copy())
        data = self.setup.data
        result = yield from iter_range_test(self.net, start, data.X, data.Y, data.X_val, data.Y_val, chosen, steps)
        if key == self._range_state():
            self.range_result = result
            self._range_key = key
        return result

    def range_test(self, rates: Sequence[float] | None = None, steps: int = DEFAULT_STEPS) -> RangeResult:
        """:meth:`iter_range_test` run to its end."""
        result = run_to_end(self.iter_range_test(rates, steps))
        assert result is not None
        return result
