"""Taking steps of the update rule, and previewing the cost after one step at other rates.

How a job of steps ends, and what it says (the app shows ``error.message`` as a
notice and ``last_action`` on its ``last:`` line; ``stepper run`` prints
``error.what`` with advice of its own and exits 1):

- all ``n`` steps made: a :class:`StepReport`; ``last_action`` gives the cost change;
- cancelled (the generator closed early): the steps made are kept as one undo unit;
- a step would make a weight or the cost non-finite: :class:`DivergenceError`;
  that step is not made, the steps before it are kept as one undo unit;
- the cost ran away while finite (:mod:`.runaway`, the session's ``runaway``
  rule): :class:`RunawayError` after the step that crossed the rule; every step
  made is kept as one undo unit, so one undo takes the whole job back and
  nothing the screen showed is lost.

Both errors say what happened and what to do: undo, and the rate preview
(the cost after one step at smaller rates). A replay of a journal steps
without the runaway rule, since the journal holds exactly the steps made.
"""

from __future__ import annotations

import math
import time
from typing import Any, Iterable, Iterator

import numpy as np

from stepper.core.descent import Update, descent_update, next_batch
from stepper.core.network import Network
from stepper.core.numeric import Progress, numeric_slopes, run_to_end
from stepper.core.optimizers import RuleState
from stepper.core.rows import rows_of_output
from stepper.errors import CheckpointError, DivergenceError, RunawayError, StepperError, UsageError
from stepper.formats.journal import STEP_LINE_SECONDS
from stepper.session.checking import Checking
from stepper.session.core import Array, StepReport, _Change
from stepper.session.runaway import RunawayRule


class Stepping(Checking):
    """Updates (one or many, as one undoable operation) and the one-step rate preview."""

    #: The fields that drawing a mini-batch changes.
    BATCH_FIELDS = ("batch_rng", "batch_order", "batch_cursor", "epoch")

    # -- stepping ------------------------------------------------------------------------------

    def _batch(self) -> tuple[Array, Array]:
        """The rows of the next update: all of them, or the next mini-batch of the epoch.

        Mini-batches are epoch-wise: each epoch draws an order of the training
        rows from ``batch_rng`` and takes the batches from it in turn, so every
        row is used once per epoch (the last batch of an epoch takes the rows
        left, which may be fewer).
        """
        data = self.setup.data
        if self.batch_size is None:
            return data.X, data.Y
        pick, at = next_batch(self.batch_rng, data.n_train, self.batch_size, self.epoch_position)
        self.batch_order, self.batch_cursor, self.epoch = at.order, at.cursor, at.epoch
        return data.X[pick], data.Y[pick]

    def _slopes(self, X: Array, Y: Array) -> Array:
        net = self.training_net()
        if self.slope_source == "analytic":
            if X is self.setup.data.X:
                return self.analytic_slopes()
            return net.cost_and_slopes(self.theta, X, Y)[1]
        moving = np.flatnonzero(~self.frozen)
        slopes = numeric_slopes(net, self.theta, X, Y, which=moving).slopes
        return np.where(self.frozen, 0.0, slopes)

    def _one_step(self) -> None:
        """One update in place, or an error (DivergenceError, a custom layer's) with nothing changed."""
        # The draw of a refused step is taken back too, so the next step (and a
        # replay of the journal, which holds only the steps made) draws the same batch.
        # (_batch replaces batch_order when an epoch begins, never changes it in place.)
        saved = (self.batch_rng.bit_generator.state, self.batch_order, self.batch_cursor, self.epoch)
        try:
            theta, state, cost, passed, kept = self._next_update()
        except BaseException:
            self.batch_rng.bit_generator.state = saved[0]
            self.batch_order, self.batch_cursor, self.epoch = saved[1:]
            raise
        self.last_update = theta - self.theta
        self.theta[...] = theta
        self.rule_state = state
        self.step_count += 1
        self.state = kept
        self._version += 1
        self._cache["train"] = (self._version, float(cost))
        for key, value in passed.items():
            self._cache[key] = (self._version, value)
        self.history.append(self._entry())

    def _next_update(self) -> tuple[Array, RuleState, float, dict[str, Any], Array]:
        """The parameters, rule state, training cost, cached values and kept state after one update.

        Nothing is changed. Where the next step's slopes are backpropagated on
        the whole training set (the same rows as the cost), the one forward pass
        at the new parameters gives the cost, those slopes and the training rows'
        losses: the last two are returned too (a dict of cached values by key,
        else empty), and the next step or redraw does not run the network forward
        again. The kept state (batch norm's running statistics) moves towards the
        statistics of this step's batch; the cost and slopes are those of the next
        step (its dropout masks).

        Raises DivergenceError when the update would make a weight or the cost non-finite.
        """
        X, Y = self._batch()
        data = self.setup.data
        passed: dict[str, Any] = {}
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            # Overflow is expected on the way to divergence; it is caught just below.
            slopes = self._slopes(X, Y)
            update = self._update(slopes, self.rate)
            delta, state = update.delta, update.state
            theta = self.theta + delta
            bad = ~np.isfinite(theta)
            kept = self.training_net().next_state(self.theta, X, self.state)
            nxt = self.training_net(self.step_count + 1)
            if bad.any():
                cost = math.nan
            elif self.slope_source == "analytic" and self.batch_size is None:
                cost, passed = self._cost_and_slopes_at(nxt, theta)
            else:
                cost = nxt.cost(theta, data.X, data.Y)
        if bad.any() or not math.isfinite(cost):
            if bad.any():
                culprits = tuple(self.names[i] for i in np.flatnonzero(bad)[:5])
                what = f"{int(bad.sum())} weight(s) would become non-finite ({', '.join(culprits)})"
            else:
                order = np.argsort(-np.abs(delta))[:3]
                culprits = tuple(self.names[i] for i in order)
                what = f"the cost would become non-finite (largest moves: {', '.join(culprits)})"
            raise DivergenceError(f"step refused at rate {update.rate:g}: {what}", culprits)
        return theta, state, float(cost), passed, kept

    def _cost_and_slopes_at(self, net: Network, theta: Array) -> tuple[float, dict[str, Any]]:
        """Training cost at ``theta`` ``(n_params,)`` through ``net``, and what the same forward pass gives besides.

        The values are by cache key: the training rows' losses (``rows``) and the
        slopes by backpropagation (``slopes``). A custom layer whose backward
        raises there does not stop the step (its forward pass worked): the slopes
        are left for later, as before.
        """
        data = self.setup.data
        trace = net.forward(theta, data.X)
        passed: dict[str, Any] = {"rows": rows_of_output(net, trace[-1][0], trace[-1][1], data.Y)}
        try:
            cost, passed["slopes"], _ = net.backward(theta, trace, data.Y)
        except StepperError:
            return float(net.output_cost(trace[-1][0], trace[-1][1], data.Y)) + net.penalty(theta), passed
        return cost, passed

    def _update(self, slopes: Array, rate: float) -> Update:
        """The next step's update at base rate ``rate`` (clipping, rule, schedule, decay); nothing changes."""
        return descent_update(self.rule_state, slopes, self.theta, rate, self.step_count, self.descent,
                              self.frozen, self.net.penalized)

    def iter_steps(self, n: int, watch: bool = True, continues: bool = False) -> Progress[StepReport]:
        """Make ``n`` updates as one undoable operation, yielding ``(done, n)`` after each.

        Closing the generator early (cancel) keeps the steps already made. A step
        that would diverge raises DivergenceError; the steps before it are kept.
        With ``watch`` the session's :attr:`runaway` rule is applied: a cost that
        runs away raises RunawayError after the step that showed it, keeping
        every step made. See the module docstring for the messages.
        Steps go to the journal as they are made, a line every
        ``STEP_LINE_SECONDS`` at most (and whenever :meth:`flush_journal` asks).
        ``continues`` (a replayed journal line) adds the steps to the last
        operation, which must be a run of steps.
        """
        if n < 1:
            raise UsageError(f"number of steps {n} must be at least 1")
        fields = ["theta", "rule_state", "step_count", "state", *self.BATCH_FIELDS]
        earlier: _Change | None = None
        if continues:
            if not self._undo or self._undo[-1].op != "step" or self._redo:
                raise CheckpointError("a line continuing a run of steps follows no run of steps")
            earlier = self._undo.pop()
            # Back to the state before that run (whatever form the undo level keeps it in), and forward again.
            self._restore(earlier.before)
            before, start = self._snapshot(fields), len(self.history)
            self._restore(earlier.after)
        else:
            before, start = self._snapshot(fields), len(self.history)
        cost_before = self.train_cost()
        watcher = self.runaway.watch(cost_before) if watch else None
        done = 0
        stop: DivergenceError | None = None
        self._steps_unlogged, self._steps_first_logged = 0, False
        last_line = time.monotonic()
        try:
            yield 0, n
            for _ in range(n):
                try:
                    self._one_step()
                except DivergenceError as exc:
                    stop = self._refused(exc, done, n)
                    break
                done += 1
                self._steps_unlogged += 1
                reason = None if watcher is None else watcher.after(self.train_cost())
                if reason is not None:
                    stop = self._ran_away(reason, done, n)
                    break
                now = time.monotonic()
                if now - last_line >= STEP_LINE_SECONDS:
                    last_line = now
                    self._log_steps()
                yield done, n
        finally:
            self._log_steps()
            if done or earlier is not None:
                total = self.step_count - int(before["step_count"])
                after = {**self._snapshot(fields), "history": (start, self.history.segment(start))}
                change = _Change(f"{total} step{'s' if total > 1 else ''}",
                                 {**before, "history": (start, [])}, after, op="step")
                self._commit(change, None)
                self.last_action = (
                    f"{done} step{'s' if done > 1 else ''} ({self.rule}, rate {self.rate:g}, "
                    f"{self.slope_source} slopes): cost {cost_before:.6g} -> {self.train_cost():.6g}"
                )
        if stop is not None:
            self.last_action = stop.what
            raise stop
        return StepReport(cost_before, self.train_cost(), done)

    def _refused(self, exc: DivergenceError, done: int, n: int) -> DivergenceError:
        """The refusal of step ``done + 1`` of ``n``, saying what is kept and what to do."""
        if n == 1:
            what = exc.message
            kept = "nothing changed"
        else:
            what = f"step {done + 1} of {n} {exc.message.removeprefix('step ')}"
            kept = ("nothing changed" if done == 0 else "the step before it is kept (undo takes it back)"
                    if done == 1 else f"the {done} steps before it are kept (one undo takes them all back)")
        return DivergenceError(f"{what}; {kept}. {_ADVICE}", exc.names, what)

    def _ran_away(self, reason: str, done: int, n: int) -> RunawayError:
        """The stop after step ``done`` of ``n``, saying what ran away, what is kept and what to do."""
        if n == 1:
            what = f"the step at rate {self.rate:g} ran away: {reason}"
            kept = "it is kept (undo takes it back)"
        else:
            what = f"stopped after {done} of {n} steps at rate {self.rate:g}: {reason}"
            kept = ("the step is kept (undo takes it back)" if done == 1 else
                    f"the {done} steps are kept (one undo takes them all back)")
        return RunawayError(f"{what}; {kept}. {_ADVICE}", what=what)

    def set_runaway(self, rule: RunawayRule) -> None:
        """The rule that stops a job of steps whose cost runs away (:data:`.runaway.RUN_ON`: none).

        A preference for whoever drives the session, like
        :meth:`set_refresh_after_step`: it changes no model state, so it is
        neither undone nor journaled.
        """
        self.runaway = rule

    def step(self, n: int = 1, watch: bool = True, continues: bool = False) -> StepReport:
        """Make ``n`` updates; see :meth:`iter_steps`."""
        report = run_to_end(self.iter_steps(n, watch, continues))
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
        nxt = self.training_net(self.step_count + 1)  # the cost the history would show after the step
        for rate in (self.candidate_rates() if rates is None else rates):
            with np.errstate(all="ignore"):
                theta = self.theta + self._update(slopes, float(rate)).delta
                cost = nxt.cost(theta, data.X, data.Y) if np.all(np.isfinite(theta)) else math.inf
            out.append((float(rate), cost if math.isfinite(cost) else math.inf))
        return out

    @staticmethod
    def best_preview_rate(preview: list[tuple[float, float]]) -> float:
        """The rate with the lowest cost in a preview."""
        return min(preview, key=lambda pair: pair[1])[0]


#: What to do after a refused or runaway step, in words that hold in the app and elsewhere.
_ADVICE = "The rate preview shows the cost after one step at smaller rates."
