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

The class is put together from small modules: :mod:`.core` (state, derived
values, undo and journal machinery), :mod:`.edits` (settings, freezing,
values), :mod:`.checking` (numeric slopes of the weights), :mod:`.stepping`
(updates and the rate preview; how a job ends and what it says),
:mod:`.runaway` (when a job stops a running-away cost), :mod:`.training` (the
L2 term, weight decay, clipping, the schedule), :mod:`.rates` (the rate range
test), :mod:`.measures` (row losses, metrics, histograms, comparison with a
checkpoint), :mod:`.history` (the cost history as arrays), :mod:`.files`
(checkpoints) and :mod:`.folders` (default paths);
replay of a journal entry is here, since it calls on all of them.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from stepper.core.optimizers import RULES
from stepper.errors import CheckpointError
from stepper.formats import fields
from stepper.formats.journal import MAX_STEPS_PER_LINE
from stepper.session.core import SLOPE_SOURCES, UNDO_BYTES, StepReport
from stepper.session.history import History, HistoryEntry
from stepper.session.undo import undo_budget
from stepper.session.edits import Edits
from stepper.session.files import Files, verify_checkpoint
from stepper.session.folders import default_journal_for, session_folder_for
from stepper.session.measures import Measures, RowTable, SetMetrics
from stepper.session.rates import Rates
from stepper.session.runaway import RUN_ON, RunawayRule
from stepper.session.stepping import Stepping
from stepper.session.training import Training

__all__ = [
    "RUN_ON",
    "RowTable",
    "SetMetrics",
    "SLOPE_SOURCES",
    "UNDO_BYTES",
    "History",
    "HistoryEntry",
    "RunawayRule",
    "Session",
    "StepReport",
    "default_journal_for",
    "undo_budget",
    "session_folder_for",
    "verify_checkpoint",
]


class Session(Stepping, Training, Edits, Files, Rates, Measures):
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
        l2: strength of the L2 term in the cost (it lives on :attr:`net`).
        weight_decay: decoupled weight decay per step (AdamW with the adam rule).
        clip_norm: the global slope norm steps clip to, or None.
        schedule: the rate schedule (:mod:`stepper.core.schedules`).
        last_update: the change the last step made, ``(n_params,)``, or None (no step since
            the start, a load or an undo or redo of weights; a figure to show, not undo state).
        history: cost after every step, entry 0 at the start.
        check: the last numeric comparison, or None.
        runaway: the rule that stops a job of steps whose cost runs away (see :mod:`.runaway`).
        dirty: True when there are changes since the last save or load.
        last_action: a sentence describing the last operation and its effect.
    """

    # -- journal replay ------------------------------------------------------------------------

    def apply(self, entry: dict[str, Any], force: bool = False) -> None:
        """Carry out one journal entry (as written by the operations above).

        Every field is checked for type and range first (a journal is a file a
        user can edit): CheckpointError names the field. A checkpoint loaded by
        the entry must still hold the bytes it held then (its SHA-256 is in the
        entry), unless ``force``.
        """
        op = entry.get("op")

        def error(message: str) -> CheckpointError:
            return CheckpointError(message)

        def get(key: str) -> Any:
            if key not in entry:
                raise CheckpointError(f"{op}: no '{key}'")
            return entry[key]

        def named(key: str) -> list[int]:
            index = self.net.layout.index_of
            found = fields.names(get(key), error, f"{op}: {key}")
            unknown = [name for name in found if name not in index]
            if unknown:
                raise CheckpointError(f"{op}: {key}: the model has no parameter {unknown[0]}")
            return [index[name] for name in found]

        n_train = self.setup.data.n_train
        if op == "step":
            n = fields.whole(get("n"), error, "step: n", 1, MAX_STEPS_PER_LINE)
            # The journal holds exactly the steps made: no runaway rule stops a replay.
            self.step(n, watch=False, continues=bool(entry.get("continues", False)))
        elif op == "set_rate":
            self.set_rate(fields.number(get("rate"), error, "set_rate: rate", positive=True))
        elif op == "set_rule":
            self.set_rule(fields.choice(get("rule"), RULES, error, "set_rule: rule"))
        elif op == "set_slope_source":
            self.set_slope_source(fields.choice(get("source"), SLOPE_SOURCES, error, "set_slope_source: source"))
        elif op == "set_batch_size":
            size = get("size")
            self.set_batch_size(None if size is None else fields.whole(size, error, "set_batch_size: size",
                                                                        1, n_train))
        elif op == "freeze":
            self.freeze(named("names"))
        elif op == "unfreeze":
            self.unfreeze(named("names"))
        elif op == "set_value":
            name = fields.text(get("name"), error, "set_value: name")
            if name not in self.net.layout.index_of:
                raise CheckpointError(f"set_value: name: the model has no parameter {name}")
            self.set_value(self.net.layout.index_of[name], fields.number(get("value"), error, "set_value: value"))
        elif op == "perturb":
            names = None if get("names") is None else named("names")
            self.perturb(fields.number(get("scale"), error, "perturb: scale", positive=True), names,
                         fields.whole(get("seed"), error, "perturb: seed", 0, 2**64 - 1))
        elif op == "reset":
            self.reset()
        elif op == "undo":
            self.undo()
        elif op == "redo":
            self.redo()
        elif op == "load":
            digest = entry.get("sha256")
            if digest is not None:
                fields.text(digest, error, "load: sha256", 128)
            path = Path(fields.text(get("path"), error, "load: path"))
            self.load_checkpoint(path, None if force or digest is None else str(digest))
        elif op == "save":
            self._mark_saved()
        else:
            try:
                known = self.apply_training(str(op), entry)
            except (KeyError, TypeError, ValueError, OverflowError) as exc:
                raise CheckpointError(f"{op}: incomplete or wrong ({exc})") from None
            if not known:
                raise CheckpointError(f"unknown journal operation {op!r}")
