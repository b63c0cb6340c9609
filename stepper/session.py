"""The session: the one owner of a model's changing state.

Everything that changes a model goes through a named method of
:class:`Session`: a step, a change of rate or rule, freezing, perturbing,
setting a value, resetting, loading a checkpoint. Each such operation

- records what it changed (only the fields it touched; a few indices and values
  where that is all that moved), so :meth:`Session.undo` and
  :meth:`Session.redo` can go back and forth many levels deep;
- is appended to the journal, when there is one, so ``stepper replay`` can
  rebuild the same state from the model file after a crash.

Long operations (many steps, numeric slopes of a large model) are generators
that yield ``(done, total)``; the caller (a Textual worker, the CLI's progress
bar) decides how to show and cancel them. The session knows nothing of threads.
"""

from __future__ import annotations

import fnmatch
import math
import os
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

import numpy as np
from numpy.typing import NDArray

from stepper.core.gradcheck import CheckResult, iter_check
from stepper.core.numeric import Progress, numeric_slopes, run_to_end
from stepper.core.optimizers import RULES, RuleState, compute_update, fresh_state
from stepper.errors import CheckpointError, DivergenceError, UsageError
from stepper.formats.checkpoint import CheckpointData, load_checkpoint, save_checkpoint
from stepper.formats.journal import JournalWriter
from stepper.formats.model_file import Setup

Array = NDArray[np.float64]

SLOPE_SOURCES = ("analytic", "numeric")

#: Undo history is trimmed (oldest first) beyond this many bytes of saved arrays,
#: always keeping at least MIN_UNDO levels.
UNDO_BYTES = 256 * 1024 * 1024
MIN_UNDO = 20


@dataclass(frozen=True)
class HistoryEntry:
    """The cost after one step (entry 0: before any step)."""

    step: int
    train_cost: float
    val_cost: float | None
    rate: float
    rule: str


@dataclass(frozen=True)
class StepReport:
    """What a run of steps did: cost before and after, and how many steps."""

    before: float
    after: float
    steps: int


@dataclass
class _Change:
    """One undoable operation: the touched fields before and after it."""

    name: str
    before: dict[str, Any]
    after: dict[str, Any]

    def nbytes(self) -> int:
        total = 0
        for side in (self.before, self.after):
            for value in side.values():
                total += _nbytes(value)
        return total


def _nbytes(value: Any) -> int:
    if isinstance(value, np.ndarray):
        return int(value.nbytes)
    if isinstance(value, RuleState):
        return sum(int(a.nbytes) for a in value.arrays.values())
    if isinstance(value, tuple):
        return sum(_nbytes(v) for v in value)
    return 64


class Session:
    """State of one debugging session over one model.

    Attributes (read them, never assign or mutate them from outside):
        setup: the loaded model file (network, initial values, data).
        theta: current parameters, ``(n_params,)``.
        frozen: True for parameters that never move, ``(n_params,)``.
        rule_state: the update rule and its memory.
        step_count: updates made so far.
        rate: learning rate.
        slope_source: ``"analytic"`` (backpropagation) or ``"numeric"``.
        batch_size: samples per update, or None for the full training set.
        history: cost after every step, entry 0 at the start.
        check: the last numeric comparison, or None.
        dirty: True when there are changes since the last save or load.
        last_action: a sentence describing the last operation and its effect.
    """

    def __init__(
        self,
        setup: Setup,
        journal: Path | None = None,
        rate: float = 0.1,
        rule: str = "gd",
        seed: int = 0,
    ) -> None:
        self.setup = setup
        self.net = setup.network
        n = self.net.n_params
        self.theta: Array = setup.theta0.copy()
        self.frozen: NDArray[np.bool_] = np.zeros(n, dtype=bool)
        if rule not in RULES:
            raise UsageError(f"unknown update rule {rule!r} (expected one of: {', '.join(RULES)})")
        self.rule_state = fresh_state(rule, n)
        self.step_count = 0
        self.rate = _check_rate(rate)
        self.slope_source = "analytic"
        self.batch_size: int | None = None
        self.seed = seed
        self.batch_rng = np.random.default_rng(seed)
        self.noise_rng = np.random.default_rng(seed + 1)
        self.check: CheckResult | None = None
        self.refresh_numeric_after_step = False
        self.dirty = False
        self.last_action: str | None = None
        self.last_checkpoint: Path | None = None
        self._undo: list[_Change] = []
        self._redo: list[_Change] = []
        self._version = 0
        self._check_version = -1
        self._cache: dict[str, tuple[int, Any]] = {}
        self.history: list[HistoryEntry] = [self._entry()]
        self.journal: JournalWriter | None = None
        if journal is not None:
            self.journal = JournalWriter(journal, setup.path, setup.digest,
                                         {"rate": self.rate, "rule": self.rule, "seed": self.seed})

    # -- read-only views -------------------------------------------------------------------

    @property
    def rule(self) -> str:
        return self.rule_state.rule

    @property
    def names(self) -> tuple[str, ...]:
        return self.net.layout.names

    @property
    def version(self) -> int:
        """Counter that changes whenever the parameters change."""
        return self._version

    @property
    def can_undo(self) -> bool:
        return bool(self._undo)

    @property
    def can_redo(self) -> bool:
        return bool(self._redo)

    @property
    def check_is_stale(self) -> bool:
        return self.check is None or self._check_version != self._version

    def _cached(self, key: str, compute: Callable[[], Any]) -> Any:
        hit = self._cache.get(key)
        if hit is not None and hit[0] == self._version:
            return hit[1]
        value = compute()
        self._cache[key] = (self._version, value)
        return value

    def train_cost(self) -> float:
        """Cost on the whole training set at the current parameters."""
        data = self.setup.data
        return float(self._cached("train", lambda: self.net.cost(self.theta, data.X, data.Y)))

    def val_cost(self) -> float | None:
        """Cost on the validation set, or None when there is none."""
        data = self.setup.data
        if data.n_val == 0:
            return None
        return float(self._cached("val", lambda: self.net.cost(self.theta, data.X_val, data.Y_val)))

    def analytic_slopes(self) -> Array:
        """Slopes by backpropagation on the whole training set, ``(n_params,)``."""
        data = self.setup.data

        def compute() -> Array:
            return self.net.cost_and_slopes(self.theta, data.X, data.Y)[1]

        result: Array = self._cached("slopes", compute)
        return result

    def iter_refresh_check(self) -> Progress[CheckResult]:
        """Numeric slopes of every parameter and their comparison; stored in :attr:`check`."""
        data = self.setup.data
        version = self._version
        theta = self.theta.copy()
        result = yield from iter_check(self.net, theta, data.X, data.Y)
        if version == self._version:
            self.check = result
            self._check_version = version
        return result

    def refresh_check(self) -> CheckResult:
        result = run_to_end(self.iter_refresh_check())
        assert result is not None
        return result

    def default_checkpoint_path(self) -> Path:
        """A checkpoint path next to the model file (or in the current folder if that is read-only)."""
        return self.session_folder() / f"step-{self.step_count:06d}.safetensors"

    def session_folder(self) -> Path:
        return session_folder_for(self.setup.path)

    def default_journal_path(self) -> Path:
        return default_journal_for(self.setup.path)

    # -- undo machinery --------------------------------------------------------------------

    def _snapshot(self, fields: Iterable[str]) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for name in fields:
            if name == "theta":
                out[name] = self.theta.copy()
            elif name == "frozen":
                out[name] = self.frozen.copy()
            elif name == "rule_state":
                out[name] = self.rule_state.copy()
            elif name == "batch_rng":
                out[name] = self.batch_rng.bit_generator.state
            elif name == "noise_rng":
                out[name] = self.noise_rng.bit_generator.state
            else:
                out[name] = getattr(self, name)
        return out

    def _restore(self, fields: dict[str, Any]) -> None:
        for name, value in fields.items():
            if name == "theta":
                self.theta[...] = value
                self._version += 1
            elif name == "theta_at":
                idx, values = value
                self.theta[idx] = values
                self._version += 1
            elif name == "frozen":
                self.frozen[...] = value
            elif name == "rule_state":
                self.rule_state = value.copy()
            elif name == "batch_rng":
                self.batch_rng.bit_generator.state = value
            elif name == "noise_rng":
                self.noise_rng.bit_generator.state = value
            elif name == "history":
                start, entries = value
                del self.history[start:]
                self.history.extend(entries)
            else:
                setattr(self, name, value)

    def _commit(self, change: _Change, journal: dict[str, Any] | None) -> None:
        self._undo.append(change)
        self._redo.clear()
        total = sum(c.nbytes() for c in self._undo)
        while len(self._undo) > MIN_UNDO and total > UNDO_BYTES:
            total -= self._undo.pop(0).nbytes()
        self.dirty = True
        self._log(journal)

    def _log(self, entry: dict[str, Any] | None) -> None:
        if self.journal is not None and entry is not None:
            self.journal.append(entry)

    def undo(self) -> str | None:
        """Take back the last operation; returns its name, or None if there is nothing to undo."""
        if not self._undo:
            self.last_action = "nothing to undo"
            return None
        change = self._undo.pop()
        self._restore(change.before)
        self._redo.append(change)
        self.dirty = True
        self.last_action = f"undid {change.name}"
        self._log({"op": "undo"})
        return change.name

    def redo(self) -> str | None:
        """Do again the last operation taken back; returns its name, or None."""
        if not self._redo:
            self.last_action = "nothing to redo"
            return None
        change = self._redo.pop()
        self._restore(change.after)
        self._undo.append(change)
        self.dirty = True
        self.last_action = f"redid {change.name}"
        self._log({"op": "redo"})
        return change.name

    def _setting(self, name: str, field: str, value: Any, journal: dict[str, Any]) -> None:
        before = self._snapshot([field])
        setattr(self, field, value)
        self._commit(_Change(name, before, {field: value}), journal)
        self.last_action = name

    # -- settings --------------------------------------------------------------------------

    def set_rate(self, rate: float) -> None:
        rate = _check_rate(rate)
        self._setting(f"rate {self.rate:g} -> {rate:g}", "rate", rate, {"op": "set_rate", "rate": rate})

    def set_rule(self, rule: str) -> None:
        """Switch the update rule; the new rule starts with fresh memory."""
        if rule not in RULES:
            raise UsageError(f"unknown update rule {rule!r} (expected one of: {', '.join(RULES)})")
        before = self._snapshot(["rule_state"])
        self.rule_state = fresh_state(rule, self.net.n_params)
        after = self._snapshot(["rule_state"])
        self._commit(_Change(f"rule {before['rule_state'].rule} -> {rule}", before, after),
                     {"op": "set_rule", "rule": rule})
        self.last_action = f"update rule {rule}"

    def set_slope_source(self, source: str) -> None:
        if source not in SLOPE_SOURCES:
            raise UsageError(f"unknown slope source {source!r} (expected one of: {', '.join(SLOPE_SOURCES)})")
        self._setting(f"slopes from {source}", "slope_source", source, {"op": "set_slope_source", "source": source})

    def set_batch_size(self, size: int | None) -> None:
        n = self.setup.data.n_train
        if size is not None and not 1 <= size <= n:
            raise UsageError(f"batch size {size} must be between 1 and the {n} training samples")
        if size == n:
            size = None
        label = "full batch" if size is None else f"mini-batches of {size}"
        self._setting(label, "batch_size", size, {"op": "set_batch_size", "size": size})

    # -- freezing --------------------------------------------------------------------------

    def _indices(self, indices: Iterable[int]) -> NDArray[np.int64]:
        idx = np.unique(np.fromiter((int(i) for i in indices), dtype=np.int64))
        if idx.size and (idx[0] < 0 or idx[-1] >= self.net.n_params):
            raise UsageError(f"no parameter number {int(idx[-1] if idx[-1] >= 0 else idx[0])}")
        return idx

    def _set_frozen(self, idx: NDArray[np.int64], value: NDArray[np.bool_] | bool, name: str,
                    journal: dict[str, Any]) -> None:
        before = self._snapshot(["frozen"])
        self.frozen[idx] = value
        self._commit(_Change(name, before, self._snapshot(["frozen"])), journal)
        self.last_action = name

    def _describe(self, idx: NDArray[np.int64]) -> str:
        if idx.size == 1:
            return self.names[int(idx[0])]
        return f"{idx.size} parameters"

    def freeze(self, indices: Iterable[int]) -> None:
        idx = self._indices(indices)
        self._set_frozen(idx, True, f"froze {self._describe(idx)}",
                         {"op": "freeze", "names": [self.names[i] for i in idx]})

    def unfreeze(self, indices: Iterable[int]) -> None:
        idx = self._indices(indices)
        self._set_frozen(idx, False, f"unfroze {self._describe(idx)}",
                         {"op": "unfreeze", "names": [self.names[i] for i in idx]})

    def toggle_freeze(self, indices: Iterable[int]) -> None:
        """Freeze the given parameters, or unfreeze them if they are all frozen already."""
        idx = self._indices(indices)
        if idx.size and bool(np.all(self.frozen[idx])):
            self.unfreeze(idx)
        else:
            self.freeze(idx)

    def layer_indices(self, layer: int) -> NDArray[np.int64]:
        """Flat indices of every parameter of layer ``layer`` (0-based)."""
        if not 0 <= layer < len(self.net.layers):
            raise UsageError(f"no layer {layer + 1} (the model has {len(self.net.layers)})")
        return np.flatnonzero(self.net.layout.layer_index == layer)

    def freeze_layer(self, layer: int) -> None:
        self.freeze(self.layer_indices(layer))

    def matching(self, pattern: str) -> NDArray[np.int64]:
        """Indices of parameters whose names match a shell-style pattern (``L1.*``, ``*.b[*]``).

        Brackets in names are matched literally, so ``L1.W[0,*]`` works as expected.
        """
        # fnmatch treats [...] as a character class; escape brackets so names match literally.
        escaped = "".join("[[]" if c == "[" else "[]]" if c == "]" else c for c in pattern)
        hits = [i for i, name in enumerate(self.names) if fnmatch.fnmatchcase(name, escaped)]
        if not hits:
            raise UsageError(f"no parameter name matches {pattern!r} (names look like {self.names[0]})")
        return np.array(hits, dtype=np.int64)

    def freeze_matching(self, pattern: str) -> None:
        self.freeze(self.matching(pattern))

    # -- changing values ---------------------------------------------------------------------

    def _set_values(self, idx: NDArray[np.int64], values: Array, name: str, journal: dict[str, Any]) -> None:
        before = {"theta_at": (idx, self.theta[idx].copy())}
        after = {"theta_at": (idx, values.copy())}
        self._manual_change(name, before, after, journal)

    def _manual_change(self, name: str, before: dict[str, Any], after: dict[str, Any],
                       journal: dict[str, Any]) -> None:
        """Apply ``after``, add the new cost to the history as a point of its own, and commit.

        If the new cost cannot be computed (a custom layer raising on the new
        values), ``before`` is put back and the error passes on: nothing changed.
        """
        start = len(self.history)
        self._restore(after)
        try:
            entry = self._entry()
        except BaseException:
            self._restore(before)
            raise
        self.history.append(entry)
        self._commit(_Change(name, {**before, "history": (start, [])}, {**after, "history": (start, [entry])}),
                     journal)

    def set_value(self, index: int, value: float) -> None:
        """Set one parameter to a typed value."""
        if not math.isfinite(value):
            raise UsageError(f"{value!r} is not a finite number")
        idx = self._indices([index])
        before = self.train_cost()
        self._set_values(idx, np.array([float(value)]), f"set {self.names[index]} = {value:g}",
                         {"op": "set_value", "name": self.names[index], "value": float(value)})
        self.last_action = f"set {self.names[index]} = {value:g}: cost {before:.6g} -> {self.train_cost():.6g}"

    def perturb(self, scale: float, indices: Iterable[int] | None = None, seed: int | None = None) -> None:
        """Add Gaussian noise ``N(0, scale^2)`` to the given parameters (all when None).

        Frozen parameters are left alone. The noise comes from ``seed`` when given,
        otherwise from the session's own seeded generator (recorded in the journal).
        """
        if not (math.isfinite(scale) and scale > 0):
            raise UsageError(f"noise scale {scale!r} must be a positive number")
        idx = np.arange(self.net.n_params) if indices is None else self._indices(indices)
        idx = idx[~self.frozen[idx]]
        if idx.size == 0:
            raise UsageError("every chosen parameter is frozen: nothing to perturb")
        if seed is None:
            seed = int(self.noise_rng.integers(0, 2**31 - 1))
        noise = np.random.default_rng(seed).normal(0.0, scale, idx.size)
        before = self.train_cost()
        what = self._describe(idx) if indices is not None else "all parameters"
        self._set_values(idx, self.theta[idx] + noise, f"perturbed {what} by {scale:g}",
                         {"op": "perturb", "scale": scale, "seed": seed,
                          "names": None if indices is None else [self.names[i] for i in idx]})
        self.last_action = f"perturbed {what} (noise {scale:g}): cost {before:.6g} -> {self.train_cost():.6g}"

    def reset(self) -> None:
        """All parameters back to their initial values; the rule's memory starts afresh."""
        before_cost = self.train_cost()
        before = self._snapshot(["theta", "rule_state"])
        after = {"theta": self.setup.theta0.copy(), "rule_state": fresh_state(self.rule, self.net.n_params)}
        self._manual_change("reset", before, after, {"op": "reset"})
        self.last_action = f"reset to initial values: cost {before_cost:.6g} -> {self.train_cost():.6g}"

    # -- stepping ------------------------------------------------------------------------------

    def _entry(self) -> HistoryEntry:
        return HistoryEntry(self.step_count, self.train_cost(), self.val_cost(), self.rate, self.rule)

    def _batch(self) -> tuple[Array, Array]:
        data = self.setup.data
        if self.batch_size is None:
            return data.X, data.Y
        pick = self.batch_rng.choice(data.n_train, size=self.batch_size, replace=False)
        pick.sort()
        return data.X[pick], data.Y[pick]

    def _slopes(self, X: Array, Y: Array) -> Array:
        if self.slope_source == "analytic":
            if X is self.setup.data.X:
                return self.analytic_slopes()
            return self.net.cost_and_slopes(self.theta, X, Y)[1]
        moving = np.flatnonzero(~self.frozen)
        slopes = numeric_slopes(self.net, self.theta, X, Y, which=moving).slopes
        return np.where(self.frozen, 0.0, slopes)

    def _one_step(self) -> None:
        """One update in place, or an error (DivergenceError, a custom layer's) with nothing changed."""
        # The draw of a refused step is taken back too, so the next step (and a
        # replay of the journal, which holds only the steps made) draws the same batch.
        rng_state = self.batch_rng.bit_generator.state
        try:
            theta, state, cost = self._next_update()
        except BaseException:
            self.batch_rng.bit_generator.state = rng_state
            raise
        self.theta[...] = theta
        self.rule_state = state
        self.step_count += 1
        self._version += 1
        self._cache["train"] = (self._version, float(cost))
        self.history.append(self._entry())

    def _next_update(self) -> tuple[Array, RuleState, float]:
        """The parameters, rule state and training cost after one update; nothing is changed.

        Raises DivergenceError when the update would make a weight or the cost non-finite.
        """
        X, Y = self._batch()
        data = self.setup.data
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            # Overflow is expected on the way to divergence; it is caught just below.
            slopes = self._slopes(X, Y)
            delta, state = compute_update(self.rule_state, slopes, self.rate, self.frozen)
            theta = self.theta + delta
            bad = ~np.isfinite(theta)
            cost = self.net.cost(theta, data.X, data.Y) if not bad.any() else math.nan
        if bad.any() or not math.isfinite(cost):
            if bad.any():
                culprits = tuple(self.names[i] for i in np.flatnonzero(bad)[:5])
                what = f"{int(bad.sum())} weight(s) would become non-finite ({', '.join(culprits)})"
            else:
                order = np.argsort(-np.abs(delta))[:3]
                culprits = tuple(self.names[i] for i in order)
                what = f"the cost would become non-finite (largest moves: {', '.join(culprits)})"
            raise DivergenceError(
                f"step refused at rate {self.rate:g}: {what}; that step was not made. "
                f"Try a smaller rate, e.g. {self.rate / 10:g}.",
                culprits,
            )
        return theta, state, float(cost)

    def iter_steps(self, n: int) -> Progress[StepReport]:
        """Make ``n`` updates as one undoable operation, yielding ``(done, n)`` after each.

        Closing the generator early (cancel) keeps the steps already made. A step
        that would diverge raises DivergenceError; the steps before it are kept.
        """
        if n < 1:
            raise UsageError(f"number of steps {n} must be at least 1")
        fields = ["theta", "rule_state", "step_count", "batch_rng"]
        before = self._snapshot(fields)
        start = len(self.history)
        cost_before = self.train_cost()
        done = 0
        try:
            yield 0, n
            for _ in range(n):
                self._one_step()
                done += 1
                yield done, n
        finally:
            if done:
                after = {**self._snapshot(fields), "history": (start, list(self.history[start:]))}
                change = _Change(f"{done} step{'s' if done > 1 else ''}",
                                 {**before, "history": (start, [])}, after)
                self._commit(change, {"op": "step", "n": done})
                self.last_action = (
                    f"{done} step{'s' if done > 1 else ''} ({self.rule}, rate {self.rate:g}, "
                    f"{self.slope_source} slopes): cost {cost_before:.6g} -> {self.train_cost():.6g}"
                )
        return StepReport(cost_before, self.train_cost(), done)

    def step(self, n: int = 1) -> StepReport:
        """Make ``n`` updates; see :meth:`iter_steps`."""
        report = run_to_end(self.iter_steps(n))
        assert report is not None
        return report

    def set_refresh_after_step(self, on: bool) -> None:
        """Whether the numeric slopes should be recomputed after every step.

        A preference for whoever drives the session (the app starts the
        recomputation); it changes no model state, so it is neither undone nor
        journaled.
        """
        self.refresh_numeric_after_step = bool(on)

    def refresh_if_wanted(self) -> Iterator[tuple[int, int]]:
        """Numeric slopes after a step when the user asked for that (a progress generator)."""
        if self.refresh_numeric_after_step:
            yield from self.iter_refresh_check()

    # -- rate preview --------------------------------------------------------------------------

    def candidate_rates(self) -> list[float]:
        """Log-spaced rates around the current one: rate x 1/16 ... x 16, in factors of 4 and 2."""
        return [self.rate * f for f in (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1.0, 2.0, 4.0, 8.0, 16.0)]

    def preview_rates(self, rates: Iterable[float] | None = None) -> list[tuple[float, float]]:
        """Cost on the training set after one full-batch step at each rate; the state is unchanged.

        A rate whose step would be non-finite gets cost ``inf``.
        """
        data = self.setup.data
        if self.slope_source == "analytic":
            slopes = self.analytic_slopes()
        else:
            slopes = self._slopes(data.X, data.Y)
        out: list[tuple[float, float]] = []
        for rate in (self.candidate_rates() if rates is None else rates):
            delta, _ = compute_update(self.rule_state, slopes, float(rate), self.frozen)
            with np.errstate(all="ignore"):
                theta = self.theta + delta
                cost = self.net.cost(theta, data.X, data.Y) if np.all(np.isfinite(theta)) else math.inf
            out.append((float(rate), cost if math.isfinite(cost) else math.inf))
        return out

    @staticmethod
    def best_preview_rate(preview: list[tuple[float, float]]) -> float:
        """The rate with the lowest cost in a preview."""
        return min(preview, key=lambda pair: pair[1])[0]

    # -- checkpoints ---------------------------------------------------------------------------

    def save_checkpoint(self, path: Path | str | None = None) -> Path:
        """Write the weights and state to a safetensors checkpoint (atomically)."""
        target = Path(path) if path is not None else self.default_checkpoint_path()
        meta = {
            "model_digest": self.setup.digest,
            "model_file": str(self.setup.path),
            "step_count": self.step_count,
            "rate": self.rate,
            "rule": self.rule,
            "rule_t": self.rule_state.t,
            "slope_source": self.slope_source,
            "batch_size": self.batch_size,
            "frozen": [self.names[i] for i in np.flatnonzero(self.frozen)],
            "history": [[h.step, h.train_cost, h.val_cost, h.rate, h.rule] for h in self.history],
            "batch_rng": self.batch_rng.bit_generator.state,
            "noise_rng": self.noise_rng.bit_generator.state,
        }
        save_checkpoint(target, self.net.layout, CheckpointData(self.theta, self.rule_state.arrays, meta))
        self.dirty = False
        self.last_checkpoint = target
        self.last_action = f"saved {target}"
        self._log({"op": "save", "path": str(target)})
        return target

    def load_checkpoint(self, path: Path | str, expect_sha256: str | None = None) -> None:
        """Restore weights (bit for bit) and state from a checkpoint; undoable.

        A checkpoint that does not fit the model is refused with a CheckpointError
        saying what differs; the session is then unchanged. With ``expect_sha256``
        (a replay), a file whose bytes have changed since is refused the same way.
        """
        path = Path(path)
        data = load_checkpoint(path, self.net.layout)
        if expect_sha256 is not None and data.sha256 != expect_sha256:
            raise CheckpointError(
                f"{path}: has changed since the journal recorded loading it (its SHA-256 differs), "
                "so the replay cannot rebuild the same state from it (use --force to replay anyway)"
            )
        meta = data.meta
        try:
            rule = str(meta["rule"])
            state = fresh_state(rule, self.net.n_params)
            for key in state.arrays:
                if key not in data.rule_arrays:
                    raise CheckpointError(f"{path}: does not fit: the {rule} rule's memory "
                                          f"(tensors rule.{key}.*) is missing")
                state.arrays[key] = data.rule_arrays[key]
            state.t = int(meta["rule_t"])
            frozen = np.zeros(self.net.n_params, dtype=bool)
            unknown = [name for name in meta["frozen"] if name not in self.net.layout.index_of]
            if unknown:
                raise CheckpointError(f"{path}: does not fit the model: frozen parameter {unknown[0]} is not in it")
            frozen[[self.net.layout.index_of[name] for name in meta["frozen"]]] = True
            history = [HistoryEntry(int(s), float(c), None if v is None else float(v), float(r), str(ru))
                       for s, c, v, r, ru in meta["history"]]
            if not history:
                raise ValueError("the cost history is empty")
            values = {
                "theta": data.theta,
                "frozen": frozen,
                "rule_state": state,
                "step_count": int(meta["step_count"]),
                "rate": _check_rate(float(meta["rate"])),
                "slope_source": str(meta["slope_source"]),
                "batch_size": None if meta["batch_size"] is None else int(meta["batch_size"]),
            }
            rng_states = {name: meta[name] for name in ("batch_rng", "noise_rng") if meta.get(name) is not None}
        except (KeyError, TypeError, ValueError, UsageError) as exc:
            raise CheckpointError(f"{path}: the checkpoint's metadata is incomplete or wrong ({exc})") from None
        if values["slope_source"] not in SLOPE_SOURCES:
            raise CheckpointError(f"{path}: unknown slope source {values['slope_source']!r}")
        for name, rng_state in rng_states.items():
            # Tried on a spare generator first: nothing may change before every check has passed.
            try:
                type(self.batch_rng.bit_generator)().state = rng_state
            except (TypeError, ValueError, KeyError, OverflowError):
                what = "batch" if name == "batch_rng" else "noise"
                raise CheckpointError(f"{path}: the checkpoint's {what} generator state is not valid") from None
        fields = list(values) + ["batch_rng", "noise_rng"]
        before = {**self._snapshot(fields), "history": (0, list(self.history))}
        self._restore({**values, **rng_states})
        self.history[:] = history
        after = {**self._snapshot(fields), "history": (0, list(history))}
        self._commit(_Change(f"load {path.name}", before, after), {"op": "load", "path": str(path.resolve()), "sha256": data.sha256})
        self.dirty = False
        self.last_checkpoint = path
        note = "" if meta.get("model_digest") == self.setup.digest else " (the model file has changed since it was saved)"
        self.last_action = f"loaded {path} at step {self.step_count}{note}"

    # -- journal replay ------------------------------------------------------------------------

    def apply(self, entry: dict[str, Any], force: bool = False) -> None:
        """Carry out one journal entry (as written by the operations above).

        A checkpoint loaded by the entry must still hold the bytes it held then
        (its SHA-256 is in the entry), unless ``force``.
        """
        op = entry.get("op")
        index = self.net.layout.index_of
        try:
            if op == "step":
                self.step(int(entry["n"]))
            elif op == "set_rate":
                self.set_rate(float(entry["rate"]))
            elif op == "set_rule":
                self.set_rule(str(entry["rule"]))
            elif op == "set_slope_source":
                self.set_slope_source(str(entry["source"]))
            elif op == "set_batch_size":
                self.set_batch_size(None if entry["size"] is None else int(entry["size"]))
            elif op == "freeze":
                self.freeze(index[name] for name in entry["names"])
            elif op == "unfreeze":
                self.unfreeze(index[name] for name in entry["names"])
            elif op == "set_value":
                self.set_value(index[entry["name"]], float(entry["value"]))
            elif op == "perturb":
                names = entry["names"]
                self.perturb(float(entry["scale"]), None if names is None else [index[n] for n in names],
                             int(entry["seed"]))
            elif op == "reset":
                self.reset()
            elif op == "undo":
                self.undo()
            elif op == "redo":
                self.redo()
            elif op == "load":
                digest = entry.get("sha256")
                self.load_checkpoint(Path(entry["path"]), None if force or digest is None else str(digest))
            elif op == "save":
                self.dirty = False
            else:
                raise CheckpointError(f"unknown journal operation {op!r}")
        except (KeyError, TypeError, ValueError) as exc:
            raise CheckpointError(f"journal entry {entry!r} is incomplete or wrong ({exc})") from None

    def close(self) -> None:
        if self.journal is not None:
            self.journal.close()
            self.journal = None


def session_folder_for(model: Path) -> Path:
    """Where checkpoints and journals of sessions over ``model`` go by default.

    ``<model stem>.checkpoints`` beside the model file; for a bundled scenario
    inside the installed package, or a model in a read-only folder,
    ``<folder name>.checkpoints`` in the current folder instead.
    """
    model = Path(model).resolve()
    package = Path(__file__).resolve().parent
    if model.is_relative_to(package) or not os.access(model.parent, os.W_OK):
        return Path.cwd() / f"{model.parent.name}.checkpoints"
    return model.parent / f"{model.stem}.checkpoints"


def default_journal_for(model: Path) -> Path:
    """A new journal file name for a session starting now."""
    return session_folder_for(model) / f"journal-{datetime.now():%Y%m%d-%H%M%S}.jsonl"


def _check_rate(rate: float) -> float:
    if not (isinstance(rate, (int, float)) and math.isfinite(rate) and rate > 0):
        raise UsageError(f"learning rate {rate!r} must be a positive number")
    return float(rate)
