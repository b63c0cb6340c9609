"""Keys of the training settings (k): the L2 term, weight decay, clipping by slope norm, the rate schedule.

``k`` offers the four settings with their current values; the one chosen is
typed in a dialog and set through the session (undoable and journaled, like
every operation).
"""

from __future__ import annotations

from typing import Callable

from stepper.core.schedules import Schedule, ScheduleError, parse_schedule
from stepper.errors import UsageError
from stepper.ui.base import AppBase, parse_float
from stepper.ui.dialogs import ChoiceScreen

#: Each setting: its dialog's prompt.
PROMPTS = {
    "l2": "Strength L of the L2 term (L/2) x sum of squared weights in the cost; 0 turns it off:",
    "decay": "Decoupled weight decay D: each step takes factor x D x w off every weight (AdamW with adam); "
             "0 turns it off:",
    "clip": "Clip the slopes to this global norm before each step; empty or off turns clipping off:",
    "schedule": "Rate schedule: constant | step:every=N,factor=F | exponential:every=N,factor=F | "
                "cosine:steps=N[,warmup=W][,floor=F][,restart=yes]:",
}


class SettingsKeys(AppBase):
    """One key for the four training settings."""

    def action_training_settings(self) -> None:
        if self.busy():
            return
        s = self.session
        choices = [
            ("l2", f"L2 term in the cost (now {s.l2:g})"),
            ("decay", f"decoupled weight decay (now {s.weight_decay:g})"),
            ("clip", f"clip slopes by global norm (now {'off' if s.clip_norm is None else f'{s.clip_norm:g}'})"),
            ("schedule", f"rate schedule (now {s.schedule.text()})"),
        ]
        self.push_screen(ChoiceScreen("Training settings", choices, ""), self._setting_chosen)

    def _setting_chosen(self, name: str | None) -> None:
        if name is None:
            return
        s = self.session
        current = {"l2": f"{s.l2:g}", "decay": f"{s.weight_decay:g}",
                   "clip": "off" if s.clip_norm is None else f"{s.clip_norm:g}", "schedule": s.schedule.text()}
        setters: dict[str, Callable[[str], None]] = {
            "l2": lambda text: s.set_l2(_not_negative(text, "L2 strength")),
            "decay": lambda text: s.set_weight_decay(_not_negative(text, "weight decay")),
            "clip": lambda text: s.set_clip_norm(None if text.strip().lower() in ("", "off", "none")
                                                 else parse_float(text, "clipping norm")),
            "schedule": lambda text: s.set_schedule(_schedule(text)),
        }
        self.ask("Training settings", PROMPTS[name], current[name],
                 lambda text: self.apply(lambda: setters[name](text)))


def _not_negative(text: str, what: str) -> float:
    value = parse_float(text, what)
    if value < 0:
        raise UsageError(f"{what}: {value:g} must be 0 or more")
    return value


def _schedule(text: str) -> Schedule:
    try:
        return parse_schedule(text)
    except ScheduleError as exc:
        raise UsageError(f"schedule: {exc}") from None
