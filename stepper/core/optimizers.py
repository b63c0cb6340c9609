"""Update rules: plain gradient descent, momentum and Adam.

Computing an update is separate from applying it: :func:`compute_update`
returns the change to the parameters and the rule's next state, and never
touches its inputs. All arrays have shape ``(n_params,)``.

- ``gd``: ``delta = -rate * g`` (Cauchy's steepest descent; e.g. Goodfellow,
  Bengio & Courville, *Deep Learning*, 2016, algorithm 8.1).
- ``momentum``: ``v <- mu * v - rate * g``, ``delta = v`` (Polyak 1964, "Some
  methods of speeding up the convergence of iteration methods"; written this way
  in Sutskever, Martens, Dahl & Hinton 2013, eq. 1). ``mu = 0.9`` by default
  (common practice).
- ``adam``: Kingma & Ba 2015, "Adam: A Method for Stochastic Optimization",
  algorithm 1: ``m <- b1 m + (1 - b1) g``, ``v <- b2 v + (1 - b2) g^2``,
  ``m^ = m / (1 - b1^t)``, ``v^ = v / (1 - b2^t)``,
  ``delta = -rate * m^ / (sqrt(v^) + eps)``, with the paper's defaults
  ``b1 = 0.9``, ``b2 = 0.999``, ``eps = 1e-8``. The ``t`` of the bias
  correction is each parameter's own count of updates (array ``count``), so a
  parameter that was frozen for a while and then let go starts the algorithm
  from its first step, as it would alone; while nothing is frozen every count
  equals the rule's step count and this is algorithm 1 exactly.

A mask of frozen parameters keeps their values and their rule state (including
Adam's counts) unchanged.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

RULES = ("gd", "momentum", "adam")

MOMENTUM = 0.9
ADAM_BETA1 = 0.9
ADAM_BETA2 = 0.999
ADAM_EPS = 1e-8


@dataclass
class RuleState:
    """The memory of an update rule.

    Attributes:
        rule: one of :data:`RULES`.
        arrays: named arrays of shape ``(n_params,)`` (``velocity`` for momentum;
            ``m``, ``v`` and the per-parameter update ``count`` for Adam; none
            for gd).
        t: number of updates made with this rule (Adam's bias correction uses it).
    """

    rule: str
    arrays: dict[str, Array] = field(default_factory=dict)
    t: int = 0

    def copy(self) -> "RuleState":
        return RuleState(self.rule, {k: v.copy() for k, v in self.arrays.items()}, self.t)

    def equals(self, other: "RuleState") -> bool:
        return (
            self.rule == other.rule
            and self.t == other.t
            and self.arrays.keys() == other.arrays.keys()
            and all(np.array_equal(self.arrays[k], other.arrays[k]) for k in self.arrays)
        )


def fresh_state(rule: str, n_params: int) -> RuleState:
    """A rule's state before its first update."""
    if rule == "gd":
        return RuleState(rule)
    if rule == "momentum":
        return RuleState(rule, {"velocity": np.zeros(n_params)})
    if rule == "adam":
        return RuleState(rule, {"m": np.zeros(n_params), "v": np.zeros(n_params), "count": np.zeros(n_params)})
    raise KeyError(rule)


def compute_update(
    state: RuleState, slopes: Array, rate: float, frozen: NDArray[np.bool_] | None = None
) -> tuple[Array, RuleState]:
    """The change to apply to the parameters, and the rule's next state.

    Args:
        state: the rule and its memory (not modified).
        slopes: slope of the cost w.r.t. each parameter, ``(n_params,)``.
        rate: learning rate.
        frozen: True for parameters that must not move, ``(n_params,)``.
    """
    moving = np.ones(slopes.shape, dtype=bool) if frozen is None else ~frozen
    nxt = state.copy()
    nxt.t = state.t + 1
    if state.rule == "gd":
        delta = -rate * slopes
    elif state.rule == "momentum":
        velocity = MOMENTUM * state.arrays["velocity"] - rate * slopes
        nxt.arrays["velocity"] = np.where(moving, velocity, state.arrays["velocity"])
        delta = velocity
    elif state.rule == "adam":
        m = ADAM_BETA1 * state.arrays["m"] + (1.0 - ADAM_BETA1) * slopes
        v = ADAM_BETA2 * state.arrays["v"] + (1.0 - ADAM_BETA2) * slopes * slopes
        count = state.arrays["count"] + 1.0
        t: Array | float = count
        moving_counts = count if frozen is None else count[moving]
        if moving_counts.size and moving_counts.min() == moving_counts.max():
            t = float(moving_counts[0])  # the usual case: one count for all, so one power, not n
        m_hat = m / (1.0 - ADAM_BETA1**t)
        v_hat = v / (1.0 - ADAM_BETA2**t)
        delta = -rate * m_hat / (np.sqrt(v_hat) + ADAM_EPS)
        nxt.arrays["m"] = np.where(moving, m, state.arrays["m"])
        nxt.arrays["v"] = np.where(moving, v, state.arrays["v"])
        nxt.arrays["count"] = np.where(moving, count, state.arrays["count"])
    else:
        raise KeyError(state.rule)
    return np.where(moving, delta, 0.0), nxt
