"""The runaway rule: when a job of N steps stops because its cost is running away while still finite.

A step whose cost or weights would be non-finite is refused outright (see
:mod:`.stepping`). Long before that, a rate that is too large shows as a cost
that grows; a job of N steps (the app's run job, ``stepper run``) watches the
training cost after every step and stops, keeping the steps made, when either

- **growth**: the cost exceeds ``growth`` times its value when the job started
  (default 1000; a start cost below ``COST_FLOOR`` counts as ``COST_FLOOR``, so a
  perfect fit does not stop at the first rounding-sized rise), or
- **rises**: the cost rose on each of the last ``rises`` steps in a row
  (default 30) and is now above its value when the job started, which catches
  a slow divergence before it grows 1000-fold. (Near a minimum, mini-batch
  steps make the cost wobble up and down; the second condition keeps that
  from ever counting.)

Both counts start afresh with every job. ``None`` turns a part off; the rule
:data:`RUN_ON` turns both off, so only a non-finite step stops a job. The
defaults are our own choice, no published source: a healthy descent does not
multiply its cost by 1000, and on the bundled scenarios at their suggested
rates (gd and momentum, adam at 0.01; full batch and batches of 16; 500 steps
each) the cost rose at most 19 steps in a row and never above 1.3 x its start.
"""

from __future__ import annotations

from dataclasses import dataclass

#: Default growth factor and run of rises.
GROWTH = 1e3
RISES = 30
#: Smallest start cost the growth rule compares with.
COST_FLOOR = 1e-12


@dataclass(frozen=True)
class RunawayRule:
    """When a job of steps stops; see the module docstring.

    Attributes:
        growth: stop once the cost exceeds ``growth`` x the job's start cost (> 1), or None.
        rises: stop once the cost rose on this many steps in a row (>= 1), or None.
    """

    growth: float | None = GROWTH
    rises: int | None = RISES

    def __post_init__(self) -> None:
        if self.growth is not None and not self.growth > 1.0:
            raise ValueError(f"growth {self.growth!r} must be a number above 1")
        if self.rises is not None and not self.rises >= 1:
            raise ValueError(f"rises {self.rises!r} must be at least 1")

    def describe(self) -> str:
        """``cost above 1000 x its start, or 30 rises in a row``: the rule in words."""
        parts = []
        if self.growth is not None:
            parts.append(f"cost above {self.growth:g} x its start")
        if self.rises is not None:
            parts.append(f"{self.rises} rises in a row above its start")
        return ", or ".join(parts) if parts else "off"

    def watch(self, start_cost: float) -> RunawayWatch:
        """A watcher for one job that starts at ``start_cost``."""
        return RunawayWatch(self, start_cost)


#: No runaway rule: only a non-finite step stops a job.
RUN_ON = RunawayRule(growth=None, rises=None)


class RunawayWatch:
    """Follows one job's costs; :meth:`after` says why it must stop, or None."""

    def __init__(self, rule: RunawayRule, start_cost: float) -> None:
        self.rule = rule
        self.start = start_cost
        self.limit = None if rule.growth is None else rule.growth * max(start_cost, COST_FLOOR)
        self.previous = start_cost
        self.rising = 0

    def after(self, cost: float) -> str | None:
        """Take the cost after one more step; a clause saying what ran away, or None to go on."""
        self.rising = self.rising + 1 if cost > self.previous else 0
        self.previous = cost
        if self.limit is not None and cost > self.limit:
            return (f"the cost grew past {self.rule.growth:g} x its value at the start "
                    f"({self.start:.4g} -> {cost:.4g})")
        if self.rule.rises is not None and self.rising >= self.rule.rises and cost > self.start:
            return (f"the cost rose on each of the last {self.rising} steps, past its value at the start "
                    f"({self.start:.4g} -> {cost:.4g})")
        return None
