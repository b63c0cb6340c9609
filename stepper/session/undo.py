"""Undo levels within a memory budget scaled to the model.

A change records the fields it touched before and after (``stepper.session.core._Change``).
For the arrays of the size of the model (the weights, the update rule's memory,
a perturbation of every weight) two full copies per level would make undo the
largest user of memory at a million weights (16 MB a step). So when a change is
committed, each such pair is replaced by one array: the bitwise exclusive or
of the two sides' float64 bits. Applied to the state on one side it gives the
other, bit for bit, and undo and redo only ever apply a level to the state on
its other side (levels are taken back in order). One array per level, and the
two sides share it.

The budget (:func:`undo_budget`) is :data:`UNDO_COPIES` copies of the weights,
but at least :data:`UNDO_FLOOR` and at most :data:`UNDO_BYTES`: a small model
keeps hundreds of levels, a model of a million weights a handful. Past the
budget the oldest levels are dropped first; the last one is always kept.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.optimizers import RuleState
from stepper.formats.saved_state import CostHistory

Array = NDArray[np.float64]
Bits = NDArray[np.uint64]

#: Undo never keeps more than this many bytes of saved arrays.
UNDO_BYTES = 256 * 1024 * 1024
#: ... nor less than this (unless one level alone is larger).
UNDO_FLOOR = 32 * 1024 * 1024
#: Between the two, this many copies of the weights.
UNDO_COPIES = 8


def undo_budget(n_params: int) -> int:
    """Bytes of saved arrays the undo levels of a model of ``n_params`` weights may keep."""
    return int(min(UNDO_BYTES, max(UNDO_FLOOR, UNDO_COPIES * 8 * n_params)))


@dataclass(frozen=True)
class RuleBits:
    """One side of an update rule's memory as a difference: the rule, its step count, and the arrays' XOR."""

    rule: str
    t: int
    bits: dict[str, Bits]


def _xor(a: Array, b: Array) -> Bits:
    return np.bitwise_xor(np.ascontiguousarray(a).view(np.uint64), np.ascontiguousarray(b).view(np.uint64))


def flip(target: Array, bits: Bits) -> None:
    """``target`` (float64, in place) to the other side of a difference."""
    target.view(np.uint64)[...] ^= bits


def flipped(values: Array, bits: Bits) -> Array:
    """A new float64 array: ``values`` on the other side of a difference."""
    out: Array = np.bitwise_xor(values.view(np.uint64), bits).view(np.float64)
    return out


def compact(before: dict[str, Any], after: dict[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    """The two sides of a change with each pair of large arrays replaced by their shared XOR.

    ``theta`` becomes ``theta_bits``; ``theta_at`` (the same indices on both
    sides) becomes ``theta_at_bits``; a ``rule_state`` of the same rule and
    arrays on both sides becomes ``rule_bits``. Anything else is kept as it is.
    """
    before, after = dict(before), dict(after)
    theta_b, theta_a = before.get("theta"), after.get("theta")
    if isinstance(theta_b, np.ndarray) and isinstance(theta_a, np.ndarray) and theta_b.shape == theta_a.shape:
        bits = _xor(theta_b, theta_a)
        _swap(before, after, "theta", "theta_bits", bits, bits)
    at_b, at_a = before.get("theta_at"), after.get("theta_at")
    if (isinstance(at_b, tuple) and isinstance(at_a, tuple) and at_b[0] is at_a[0]
            and at_b[1].shape == at_a[1].shape):
        shared = (at_b[0], _xor(at_b[1], at_a[1]))
        _swap(before, after, "theta_at", "theta_at_bits", shared, shared)
    rule_b, rule_a = before.get("rule_state"), after.get("rule_state")
    if (isinstance(rule_b, RuleState) and isinstance(rule_a, RuleState) and rule_b.rule == rule_a.rule
            and rule_b.arrays.keys() == rule_a.arrays.keys()
            and all(rule_b.arrays[k].shape == rule_a.arrays[k].shape for k in rule_b.arrays)):
        shared_bits = {k: _xor(rule_b.arrays[k], rule_a.arrays[k]) for k in rule_b.arrays}
        _swap(before, after, "rule_state", "rule_bits", RuleBits(rule_b.rule, rule_b.t, shared_bits),
              RuleBits(rule_a.rule, rule_a.t, shared_bits))
    return before, after


def _swap(before: dict[str, Any], after: dict[str, Any], old: str, new: str, value_b: Any, value_a: Any) -> None:
    """Replace key ``old`` by ``new`` on both sides, keeping each side's order of keys."""
    for side, value in ((before, value_b), (after, value_a)):
        items = [(new if key == old else key, value if key == old else item) for key, item in side.items()]
        side.clear()
        side.update(items)


def saved_bytes(*sides: dict[str, Any]) -> int:
    """Bytes of the arrays held by the given sides of changes, each array counted once."""
    seen: set[int] = set()
    total = 0

    def count(value: Any) -> None:
        nonlocal total
        if isinstance(value, np.ndarray):
            if id(value) not in seen:
                seen.add(id(value))
                total += int(value.nbytes)
        elif isinstance(value, RuleState):
            for array in value.arrays.values():
                count(array)
        elif isinstance(value, RuleBits):
            for bits in value.bits.values():
                count(bits)
        elif isinstance(value, CostHistory):
            for column in (value.steps, value.train, value.val, value.rates, value.rules):
                count(column)
        elif isinstance(value, (tuple, list)):
            for item in value:
                count(item)
        else:
            total += 64

    for side in sides:
        for value in side.values():
            count(value)
    return total
