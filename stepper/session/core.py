"""The session's core: its state, derived values, and the undo and journal machinery.

:class:`SessionCore` holds every field a session owns and the machinery that
records a change (``_snapshot``, ``_restore``, ``_commit``); the operations that
change the model live in sibling modules (:mod:`.edits`, :mod:`.stepping`,
:mod:`.files`) as subclasses that :class:`stepper.session.Session` puts together.
"""

from __future__ import annotations

import copy
import itertools
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np
from numpy.typing import NDArray

from stepper.core.descent import Descent, EpochPosition
from stepper.core.gradcheck import CheckResult
from stepper.core.names import WeightNames
from stepper.core.network import Network
from stepper.core.optimizers import RULES, RuleState, fresh_state
from stepper.errors import UsageError
from stepper.formats.journal import JournalWriter
from stepper.formats.model_file import Setup
from stepper.session.folders import default_journal_for, session_folder_for
from stepper.session.history import History, HistoryEntry
from stepper.session.runaway import RunawayRule
from stepper.session.undo import UNDO_BYTES as UNDO_BYTES  # re-exported: the undo budget's ceiling
from stepper.session.undo import RuleBits, compact, flip, flipped, saved_bytes, undo_budget

Array = NDArray[np.float64]

SLOPE_SOURCES = ("analytic", "numeric")




@dataclass(frozen=True)
class StepReport:
    """What a run of steps did: cost before and after, and how many steps."""

    before: float
    after: float
    steps: int


#: Numbers every operation made in this process, so that a saved state can be recognised again.
_SERIALS = itertools.count(1)


@dataclass
class _Change:
    """One undoable operation: the touched fields before and after it, and a number of its own."""

    name: str
    before: dict[str, Any]
    after: dict[str, Any]
    serial: int = field(default_factory=lambda: next(_SERIALS))
    #: "step" for a run of steps (a replayed journal may add steps to it), else "".
    op: str = ""

    def nbytes(self) -> int:
        """Bytes of the arrays this change holds (an array both sides share counts once)."""
        return saved_bytes(self.before, self.after)


class SessionCore:
    """Every field of a session, its derived values, and the machinery that records changes.

    Operations live in the subclasses; :class:`stepper.session.Session` lists the attributes.
    """

    def __init__(
        self,
        setup: Setup,
        journal: Path | None = None,
        rate: float = 0.1,
        rule: str = "gd",
        seed: int = 0,
        slope_source: str = "analytic",
        batch_size: int | None = None,
        new_journal: bool = False,
    ) -> None:
        self.setup = setup
        # A copy of its own: the L2 term is a setting of this session (net.l2).
        self.net = copy.copy(setup.network)
        n = self.net.n_params
        self.theta: Array = setup.theta0.copy()
        self.state: Array = self.net.initial_state()
        self.frozen: NDArray[np.bool_] = np.zeros(n, dtype=bool)
        if rule not in RULES:
            raise UsageError(f"unknown update rule {rule!r} (expected one of: {', '.join(RULES)})")
        self.rule_state = fresh_state(rule, n)
        self.step_count = 0
        self.rate = _check_rate(rate)
        self.slope_source = _check_slope_source(slope_source)
        self.batch_size: int | None = _check_batch_size(batch_size, setup.data.n_train)
        self.weight_decay = setup.descent.weight_decay
        self.clip_norm = setup.descent.clip_norm
        self.schedule = setup.descent.schedule
        #: The change the last step made, ``(n_params,)``; None before any step and after an undo or
        #: redo that moved the weights (a figure to show, like ``check``: not part of the undo state).
        self.last_update: Array | None = None
        #: Mini-batches go through the training rows epoch by epoch: this epoch's order
        #: of the rows ``(n_train,)`` (None before the first mini-batch), how many of
        #: them are used, and how many epochs have begun.
        self.batch_order: NDArray[np.int64] | None = None
        self.batch_cursor = 0
        self.epoch = 0
        self.seed = seed
        self.batch_rng = np.random.default_rng(seed)
        self.noise_rng = np.random.default_rng(seed + 1)
        self.check: CheckResult | None = None
        self.refresh_numeric_after_step = False
        #: Whether each new history entry records the task's main figure (a preference: not undone,
        #: not journaled; the app turns it on while its metric plot is shown).
        self.track_metrics = False
        self.runaway = RunawayRule()
        self.dirty = False
        self.last_action: str | None = None
        self.last_checkpoint: Path | None = None
        self._undo: list[_Change] = []
        self._redo: list[_Change] = []
        self._undo_bytes = 0
        #: Bytes of saved arrays the undo levels may keep (stepper.session.undo).
        self.undo_budget = undo_budget(n)
        #: The states written to or read from a checkpoint in this session, each known by the
        #: serial of the last operation in effect then (0: the start, before any).
        self._saved: set[int] = {0}
        self._version = 0
        self._changes = 0  # operations committed, undone or redone (any change of state)
        self._check_version = -1
        self._cache: dict[str, tuple[int, Any]] = {}
        self.history = History([self._entry()])
        #: Files this session read besides the model's own inputs (checkpoints it loaded).
        self.loaded: list[Path] = []
        #: Why the journal stopped, when writing it failed (the session goes on without one).
        self.journal_problem: str | None = None
        self._steps_unlogged = 0
        self._steps_first_logged = False
        self.journal: JournalWriter | None = None
        if journal is not None:
            start = {"rate": self.rate, "rule": self.rule, "seed": self.seed,
                     "slope_source": self.slope_source, "batch_size": self.batch_size}
            if setup.document is not None:
                start["document"] = setup.document  # an ONNX file opened with --data ...: how to rebuild it
            inputs = [{"role": "input", "path": str(path), "sha256": sha} for path, sha in setup.inputs]
            self.journal = JournalWriter(journal, setup.path, setup.digest, start, inputs, exclusive=new_journal)

    # -- read-only views -------------------------------------------------------------------

    @property
    def epoch_position(self) -> EpochPosition:
        """Where mini-batches stand in their epoch (see :func:`stepper.core.descent.next_batch`)."""
        return EpochPosition(self.batch_order, self.batch_cursor, self.epoch)

    @property
    def rule(self) -> str:
        return self.rule_state.rule

    @property
    def l2(self) -> float:
        """Strength of the L2 term in the cost (0: none)."""
        return self.net.l2

    @property
    def descent(self) -> Descent:
        """Clipping, decoupled decay and schedule, as the update uses them."""
        return Descent(self.weight_decay, self.clip_norm, self.schedule)

    @property
    def names(self) -> WeightNames:
        """Every weight's name, built when asked for (stepper.core.names)."""
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
    def undo_levels(self) -> int:
        """How many operations undo can take back now (the oldest are dropped past the budget)."""
        return len(self._undo)

    @property
    def redo_levels(self) -> int:
        return len(self._redo)

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

    def training_net(self, step: int | None = None) -> Network:
        """The network as it trains at update ``step`` (default: the next update's, :attr:`step_count`).

        Its dropout masks are the step's (drawn once per step, so the cost, its
        analytic slopes and every numeric slope of one step share them); batch
        norm uses the statistics of the batch it is given.
        """
        return self.net.at(True, self.step_count if step is None else step, self.state)

    def evaluation_net(self) -> Network:
        """The network as the validation cost runs it: no dropout, batch norm on its running statistics."""
        return self.net.at(False, self.step_count, self.state)

    def train_cost(self) -> float:
        """Cost on the whole training set at the current parameters (in training, at this step)."""
        data = self.setup.data
        return float(self._cached("train", lambda: self.training_net().cost(self.theta, data.X, data.Y)))

    def val_cost(self) -> float | None:
        """Cost on the validation set, or None when there is none (in evaluation)."""
        data = self.setup.data
        if data.n_val == 0:
            return None
        return float(self._cached("val", lambda: self.evaluation_net().cost(self.theta, data.X_val, data.Y_val)))

    def analytic_slopes(self) -> Array:
        """Slopes by backpropagation on the whole training set, ``(n_params,)``."""
        data = self.setup.data

        def compute() -> Array:
            return self.training_net().cost_and_slopes(self.theta, data.X, data.Y)[1]

        result: Array = self._cached("slopes", compute)
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
            if name in ("theta", "state"):
                out[name] = getattr(self, name).copy()
            elif name == "frozen":
                out[name] = self.frozen.copy()
            elif name == "rule_state":
                out[name] = self.rule_state.copy()
            elif name == "batch_rng":
                out[name] = self.batch_rng.bit_generator.state
            elif name == "noise_rng":
                out[name] = self.noise_rng.bit_generator.state
            elif name == "batch_order":
                out[name] = None if self.batch_order is None else self.batch_order.copy()
            else:
                out[name] = getattr(self, name)
        return out

    def _restore(self, fields: dict[str, Any]) -> None:
        for name, value in fields.items():
            if name == "theta":
                self.theta[...] = value
                self._version += 1
            elif name == "theta_bits":
                flip(self.theta, value)
                self._version += 1
            elif name == "state":
                self.state = value.copy()
                self._version += 1  # the validation cost depends on it
            elif name == "theta_at":
                idx, values = value
                self.theta[idx] = values
                self._version += 1
            elif name == "theta_at_bits":
                idx, bits = value
                self.theta[idx] = flipped(self.theta[idx], bits)
                self._version += 1
            elif name == "frozen":
                self.frozen[...] = value
            elif name == "rule_state":
                self.rule_state = value.copy()
            elif name == "rule_bits":
                self.rule_state = self._rule_flipped(value)
            elif name == "batch_rng":
                self.batch_rng.bit_generator.state = value
            elif name == "noise_rng":
                self.noise_rng.bit_generator.state = value
            elif name == "l2":
                self.net.l2 = float(value)
                self._version += 1  # the cost changes with it
            elif name == "last_update":
                self.last_update = None if value is None else value.copy()
            elif name == "history":
                start, entries = value
                self.history.truncate(start)
                self.history.extend(entries)
            elif name == "batch_order":
                self.batch_order = None if value is None else value.copy()
            else:
                setattr(self, name, value)

    def _forget_update(self, side: dict[str, Any]) -> None:
        """After an undo or redo that moved the weights, no step made them: there is no last update."""
        if "last_update" not in side and any(k.startswith("theta") for k in side):
            self.last_update = None

    def _rule_flipped(self, side: RuleBits) -> RuleState:
        """The update rule's memory on the other side of a difference (new arrays)."""
        state = self.rule_state
        assert state.rule == side.rule, "an undo level applied out of order"
        return RuleState(state.rule, {k: flipped(state.arrays[k], bits) for k, bits in side.bits.items()}, side.t)

    @property
    def changes(self) -> int:
        """Counter that changes with every operation, undo and redo (any change of state)."""
        return self._changes

    def _commit(self, change: _Change, journal: dict[str, Any] | None) -> None:
        """Record ``change`` (state now on its ``after`` side) as the newest undo level, within the budget."""
        self._changes += 1
        change.before, change.after = compact(change.before, change.after)
        self._undo.append(change)
        self._undo_bytes += change.nbytes()
        self._redo.clear()
        while len(self._undo) > 1 and self._undo_bytes > self.undo_budget:
            self._undo_bytes -= self._undo.pop(0).nbytes()
        self.dirty = True
        self._log(journal)

    def _top(self) -> int:
        return self._undo[-1].serial if self._undo else 0

    def _mark_saved(self) -> None:
        """The state now is in a checkpoint (a save, or a load): nothing is unsaved."""
        self._saved.add(self._top())
        self.dirty = False

    def _dirty_since_saved(self) -> None:
        """After undo or redo: unsaved unless undo or redo came back to a state saved or loaded."""
        self.dirty = self._top() not in self._saved

    def _log(self, entry: dict[str, Any] | None) -> None:
        """Append ``entry`` to the journal; a journal that cannot be written stops, the session goes on."""
        if self.journal is None or entry is None:
            return
        try:
            self.journal.append(entry)
        except (OSError, ValueError) as exc:  # ValueError: writing to a handle a failed flush closed
            journal = self.journal
            self.journal = None
            journal.close()
            reason = getattr(exc, "strerror", None) or str(exc)
            self.journal_problem = (f"the journal {journal.path} cannot be written ({reason}); it stopped "
                                    "here, the session goes on: save a checkpoint to keep your work")

    def flush_journal(self) -> None:
        """Write the steps of the running job that are not in the journal yet (before a screen shows them)."""
        self._log_steps()

    def _log_steps(self) -> None:
        if self._steps_unlogged:
            entry: dict[str, Any] = {"op": "step", "n": self._steps_unlogged}
            if self._steps_first_logged:
                entry["continues"] = True
            self._steps_unlogged = 0
            self._steps_first_logged = True
            self._log(entry)

    def input_files(self) -> list[tuple[str, Path]]:
        """Every file this session read, with its role: outputs must never replace one of them."""
        files = self.setup.input_files() + [("a checkpoint this session loaded", path) for path in self.loaded]
        if self.journal is not None:
            files.append(("this session's journal", self.journal.path))
        return files

    def undo(self) -> str | None:
        """Take back the last operation; returns its name, or None if there is nothing to undo."""
        if not self._undo:
            self.last_action = "nothing to undo"
            return None
        change = self._undo.pop()
        self._undo_bytes -= change.nbytes()
        cost = self.history[-1].train_cost
        self._changes += 1
        self._restore(change.before)
        self._forget_update(change.before)
        self._redo.append(change)
        self._dirty_since_saved()
        self.last_action = f"undid {change.name}{self._cost_change(change, cost)}"
        self._log({"op": "undo"})
        return change.name

    def redo(self) -> str | None:
        """Do again the last operation taken back; returns its name, or None."""
        if not self._redo:
            self.last_action = "nothing to redo"
            return None
        change = self._redo.pop()
        cost = self.history[-1].train_cost
        self._changes += 1
        self._restore(change.after)
        self._forget_update(change.after)
        self._undo.append(change)
        self._undo_bytes += change.nbytes()
        self._dirty_since_saved()
        self.last_action = f"redid {change.name}{self._cost_change(change, cost)}"
        self._log({"op": "redo"})
        return change.name

    def _cost_change(self, change: _Change, before: float) -> str:
        """``: cost 1.31 -> 1.27`` for a change that moved the weights (its history holds the costs), else ""."""
        if "history" not in change.before:
            return ""
        return f": cost {before:.6g} -> {self.history[-1].train_cost:.6g}"
    def _setting(self, name: str, field: str, value: Any, journal: dict[str, Any]) -> None:
        before = self._snapshot([field])
        setattr(self, field, value)
        self._commit(_Change(name, before, {field: value}), journal)
        self.last_action = name

    def _entry(self) -> HistoryEntry:
        train_cost, val_cost = self.train_cost(), self.val_cost()
        if not self.track_metrics:
            return HistoryEntry(self.step_count, train_cost, val_cost, self.rate, self.rule)
        train_metric, val_metric = self._main_figures()
        return HistoryEntry(self.step_count, train_cost, val_cost, self.rate, self.rule, train_metric, val_metric)

    def _main_figures(self) -> tuple[float | None, float | None]:
        """The task's main figure on the training and validation rows (see :mod:`.measures`)."""
        raise NotImplementedError
    def close(self) -> None:
        if self.journal is not None:
            self.journal.close()
            self.journal = None



def _check_rate(rate: float) -> float:
    if not (isinstance(rate, (int, float)) and math.isfinite(rate) and rate > 0):
        raise UsageError(f"learning rate {rate!r} must be a positive number")
    return float(rate)


def _check_slope_source(source: str) -> str:
    if source not in SLOPE_SOURCES:
        raise UsageError(f"unknown slope source {source!r} (expected one of: {', '.join(SLOPE_SOURCES)})")
    return source


def _check_batch_size(size: int | None, n_train: int) -> int | None:
    """``size`` checked against the training set; None (the full batch) for ``n_train`` itself."""
    if size is not None and not 1 <= size <= n_train:
        raise UsageError(f"batch size {size} must be between 1 and the {n_train} training samples")
    return None if size == n_train else size
