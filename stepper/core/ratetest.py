"""A rate range test: from one starting point, k steps at each of several rates, and where each ends.

Every rate starts from the same parameters, the same rule memory and the same
mini-batch generator state, takes ``k`` updates exactly as a real run would
(slopes by backpropagation, clipping, the rule, the schedule's factor for the
steps it would be at, decoupled decay, frozen parameters kept), and is scored
by the training cost after its ``k`` steps (validation too, when there are
rows for it). A rate whose parameters or cost become non-finite is marked
diverged at that step. Nothing outside the test is changed: it works on its
own copies.

Trying a range of rates for a short run and looking at the cost they reach
follows Smith 2017, "Cyclical Learning Rates for Training Neural Networks",
section 3.3 (the "LR range test"), which raises one run's rate step by step;
here each rate gets a run of its own from the same start, so the rates are
compared on equal terms (our own variant).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, Mapping, TypeVar

import numpy as np
from numpy.typing import NDArray

from stepper.core.descent import Descent, EpochPosition, descent_update, next_batch
from stepper.core.network import Network
from stepper.core.layers import Dense
from stepper.core.numeric import Progress, parallel_map
from stepper.core.optimizers import RuleState

Array = NDArray[np.float64]
T = TypeVar("T")

#: Default span of rates around the current one: current x 10^-2 ... x 10^1 (common practice).
LOW_FACTOR = 1e-2
HIGH_FACTOR = 10.0
DEFAULT_COUNT = 8
DEFAULT_STEPS = 50


def log_rates(low: float, high: float, count: int) -> Array:
    """``count`` rates evenly spaced on a log axis from ``low`` to ``high``, ``(count,)``."""
    if not (math.isfinite(low) and math.isfinite(high) and 0 < low <= high):
        raise ValueError(f"rates {low!r} to {high!r} must be positive, the first no larger than the second")
    if count < 1:
        raise ValueError("the range test needs at least one rate")
    if count == 1:
        return np.array([float(low)])
    return np.geomspace(low, high, count)


@dataclass(frozen=True)
class Start:
    """Where the test starts: a session's state, as copies.

    Attributes:
        theta: parameters ``(n_params,)``.
        state: the rule and its memory.
        frozen: True for parameters that never move, ``(n_params,)``.
        step: steps made so far (the schedule's ``t`` for the first test step).
        batch_size: rows per update, or None for all training rows.
        rng_state: the mini-batch generator's ``bit_generator.state``.
        settings: clipping, decay and schedule.
        position: where mini-batches stand in their epoch.
        kept: the network's kept arrays (batch norm's running statistics), ``(n_state,)``;
            None for the network's initial ones.
    """

    theta: Array
    state: RuleState
    frozen: NDArray[np.bool_]
    step: int
    batch_size: int | None
    rng_state: Mapping[str, Any]
    settings: Descent
    position: EpochPosition = EpochPosition()
    kept: Array | None = None


@dataclass(frozen=True)
class RangeResult:
    """What each rate reached.

    Attributes:
        rates: the rates tried, ``(k,)``.
        train: training cost after the steps, ``inf`` where it diverged, ``(k,)``.
        val: validation cost likewise, or None without validation rows.
        diverged_at: per rate, the step (from 1) at which it diverged, or None.
        steps: steps per rate.
        start_cost: training cost at the start.
    """

    rates: Array
    train: Array
    val: Array | None
    diverged_at: tuple[int | None, ...]
    steps: int
    start_cost: float

    @property
    def best(self) -> int | None:
        """Index of the rate with the lowest finite training cost, or None if none has one."""
        finite = np.isfinite(self.train)
        if not finite.any():
            return None
        return int(np.argmin(np.where(finite, self.train, np.inf)))


@dataclass
class _Run:
    """One rate's copy of the state while the test runs."""

    theta: Array
    state: RuleState
    rng: np.random.Generator
    position: EpochPosition
    kept: Array
    diverged_at: int | None = None


def iter_range_test(
    net: Network,
    start: Start,
    X: Array,
    Y: Array,
    X_val: Array | None,
    Y_val: Array | None,
    rates: Array,
    steps: int,
) -> Progress[RangeResult]:
    """Run the test, yielding ``(done, total)`` as the steps are made; see the module docstring.

    ``X`` ``(n_train, n_inputs)`` and ``Y`` ``(n_train, n_outputs)`` are the
    training rows, ``X_val`` and ``Y_val`` the validation rows (or None). The
    rates advance in lockstep, one step of each at a time, spread over the
    threads of :func:`stepper.core.numeric.set_workers` when the network has
    no custom layer. Closing the generator early gives up the test.
    """
    if steps < 1:
        raise ValueError("the range test needs at least one step per rate")
    rates = np.asarray(rates, dtype=np.float64)
    total = int(rates.size) * steps
    decay_mask = net.penalized
    kept = net.initial_state() if start.kept is None else start.kept
    start_cost = net.at(True, start.step, kept).cost(start.theta, X, Y)
    runs = [_Run(start.theta.copy(), start.state.copy(), _generator(start.rng_state), start.position, kept.copy())
            for _ in rates]
    spread = parallel_map if all(isinstance(layer, Dense) for layer in net.layers) else _one_by_one

    def one_step(k: int, s: int) -> None:
        run = runs[k]
        if run.diverged_at is not None:
            return
        if start.batch_size is None:
            Xb, Yb = X, Y
        else:
            pick, run.position = next_batch(run.rng, X.shape[0], start.batch_size, run.position)
            Xb, Yb = X[pick], Y[pick]
        with np.errstate(all="ignore"):
            at_step = net.at(True, start.step + s, run.kept)
            _, slopes = at_step.cost_and_slopes(run.theta, Xb, Yb)
            update = descent_update(run.state, slopes, run.theta, float(rates[k]), start.step + s,
                                    start.settings, start.frozen, decay_mask)
            theta = run.theta + update.delta
            # The running statistics move towards this step's batch, as the session's step does.
            moved = at_step.next_state(run.theta, Xb, run.kept)
        if not np.all(np.isfinite(theta)):
            run.diverged_at = s + 1
            return
        run.theta, run.state, run.kept = theta, update.state, moved

    yield 0, total
    for s in range(steps):
        spread(lambda k: one_step(k, s), len(runs))
        yield (s + 1) * len(runs), total

    def final(k: int) -> tuple[float, float]:
        run = runs[k]
        if run.diverged_at is not None:
            return math.inf, math.inf
        with np.errstate(all="ignore"):
            # The costs the session would show after the steps: training at the next step's masks,
            # validation in evaluation (no dropout, the running statistics).
            train = net.at(True, start.step + steps, run.kept).cost(run.theta, X, Y)
            evaluation = net.at(False, start.step + steps, run.kept)
            val = evaluation.cost(run.theta, X_val, Y_val) \
                if X_val is not None and Y_val is not None and X_val.shape[0] else math.nan
        if not math.isfinite(train):
            run.diverged_at = steps
        return (train if math.isfinite(train) else math.inf), (val if math.isfinite(val) or math.isnan(val)
                                                                else math.inf)

    costs = spread(final, len(runs))
    train = np.array([c[0] for c in costs])
    has_val = X_val is not None and X_val.shape[0] > 0
    val = np.array([c[1] for c in costs]) if has_val else None
    return RangeResult(rates, train, val, tuple(run.diverged_at for run in runs), steps, float(start_cost))


def _generator(state: Mapping[str, Any]) -> np.random.Generator:
    """A generator in the mini-batch generator's state (the session's is PCG64)."""
    bits = np.random.PCG64()
    bits.state = dict(state)  # type: ignore[assignment]  # numpy types it as a TypedDict
    return np.random.Generator(bits)


def _one_by_one(fn: Callable[[int], T], count: int) -> list[T]:
    return [fn(i) for i in range(count)]
