"""Type and range checks for values read from files (checkpoint metadata, journal lines).

JSON gives Python values of any type: a step count may arrive as a string, a
float, ``true`` or a number too large for any use. Each check here returns the
value in the type the caller needs, or raises ``error`` with a message that
names where the value came from (``where``) and what is allowed.
"""

from __future__ import annotations

import math
from typing import Any, Callable, Iterable, NoReturn

#: Largest whole number read where a count is meant (steps, seeds' upper end, ...).
MAX_WHOLE = 2**63 - 1

Error = Callable[[str], Exception]


def _fail(error: Error, where: str, message: str) -> NoReturn:
    raise error(f"{where}: {message}")


def whole(value: Any, error: Error, where: str, low: int = 0, high: int = MAX_WHOLE) -> int:
    """An integer (not a boolean, not a float) in ``[low, high]``."""
    if isinstance(value, bool) or not isinstance(value, int):
        _fail(error, where, f"expected a whole number, got {_shown(value)}")
    if not low <= value <= high:
        _fail(error, where, f"{value} is outside [{low}, {high}]")
    return int(value)


def number(value: Any, error: Error, where: str, positive: bool = False) -> float:
    """A finite number (an integer is accepted), positive when asked."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        _fail(error, where, f"expected a number, got {_shown(value)}")
    result = float(value)
    if not math.isfinite(result):
        _fail(error, where, f"{value!r} is not a finite number")
    if positive and result <= 0:
        _fail(error, where, f"{value!r} must be a positive number")
    return result


def choice(value: Any, allowed: Iterable[str], error: Error, where: str) -> str:
    """One of ``allowed``."""
    options = tuple(allowed)
    if not isinstance(value, str) or value not in options:
        _fail(error, where, f"{_shown(value)} is not one of: {', '.join(options)}")
    return value


def text(value: Any, error: Error, where: str, max_length: int = 4096) -> str:
    """A string of at most ``max_length`` characters."""
    if not isinstance(value, str):
        _fail(error, where, f"expected a string, got {_shown(value)}")
    if len(value) > max_length:
        _fail(error, where, f"a string of {len(value)} characters is longer than {max_length}")
    return value


def names(value: Any, error: Error, where: str) -> list[str]:
    """A list of strings."""
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        _fail(error, where, f"expected a list of names, got {_shown(value)}")
    return list(value)


def table(value: Any, error: Error, where: str) -> dict[str, Any]:
    """A JSON object."""
    if not isinstance(value, dict):
        _fail(error, where, f"expected a JSON object, got {_shown(value)}")
    return value


def _shown(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return repr(value if len(value) <= 40 else value[:40] + "...")
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "an object"
    return type(value).__name__
