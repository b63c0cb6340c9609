"""The cost history of a session: growable arrays that read like a list of entries.

A long run makes millions of entries; kept as Python objects they would cost
gigabytes and seconds to save or load. :class:`History` keeps them in numpy
arrays (:class:`stepper.formats.saved_state.CostHistory` columns) that grow by
doubling, and still reads as a sequence of :class:`HistoryEntry` for code that
wants one entry at a time. ``generation`` changes whenever entries are cut or
replaced, so a reader that copied the first ``k`` entries knows whether they
still hold.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Iterable, Iterator, overload

import numpy as np
from numpy.typing import NDArray

from stepper.core.optimizers import RULES
from stepper.formats.saved_state import CostHistory

_RULE_CODE = {name: code for code, name in enumerate(RULES)}


@dataclass(frozen=True)
class HistoryEntry:
    """The cost after one step (entry 0: before any step).

    ``train_metric`` and ``val_metric`` are the task's main figure (accuracy, or
    R^2 for regression; :func:`stepper.core.metrics.main_figure`) while the
    session tracks metrics (``SessionCore.track_metrics``), else None. They are
    figures to show, not state: equality ignores them.
    """

    step: int
    train_cost: float
    val_cost: float | None
    rate: float
    rule: str
    train_metric: float | None = field(default=None, compare=False)
    val_metric: float | None = field(default=None, compare=False)


class History:
    """Entries of the cost history in arrays; see the module docstring."""

    def __init__(self, entries: Iterable[HistoryEntry] = ()) -> None:
        self._n = 0
        self._steps = np.zeros(16, dtype=np.int64)
        self._train = np.zeros(16)
        self._val = np.zeros(16)
        self._rates = np.zeros(16)
        self._rules = np.zeros(16, dtype=np.uint8)
        self._train_metric = np.full(16, np.nan)
        self._val_metric = np.full(16, np.nan)
        self.generation = 0
        self.extend(list(entries))

    # -- reading ---------------------------------------------------------------------------

    def __len__(self) -> int:
        return self._n

    def _entry(self, i: int) -> HistoryEntry:
        val = float(self._val[i])
        train_metric, val_metric = float(self._train_metric[i]), float(self._val_metric[i])
        return HistoryEntry(int(self._steps[i]), float(self._train[i]), None if val != val else val,
                            float(self._rates[i]), RULES[int(self._rules[i])],
                            None if train_metric != train_metric else train_metric,
                            None if val_metric != val_metric else val_metric)

    @overload
    def __getitem__(self, index: int) -> HistoryEntry: ...

    @overload
    def __getitem__(self, index: slice) -> list[HistoryEntry]: ...

    def __getitem__(self, index: int | slice) -> HistoryEntry | list[HistoryEntry]:
        if isinstance(index, slice):
            return [self._entry(i) for i in range(*index.indices(self._n))]
        i = index + self._n if index < 0 else index
        if not 0 <= i < self._n:
            raise IndexError(index)
        return self._entry(i)

    def __iter__(self) -> Iterator[HistoryEntry]:
        return (self._entry(i) for i in range(self._n))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, History):
            other = list(other)
        if isinstance(other, list):
            return list(self) == other
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def columns(self, start: int = 0) -> CostHistory:
        """Views of entries ``start:`` as arrays (valid until the next change)."""
        n = self._n
        return CostHistory(self._steps[start:n], self._train[start:n], self._val[start:n],
                           self._rates[start:n], self._rules[start:n], self._train_metric[start:n],
                           self._val_metric[start:n])

    def segment(self, start: int) -> CostHistory:
        """Copies of entries ``start:`` (for the undo stack)."""
        view = self.columns(start)
        return CostHistory(view.steps.copy(), view.train.copy(), view.val.copy(), view.rates.copy(),
                           view.rules.copy(), view.metric_column("train").copy(), view.metric_column("val").copy())

    # -- changing --------------------------------------------------------------------------

    def _reserve(self, n: int) -> None:
        if n <= self._steps.size:
            return
        size = max(n, 2 * self._steps.size)
        for name in ("_steps", "_train", "_val", "_rates", "_rules", "_train_metric", "_val_metric"):
            old = getattr(self, name)
            new = np.full(size, np.nan) if name.endswith("_metric") else np.zeros(size, dtype=old.dtype)
            new[: self._n] = old[: self._n]
            setattr(self, name, new)

    def append(self, entry: HistoryEntry) -> None:
        self._reserve(self._n + 1)
        i = self._n
        self._steps[i] = entry.step
        self._train[i] = entry.train_cost
        self._val[i] = np.nan if entry.val_cost is None else entry.val_cost
        self._rates[i] = entry.rate
        self._rules[i] = _RULE_CODE[entry.rule]
        self._train_metric[i] = np.nan if entry.train_metric is None else entry.train_metric
        self._val_metric[i] = np.nan if entry.val_metric is None else entry.val_metric
        self._n += 1

    def extend(self, entries: CostHistory | list[HistoryEntry]) -> None:
        if isinstance(entries, list):
            for entry in entries:
                self.append(entry)
            return
        k = len(entries)
        self._reserve(self._n + k)
        end = self._n + k
        self._steps[self._n : end] = entries.steps
        self._train[self._n : end] = entries.train
        self._val[self._n : end] = entries.val
        self._rates[self._n : end] = entries.rates
        self._rules[self._n : end] = entries.rules
        self._train_metric[self._n : end] = entries.metric_column("train")
        self._val_metric[self._n : end] = entries.metric_column("val")
        self._n = end

    def truncate(self, start: int) -> None:
        """Drop entries ``start:``."""
        if start < self._n:
            self._n = max(0, start)
            self.generation += 1

    def replace(self, entries: CostHistory | list[HistoryEntry]) -> None:
        """All entries replaced by ``entries``."""
        self._n = 0
        self.generation += 1
        self.extend(entries)


def nbytes(value: Any) -> int:
    """Bytes of a history segment kept on the undo stack."""
    if isinstance(value, CostHistory):
        return sum(int(a.nbytes) for a in (value.steps, value.train, value.val, value.rates, value.rules)) + sum(
            int(a.nbytes) for a in (value.train_metric, value.val_metric) if a is not None)
    return 64 * len(value) if isinstance(value, list) else 64


def codes(rules: NDArray[np.uint8]) -> list[str]:
    return [RULES[int(c)] for c in rules]
