"""Checked access to the tables of a TOML model file.

:class:`Keys` reads one table: it refuses unknown keys, checks each value's
type, and raises :class:`ModelFileError` with one line naming the file, the
key path and, inside ``layers[i]``, the layer as weight names count it
(``L{i+1}``).
"""

from __future__ import annotations

import datetime
import re
from typing import Any

from stepper.errors import ModelFileError

_LAYER_PATH = re.compile(r"^layers\[(\d+)\]")


def layer_label(path: str) -> str | None:
    """``"L2"`` for a key path inside ``layers[1]`` (TOML counts from 0, weight names from 1), else None."""
    match = _LAYER_PATH.match(path)
    return f"L{int(match[1]) + 1}" if match else None


class Keys:
    """Typed access to one TOML table, with errors that name the file and key path."""

    def __init__(self, file: str, where: str, table: Any, allowed: set[str]) -> None:
        self.file = file
        self.where = where
        if not isinstance(table, dict):
            self.fail("", f"expected a table, got {_kind(table)}")
        self.table: dict[str, Any] = table
        for key in table:
            if key not in allowed:
                self.fail(key, f"unknown key (allowed: {', '.join(sorted(allowed))})")

    def path(self, key: str) -> str:
        if not key:
            return self.where
        return f"{self.where}.{key}" if self.where else key

    def fail(self, key: str, message: str) -> None:
        where = self.path(key)
        label = layer_label(where)
        if label:
            where += f" ({label})"
        raise ModelFileError(f"{self.file}: {where}: {message}" if where else f"{self.file}: {message}")

    def has(self, key: str) -> bool:
        return key in self.table

    def get(self, key: str, kind: type, default: Any = ...) -> Any:
        if key not in self.table:
            if default is ...:
                self.fail(key, "missing")
            return default
        value = self.table[key]
        if kind is float and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if kind is int and isinstance(value, bool):
            self.fail(key, f"expected an integer, got {_kind(value)}")
        if not isinstance(value, kind):
            self.fail(key, f"expected {_noun(kind)}, got {_kind(value)}")
        return value

    def names(self, key: str) -> list[str]:
        value = self.get(key, list)
        if not value or not all(isinstance(v, str) for v in value):
            self.fail(key, "expected a non-empty list of column names")
        twice = sorted({v for v in value if value.count(v) > 1})
        if twice:
            self.fail(key, f"column(s) {', '.join(repr(v) for v in twice)} named more than once")
        return list(value)

    def seed(self, key: str) -> int:
        """A random seed: a whole number, 0 or more (numpy refuses negative seeds); default 0."""
        value: int = self.get(key, int, 0)
        if value < 0:
            self.fail(key, f"{value} is negative (a seed is a whole number, 0 or more)")
        return value

    def choice(self, key: str, allowed: dict[str, Any] | tuple[str, ...], default: Any = ...) -> str:
        value = self.get(key, str, default)
        if value not in allowed:
            self.fail(key, f"unknown {value!r} (expected one of: {', '.join(allowed)})")
        return str(value)


def _noun(kind: type) -> str:
    return {str: "a string", int: "an integer", float: "a number", bool: "true or false",
            list: "a list", dict: "a table"}.get(kind, kind.__name__)


def _kind(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return f"the string {value!r}"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, datetime.datetime):  # before date: a datetime is also a date
        return "a date-time"
    if isinstance(value, datetime.date):
        return "a date"
    if isinstance(value, datetime.time):
        return "a time of day"
    return type(value).__name__
