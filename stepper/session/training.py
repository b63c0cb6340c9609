"""Settings of how training goes besides rate and rule: the L2 term, decoupled decay, clipping, the schedule.

Each is an undoable, journaled operation. The L2 term changes the cost itself,
so setting it adds a point to the cost history (like a manual change of
values); the others change only how the next steps are made.
"""

from __future__ import annotations

import math
from typing import Any

from stepper.core.descent import check_setting
from stepper.core.schedules import Schedule, ScheduleError, from_dict
from stepper.errors import UsageError
from stepper.session.edits import Edits


class Training(Edits):
    """The L2 term, decoupled weight decay, clipping by global slope norm, the rate schedule."""

    def scheduled_rate(self) -> float:
        """The rate the next step will use: the rate times the schedule's factor."""
        return self.rate * self.schedule.factor_at(self.step_count)

    def penalty(self) -> float:
        """The L2 term's part of the training cost."""
        return self.net.penalty(self.theta)

    def set_l2(self, l2: float) -> None:
        """Strength of the L2 term ``(l2 / 2) * sum(w^2)`` over the weights (0 turns it off)."""
        value = _setting("L2 strength", l2)
        before_cost = self.train_cost()
        name = f"L2 {self.l2:g} -> {value:g}"
        self._manual_change(name, {"l2": self.l2}, {"l2": value}, {"op": "set_l2", "l2": value})
        self.last_action = f"{name}: cost {before_cost:.6g} -> {self.train_cost():.6g}"

    def set_weight_decay(self, decay: float) -> None:
        """Decoupled weight decay per step (AdamW with the adam rule); 0 turns it off."""
        value = _setting("weight decay", decay)
        self._setting(f"weight decay {self.weight_decay:g} -> {value:g}", "weight_decay", value,
                      {"op": "set_weight_decay", "decay": value})

    def set_clip_norm(self, norm: float | None) -> None:
        """Clip the slopes to this global norm before each update; None turns clipping off."""
        if norm is not None:
            if not (isinstance(norm, (int, float)) and math.isfinite(norm) and norm > 0):
                shown = f"{norm:g}" if isinstance(norm, (int, float)) else repr(norm)
                raise UsageError(f"clipping norm {shown} must be a positive number (or none)")
            norm = float(norm)
        label = "no clipping" if norm is None else f"clip slopes to norm {norm:g}"
        self._setting(label, "clip_norm", norm, {"op": "set_clip_norm", "norm": norm})

    def set_schedule(self, schedule: Schedule) -> None:
        """The rate schedule; its factor follows the step count."""
        self._setting(f"schedule {schedule.text()}", "schedule", schedule,
                      {"op": "set_schedule", "schedule": schedule.as_dict()})

    def apply_training(self, op: str, entry: dict[str, Any]) -> bool:
        """Carry out a journal entry of this module; False when ``op`` is not one of them."""
        if op == "set_l2":
            self.set_l2(float(entry["l2"]))
        elif op == "set_weight_decay":
            self.set_weight_decay(float(entry["decay"]))
        elif op == "set_clip_norm":
            self.set_clip_norm(None if entry["norm"] is None else float(entry["norm"]))
        elif op == "set_schedule":
            try:
                self.set_schedule(from_dict(entry["schedule"]))
            except ScheduleError as exc:
                raise ValueError(str(exc)) from None
        else:
            return False
        return True

    def schedule_words(self) -> str:
        """The rate and schedule in a few words: ``0.1``, or ``0.1 x 0.62 (cosine:steps=1000)``."""
        if self.schedule.kind == "constant":
            return f"{self.rate:g}"
        return f"{self.rate:g} x {self.schedule.factor_at(self.step_count):.3g} ({self.schedule.text()})"


def _setting(name: str, value: float) -> float:
    try:
        return check_setting(name, value)
    except ValueError as exc:
        raise UsageError(str(exc)) from None
