"""Numeric slopes of the session's weights and their comparison with the analytic ones.

:class:`Checking` fills :attr:`SessionCore.check`: all weights of a small model,
a stratified sample of a large one first (:meth:`default_check`) and the rest
on request (:meth:`unchecked`). A check reuses the cost and analytic slopes the
session has cached at the same weights.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from stepper.core.gradcheck import CheckResult, iter_check, merged
from stepper.core.numeric import Progress, run_to_end
from stepper.core.selection import stratified
from stepper.session.core import Array, SessionCore

#: The app computes every numeric slope of a model up to this size at once; a larger
#: one starts with a sample of CHECK_SAMPLE weights (about a second at a million).
FULL_CHECK_UP_TO = 20_000
CHECK_SAMPLE = 5_000


class Checking(SessionCore):
    """The numeric check of a session's current weights."""

    def _known(self, theta: Array, version: int) -> tuple[float, Array]:
        """Training cost and analytic slopes at ``theta`` (the weights of ``version``) for a check.

        From the caches when both are there; else by one backward pass, whose
        slopes are kept (the snapshot after the check needs them too).
        """
        cost, slopes = self._cache.get("train"), self._cache.get("slopes")
        if cost is not None and slopes is not None and cost[0] == slopes[0] == version:
            return float(cost[1]), slopes[1]
        data = self.setup.data
        value, grads = self.training_net().cost_and_slopes(theta, data.X, data.Y)
        self._cache["slopes"] = (version, grads)
        return value, grads

    def iter_refresh_check(self, which: NDArray[np.int64] | None = None) -> Progress[CheckResult]:
        """Numeric slopes and their comparison, stored in :attr:`check`; of every parameter, or of ``which``.

        When the last check is of the same weights, what it computed outside
        ``which`` is kept, so a sample and then :meth:`unchecked` add up to all.
        """
        data = self.setup.data
        version = self._version
        theta = self.theta.copy()
        earlier = self.check if not self.check_is_stale else None
        result = yield from iter_check(self.training_net(), theta, data.X, data.Y, which=which,
                                     known=self._known(theta, version))
        if which is not None and earlier is not None:
            result = merged(earlier, result)
        if version == self._version:
            self.check = result
            self._check_version = version
        return result

    def default_check(self) -> NDArray[np.int64] | None:
        """What the app's numeric slopes cover at first: all (None) up to FULL_CHECK_UP_TO weights.

        A larger model gets a seeded sample of CHECK_SAMPLE weights, drawn from
        every array in proportion to its size (stepper.core.selection); a
        second pass (:meth:`unchecked`) computes the rest.
        """
        if self.net.n_params <= FULL_CHECK_UP_TO:
            return None
        return stratified(self.net.layout, CHECK_SAMPLE, self.seed)

    def unchecked(self) -> NDArray[np.int64] | None:
        """The parameters the last check left out (None: all, when there is none or it is stale)."""
        if self.check is None or self.check_is_stale:
            return None
        return np.flatnonzero(self.check.verdict == "").astype(np.int64)

    def refresh_check(self) -> CheckResult:
        result = run_to_end(self.iter_refresh_check())
        assert result is not None
        return result
