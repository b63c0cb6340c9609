"""Taking steps of the update rule, and previewing the cost after one step at other rates."""

from __future__ import annotations

import math
from typing import Iterable, Iterator

import numpy as np

from stepper.core.numeric import Progress, numeric_slopes, run_to_end
from stepper.core.optimizers import RuleState, compute_update
from stepper.errors import DivergenceError, UsageError
from stepper.session.core import Array, SessionCore, StepReport, _Change


class Stepping(SessionCore):
    """Updates (one or many, as one undoable operation) and the one-step rate preview."""

    # -- stepping ------------------------------------------------------------------------------

    def _batch(self) -> tuple[Array, Array]:
        data = self.setup.data
        if self.batch_size is None:
            return data.X, data.Y
        pick = self.batch_rng.choice(data.n_train, size=self.batch_size, replace=False)
        pick.sort()
        return data.X[pick], data.Y[pick]

    def _slopes(self, X: Array, Y: Array) -> Array:
        if self.slope_source == "analytic":
            if X is self.setup.data.X:
                return self.analytic_slopes()
            return self.net.cost_and_slopes(self.theta, X, Y)[1]
        moving = np.flatnonzero(~self.frozen)
        slopes = numeric_slopes(self.net, self.theta, X, Y, which=moving).slopes
        return np.where(self.frozen, 0.0, slopes)

    def _one_step(self) -> None:
        """One update in place, or an error (DivergenceError, a custom layer's) with nothing changed."""
        # The draw of a refused step is taken back too, so the next step (and a
        # replay of the journal, which holds only the steps made) draws the same batch.
        rng_state = self.batch_rng.bit_generator.state
        try:
            theta, state, cost = self._next_update()
        except BaseException:
            self.batch_rng.bit_generator.state = rng_state
            raise
        self.theta[...] = theta
        self.rule_state = state
        self.step_count += 1
        self._version += 1
        self._cache["train"] = (self._version, float(cost))
        self.history.append(self._entry())

    def _next_update(self) -> tuple[Array, RuleState, float]:
        """The parameters, rule state and training cost after one update; nothing is changed.

        Raises DivergenceError when the update would make a weight or the cost non-finite.
        """
        X, Y = self._batch()
        data = self.setup.data
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            # Overflow is expected on the way to divergence; it is caught just below.
            slopes = self._slopes(X, Y)
            delta, state = compute_update(self.rule_state, slopes, self.rate, self.frozen)
            theta = self.theta + delta
            bad = ~np.isfinite(theta)
            cost = self.net.cost(theta, data.X, data.Y) if not bad.any() else math.nan
        if bad.any() or not math.isfinite(cost):
            if bad.any():
                culprits = tuple(self.names[i] for i in np.flatnonzero(bad)[:5])
                what = f"{int(bad.sum())} weight(s) would become non-finite ({', '.join(culprits)})"
            else:
                order = np.argsort(-np.abs(delta))[:3]
                culprits = tuple(self.names[i] for i in order)
                what = f"the cost would become non-finite (largest moves: {', '.join(culprits)})"
            raise DivergenceError(
                f"step refused at rate {self.rate:g}: {what}; that step was not made. "
                f"Try a smaller rate, e.g. {self.rate / 10:g}.",
                culprits,
            )
        return theta, state, float(cost)

    def iter_steps(self, n: int) -> Progress[StepReport]:
        """Make ``n`` updates as one undoable operation, yielding ``(done, n)`` after each.

        Closing the generator early (cancel) keeps the steps already made. A step
        that would diverge raises DivergenceError; the steps before it are kept.
        """
        if n < 1:
            raise UsageError(f"number of steps {n} must be at least 1")
        fields = ["theta", "rule_state", "step_count", "batch_rng"]
        before = self._snapshot(fields)
        start = len(self.history)
        cost_before = self.train_cost()
        done = 0
        try:
            yield 0, n
            for _ in range(n):
                self._one_step()
                done += 1
                yield done, n
        finally:
            if done:
                after = {**self._snapshot(fields), "history": (start, list(self.history[start:]))}
                change = _Change(f"{done} step{'s' if done > 1 else ''}",
                                 {**before, "history": (start, [])}, after)
                self._commit(change, {"op": "step", "n": done})
                self.last_action = (
                    f"{done} step{'s' if done > 1 else ''} ({self.rule}, rate {self.rate:g}, "
                    f"{self.slope_source} slopes): cost {cost_before:.6g} -> {self.train_cost():.6g}"
                )
        return StepReport(cost_before, self.train_cost(), done)

    def step(self, n: int = 1) -> StepReport:
        """Make ``n`` updates; see :meth:`iter_steps`."""
        report = run_to_end(self.iter_steps(n))
        assert report is not None
        return report

    def set_refresh_after_step(self, on: bool) -> None:
        """Whether the numeric slopes should be recomputed after every step.

        A preference for whoever drives the session (the app starts the
        recomputation); it changes no model state, so it is neither undone nor
        journaled.
        """
        self.refresh_numeric_after_step = bool(on)

    def refresh_if_wanted(self) -> Iterator[tuple[int, int]]:
        """Numeric slopes after a step when the user asked for that (a progress generator)."""
        if self.refresh_numeric_after_step:
            yield from self.iter_refresh_check()

    # -- rate preview --------------------------------------------------------------------------

    def candidate_rates(self) -> list[float]:
        """Log-spaced rates around the current one: rate x 1/16 ... x 16, in factors of 4 and 2."""
        return [self.rate * f for f in (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1.0, 2.0, 4.0, 8.0, 16.0)]

    def preview_rates(self, rates: Iterable[float] | None = None) -> list[tuple[float, float]]:
        """Cost on the training set after one full-batch step at each rate; the state is unchanged.

        A rate whose step would be non-finite gets cost ``inf``.
        """
        data = self.setup.data
        if self.slope_source == "analytic":
            slopes = self.analytic_slopes()
        else:
            slopes = self._slopes(data.X, data.Y)
        out: list[tuple[float, float]] = []
        for rate in (self.candidate_rates() if rates is None else rates):
            delta, _ = compute_update(self.rule_state, slopes, float(rate), self.frozen)
            with np.errstate(all="ignore"):
                theta = self.theta + delta
                cost = self.net.cost(theta, data.X, data.Y) if np.all(np.isfinite(theta)) else math.inf
            out.append((float(rate), cost if math.isfinite(cost) else math.inf))
        return out

    @staticmethod
    def best_preview_rate(preview: list[tuple[float, float]]) -> float:
        """The rate with the lowest cost in a preview."""
        return min(preview, key=lambda pair: pair[1])[0]
