"""Rate schedules: the factor that multiplies the rate at each step.

The rate used by step ``t`` (counting steps made so far from 0) is
``rate * factor(t)``. Kinds, with their settings:

- ``constant``: ``factor(t) = 1``.
- ``step`` (``every`` = s, ``factor`` = g): ``g ** floor(t / s)``, the rate
  multiplied by g every s steps (the "staircase" form of exponential decay;
  written this way in the TensorFlow documentation of ``ExponentialDecay`` with
  ``staircase=True``).
- ``exponential`` (``every`` = s, ``factor`` = g): ``g ** (t / s)``, the same
  decay made smooth (TensorFlow's ``ExponentialDecay``, ``decayed = rate *
  decay_rate ^ (step / decay_steps)``).
- ``cosine`` (``steps`` = T, ``floor`` = f, ``warmup`` = w, ``restart``):
  after ``w`` warm-up steps, ``f + (1 - f) * (1 + cos(pi * t_cur / T)) / 2`` with
  ``t_cur = t - w``: Loshchilov & Hutter 2017, "SGDR: Stochastic Gradient
  Descent with Warm Restarts", eq. 5, with ``eta_max`` the rate and
  ``eta_min = f * rate``. Past ``T`` the factor stays at ``f``; with
  ``restart`` it starts over every ``T`` steps (SGDR with ``T_mult = 1``).
  During warm-up the factor rises linearly, ``(t + 1) / w``, reaching 1 at
  step ``w`` (gradual warm-up: Goyal et al. 2017, "Accurate, Large Minibatch
  SGD: Training ImageNet in 1 Hour", section 2.2).

A schedule is written as text in the app and on the command line,
``cosine:steps=1000,warmup=50,floor=0.01``, ``step:every=100,factor=0.5``,
``exponential:every=200,factor=0.5`` or ``constant``, and as a table in a model
file with the same keys (``kind = "cosine"``, ``steps = 1000``, ...).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

KINDS = ("constant", "step", "exponential", "cosine")

#: Keys each kind takes; the first ones listed are required.
KEYS: dict[str, tuple[str, ...]] = {
    "constant": (),
    "step": ("every", "factor"),
    "exponential": ("every", "factor"),
    "cosine": ("steps", "warmup", "floor", "restart"),
}
REQUIRED: dict[str, tuple[str, ...]] = {
    "constant": (),
    "step": ("every", "factor"),
    "exponential": ("every", "factor"),
    "cosine": ("steps",),
}


class ScheduleError(ValueError):
    """A schedule that cannot be used; the message says which key and what is allowed."""


@dataclass(frozen=True)
class Schedule:
    """A rate schedule (see the module docstring for the formulas).

    Attributes:
        kind: one of :data:`KINDS`.
        every: steps between decays (``step``, ``exponential``).
        factor: the decay per ``every`` steps, in (0, 1] (``step``, ``exponential``).
        steps: length of the cosine's descent (``cosine``).
        warmup: linear warm-up steps before it (``cosine``; 0 for none).
        floor: the lowest factor, in [0, 1) (``cosine``).
        restart: start the cosine over every ``steps`` steps (``cosine``).
    """

    kind: str = "constant"
    every: int = 0
    factor: float = 1.0
    steps: int = 0
    warmup: int = 0
    floor: float = 0.0
    restart: bool = False

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ScheduleError(f"unknown schedule {self.kind!r} (expected one of: {', '.join(KINDS)})")
        if self.kind in ("step", "exponential"):
            if self.every < 1:
                raise ScheduleError(f"every = {self.every}: a {self.kind} schedule needs a whole number of steps, 1 or more")
            if not (math.isfinite(self.factor) and 0.0 < self.factor <= 1.0):
                raise ScheduleError(f"factor = {self.factor:g}: the decay factor must be in (0, 1]")
        if self.kind == "cosine":
            if self.steps < 1:
                raise ScheduleError(f"steps = {self.steps}: a cosine schedule needs a length of 1 step or more")
            if self.warmup < 0:
                raise ScheduleError(f"warmup = {self.warmup}: the warm-up cannot be negative")
            if not (math.isfinite(self.floor) and 0.0 <= self.floor < 1.0):
                raise ScheduleError(f"floor = {self.floor:g}: the floor must be in [0, 1)")

    def factor_at(self, t: int) -> float:
        """The factor multiplying the rate for step ``t`` (0 for the first step)."""
        t = max(int(t), 0)
        if self.kind == "step":
            return float(self.factor ** (t // self.every))
        if self.kind == "exponential":
            return float(self.factor ** (t / self.every))
        if self.kind == "cosine":
            if t < self.warmup:
                return (t + 1) / self.warmup
            cur = t - self.warmup
            if self.restart:
                cur %= self.steps
            elif cur >= self.steps:
                return self.floor
            return self.floor + (1.0 - self.floor) * 0.5 * (1.0 + math.cos(math.pi * cur / self.steps))
        return 1.0

    def text(self) -> str:
        """The schedule as :func:`parse_schedule` reads it."""
        if self.kind == "constant":
            return "constant"
        if self.kind in ("step", "exponential"):
            return f"{self.kind}:every={self.every},factor={self.factor:g}"
        parts = [f"steps={self.steps}"]
        if self.warmup:
            parts.append(f"warmup={self.warmup}")
        if self.floor:
            parts.append(f"floor={self.floor:g}")
        if self.restart:
            parts.append("restart=yes")
        return "cosine:" + ",".join(parts)

    def as_dict(self) -> dict[str, Any]:
        """The schedule as a JSON object (journals, checkpoints): ``kind`` and its own keys."""
        out: dict[str, Any] = {"kind": self.kind}
        for key in KEYS[self.kind]:
            out[key] = getattr(self, key)
        return out


CONSTANT = Schedule()


def from_dict(doc: Any) -> Schedule:
    """A schedule from a JSON object or TOML table (``kind`` and its keys); ScheduleError if wrong."""
    if not isinstance(doc, dict):
        raise ScheduleError("a schedule must be a table with a 'kind'")
    kind = doc.get("kind", "constant")
    if not isinstance(kind, str) or kind not in KINDS:
        raise ScheduleError(f"unknown schedule {kind!r} (expected one of: {', '.join(KINDS)})")
    values: dict[str, Any] = {}
    for key, value in doc.items():
        if key == "kind":
            continue
        if key not in KEYS[kind]:
            allowed = ", ".join(KEYS[kind]) or "none"
            raise ScheduleError(f"{key}: a {kind} schedule takes no such key (its keys: {allowed})")
        values[key] = _typed(key, value)
    missing = [key for key in REQUIRED[kind] if key not in values]
    if missing:
        raise ScheduleError(f"a {kind} schedule needs {', '.join(missing)}")
    return Schedule(kind, **values)


def _typed(key: str, value: Any) -> Any:
    if key == "restart":
        if not isinstance(value, bool):
            raise ScheduleError(f"{key}: expected true or false")
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ScheduleError(f"{key}: expected a number, got {value!r}")
    if key in ("every", "steps", "warmup"):
        if isinstance(value, float) and not value.is_integer():
            raise ScheduleError(f"{key}: expected a whole number of steps, got {value!r}")
        if abs(value) > 10**12:
            raise ScheduleError(f"{key}: {value} steps is more than Stepper counts")
        return int(value)
    return float(value)


def parse_schedule(text: str) -> Schedule:
    """A schedule from text: ``KIND`` or ``KIND:key=value,key=value`` (see the module docstring)."""
    kind, _, rest = text.strip().partition(":")
    doc: dict[str, Any] = {"kind": kind.strip().lower()}
    for part in filter(None, (p.strip() for p in rest.split(","))):
        key, eq, value = part.partition("=")
        key = key.strip().lower()
        if not eq:
            raise ScheduleError(f"{part!r}: expected key=value")
        doc[key] = _value(value.strip())
    return from_dict(doc)


def _value(text: str) -> Any:
    lowered = text.lower()
    if lowered in ("yes", "true", "on"):
        return True
    if lowered in ("no", "false", "off"):
        return False
    try:
        number = float(text)
    except ValueError:
        raise ScheduleError(f"{text!r} is not a number") from None
    if not math.isfinite(number):
        raise ScheduleError(f"{text!r} is not a finite number")
    return int(number) if number.is_integer() and "." not in text and "e" not in lowered else number
