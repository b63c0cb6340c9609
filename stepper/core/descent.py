"""One descent update from the slopes: clipping, the rule at the scheduled rate, decoupled decay.

The order, for step ``t`` with slopes ``g`` (of the whole cost, L2 term
included) and parameters ``theta``, all ``(n_params,)``:

1. **Clipping by global norm** (Pascanu, Mikolov & Bengio 2013, "On the
   difficulty of training recurrent neural networks", algorithm 1): when
   ``||g|| > c``, ``g <- g * c / ||g||``. The norm is taken over the parameters
   that move (frozen ones are left out, their slopes play no part in a step).
2. **The rule** (:mod:`stepper.core.optimizers`) at the rate
   ``rate * eta_t``, with ``eta_t`` the schedule's factor
   (:mod:`stepper.core.schedules`).
3. **Decoupled weight decay** (Loshchilov & Hutter 2019, "Decoupled Weight
   Decay Regularization", algorithm 1 line 12 for SGD with momentum and
   algorithm 2 line 12 for Adam, i.e. AdamW): ``theta <- theta - eta_t *
   lambda * theta``, added to the rule's change. As in the paper the decay is
   scaled by the schedule's factor ``eta_t`` and not by the rate ``alpha``.
   Some frameworks multiply the decay by the rate instead: their setting
   ``lambda'`` is ours ``lambda = rate * lambda'``. It applies to the weights
   and not the biases, like the L2 term (common practice).

Frozen parameters get no change at all.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.optimizers import RuleState, compute_update
from stepper.core.schedules import CONSTANT, Schedule

Array = NDArray[np.float64]


@dataclass(frozen=True)
class Descent:
    """How an update is made besides its rule and rate.

    Attributes:
        weight_decay: ``lambda`` of the decoupled decay (0: none).
        clip_norm: the largest global slope norm, or None for no clipping.
        schedule: the rate schedule.
    """

    weight_decay: float = 0.0
    clip_norm: float | None = None
    schedule: Schedule = CONSTANT


@dataclass(frozen=True)
class Update:
    """One update, computed and not yet applied.

    Attributes:
        delta: the change to the parameters, ``(n_params,)``.
        state: the rule's state after it.
        rate: the rate the rule used, ``rate * eta_t``.
        slope_norm: the global norm of the moving parameters' slopes before clipping.
        clipped: True when clipping scaled the slopes down.
    """

    delta: Array
    state: RuleState
    rate: float
    slope_norm: float
    clipped: bool


def clip_by_norm(slopes: Array, max_norm: float | None, moving: NDArray[np.bool_] | None = None) -> tuple[Array, float]:
    """Slopes scaled so their global norm is at most ``max_norm``, and the norm before.

    Args:
        slopes: ``(n_params,)``.
        max_norm: the limit ``c``; None leaves the slopes as they are.
        moving: True for the parameters whose slopes count, ``(n_params,)``; all when None.
    """
    counted = slopes if moving is None else slopes[moving]
    norm = float(np.sqrt(np.dot(counted, counted)))
    if max_norm is None or not norm > max_norm:
        return slopes, norm
    return slopes * (max_norm / norm), norm


def decoupled_decay(theta: Array, weight_decay: float, factor: float, mask: NDArray[np.bool_]) -> Array:
    """The decay's change ``-factor * weight_decay * theta`` where ``mask``, else 0; ``(n_params,)``."""
    if weight_decay == 0.0:
        return np.zeros(theta.shape)
    return np.where(mask, -factor * weight_decay * theta, 0.0)


def descent_update(
    state: RuleState,
    slopes: Array,
    theta: Array,
    rate: float,
    step: int,
    settings: Descent,
    frozen: NDArray[np.bool_],
    decay_mask: NDArray[np.bool_],
) -> Update:
    """The update of step ``step`` (0 for the first); nothing is changed.

    Args:
        state: the rule and its memory.
        slopes: slopes of the cost, ``(n_params,)``.
        theta: parameters before the step, ``(n_params,)``.
        rate: the base rate, before the schedule.
        step: how many steps were made before this one (the schedule's ``t``).
        settings: clipping, decay and schedule.
        frozen: True for parameters that must not move, ``(n_params,)``.
        decay_mask: True for the parameters the decay acts on (weights), ``(n_params,)``.
    """
    moving = ~frozen
    factor = settings.schedule.factor_at(step)
    used = rate * factor
    clipped, norm = clip_by_norm(slopes, settings.clip_norm, moving)
    delta, nxt = compute_update(state, clipped, used, frozen)
    if settings.weight_decay:
        delta = delta + decoupled_decay(theta, settings.weight_decay, factor, decay_mask & moving)
    return Update(delta, nxt, used, norm, clipped is not slopes)


def check_setting(name: str, value: float) -> float:
    """``value`` as a float when it is finite and not negative; ValueError naming ``name`` otherwise."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
        raise ValueError(f"{name} {value!r} must be a number, 0 or more")
    return float(value)


@dataclass(frozen=True)
class EpochPosition:
    """Where mini-batches stand in their epoch.

    Attributes:
        order: this epoch's order of the rows ``(n_rows,)``, or None before the first batch.
        cursor: how many rows of ``order`` are used.
        epoch: how many epochs have begun.
    """

    order: NDArray[np.int64] | None = None
    cursor: int = 0
    epoch: int = 0


def next_batch(rng: np.random.Generator, n_rows: int, size: int,
               at: EpochPosition) -> tuple[NDArray[np.int64], EpochPosition]:
    """The rows of the next mini-batch, sorted ``(k,)``, and the position after it.

    Epoch-wise sampling: each epoch draws an order of the ``n_rows`` rows from
    ``rng`` and takes batches of ``size`` from it in turn, so every row is used
    once per epoch; the last batch of an epoch takes the rows left, which may be
    fewer (common practice, e.g. Goodfellow, Bengio & Courville, *Deep
    Learning*, 2016, section 8.1.3). ``at`` is not changed; its order array is
    replaced, never written, when an epoch begins.
    """
    order, cursor, epoch = at.order, at.cursor, at.epoch
    if order is None or cursor >= n_rows:
        order = rng.permutation(n_rows).astype(np.int64)
        cursor, epoch = 0, epoch + 1
    pick = np.sort(order[cursor : cursor + size])
    return pick, EpochPosition(order, cursor + int(pick.size), epoch)
