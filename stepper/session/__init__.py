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
values), :mod:`.stepping` (updates and the rate preview; how a job ends and
what it says), :mod:`.runaway` (when a job stops a running-away cost),
:mod:`.training` (the L2 term, weight decay, clipping, the schedule),
:mod:`.rates` (the rate range test), :mod:`.measures` (row losses, metrics,
histograms, comparison with a checkpoint), :mod:`.files` (checkpoints) and
:mod:`.folders` (default paths); replay of a journal entry is here, since it
calls on all of them.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from stepper.errors import CheckpointError
from stepper.session.core import SLOPE_SOURCES, UNDO_BYTES, HistoryEntry, StepReport
from stepper.session.undo import undo_budget
from stepper.session.edits import Edits
from stepper.session.files import Files
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
    "HistoryEntry",
    "RunawayRule",
    "Session",
    "StepReport",
    "default_journal_for",
    "undo_budget",
    "session_folder_for",
]


class Session(Stepping, Edits, Files, Training, Rates, Measures):
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

        A checkpoint loaded by the entry must still hold the bytes it held then
        (its SHA-256 is in the entry), unless ``force``.
        """
        op = entry.get("op")
        index = self.net.layout.index_of
        try:
            if op == "step":
                # The journal holds exactly the steps made: no runaway rule stops a replay.
                self.step(int(entry["n"]), watch=False)
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
                self._mark_saved()
            elif self.apply_training(str(op), entry):
                pass
            else:
                raise CheckpointError(f"unknown journal operation {op!r}")
        except (KeyError, TypeError, ValueError) as exc:
            raise CheckpointError(f"journal entry {entry!r} is incomplete or wrong ({exc})") from None
