"""Saving and loading checkpoints of a session."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from stepper.core.descent import check_setting
from stepper.core.optimizers import RuleState
from stepper.core.schedules import ScheduleError
from stepper.core.schedules import from_dict as schedule_from_dict
from stepper.errors import CheckpointError, UsageError
from stepper.formats.checkpoint import CheckpointData, load_checkpoint, save_checkpoint
from stepper.formats.model_file import Setup
from stepper.formats.outputs import check_output
from stepper.formats.saved_state import history_tensors, read_state
from stepper.session.core import SLOPE_SOURCES, SessionCore, _Change


def verify_checkpoint(setup: Setup, path: Path) -> None:
    """Read and check a checkpoint against ``setup`` without a session: before anything is written.

    Commands call it on ``--resume`` before they create a journal, so a bad
    checkpoint leaves no file behind.
    """
    data = load_checkpoint(Path(path), setup.network.layout)
    read_state(Path(path), data, setup.network.layout, setup.data.n_train, SLOPE_SOURCES)


class Files(SessionCore):
    """Checkpoints: the whole state to a safetensors file and back (loading is undoable)."""

    # -- checkpoints ---------------------------------------------------------------------------

    def save_checkpoint(self, path: Path | str | None = None) -> Path:
        """Write the weights and state to a safetensors checkpoint (atomically).

        Refused (UsageError) when the path is one of the session's inputs, not a
        regular file, or an existing file that is not a Stepper checkpoint.
        """
        target = Path(path) if path is not None else self.default_checkpoint_path()
        check_output(target, self.input_files(), "checkpoint")
        tensors, history_meta = history_tensors(self.history.columns())
        if self.batch_order is not None:
            tensors["batch.order"] = self.batch_order
        meta = {
            "model_digest": self.setup.digest,
            "model_file": str(self.setup.path),
            "step_count": self.step_count,
            "rate": self.rate,
            "rule": self.rule,
            "rule_t": self.rule_state.t,
            "slope_source": self.slope_source,
            "batch_size": self.batch_size,
            "batch_cursor": self.batch_cursor,
            "epoch": self.epoch,
            "frozen": self.names.of(np.flatnonzero(self.frozen)),
            "batch_rng": self.batch_rng.bit_generator.state,
            "noise_rng": self.noise_rng.bit_generator.state,
            "l2": self.l2,
            "weight_decay": self.weight_decay,
            "clip_norm": self.clip_norm,
            "schedule": self.schedule.as_dict(),
            **history_meta,
        }
        save_checkpoint(target, self.net.layout,
                        CheckpointData(self.theta, self.rule_state.arrays, meta, last_update=self.last_update,
                                       extra=tensors, state=self.state),
                        self.net.state_layout)
        self._mark_saved()
        self.last_checkpoint = target
        self.last_action = f"saved {target}"
        self._log({"op": "save", "path": str(target)})
        return target

    def load_checkpoint(self, path: Path | str, expect_sha256: str | None = None) -> None:
        """Restore weights (bit for bit) and state from a checkpoint; undoable.

        A checkpoint that does not fit the model, or whose metadata holds a value
        of the wrong type or out of range, is refused with a CheckpointError
        saying what differs; the session is then unchanged. With
        ``expect_sha256`` (a replay), a file whose bytes have changed since is
        refused the same way.
        """
        path = Path(path)
        data = load_checkpoint(path, self.net.layout, self.net.state_layout,
                               digest=self.journal is not None or expect_sha256 is not None)
        if expect_sha256 is not None and data.sha256 != expect_sha256:
            raise CheckpointError(
                f"{path}: has changed since the journal recorded loading it (its SHA-256 differs), "
                "so the replay cannot rebuild the same state from it (use --force to replay anyway)"
            )
        saved = read_state(path, data, self.net.layout, self.setup.data.n_train, SLOPE_SOURCES)
        try:
            training = self._saved_training(data.meta)
        except (TypeError, ValueError, UsageError, ScheduleError) as exc:
            raise CheckpointError(f"{path}: the checkpoint's metadata is incomplete or wrong ({exc})") from None
        if data.last_update is not None and not np.all(np.isfinite(data.last_update)):
            raise CheckpointError(f"{path}: tensor last_update holds a value that is not a finite number")
        for name, rng_state in (("batch", saved.batch_rng), ("noise", saved.noise_rng)):
            # Tried on a spare generator first: nothing may change before every check has passed.
            if rng_state is None:
                continue
            try:
                type(self.batch_rng.bit_generator)().state = rng_state
            except (TypeError, ValueError, KeyError, OverflowError):
                raise CheckpointError(f"{path}: the checkpoint's {name} generator state is not valid") from None
        values = {
            "theta": data.theta,
            "state": data.state,
            "frozen": saved.frozen,
            "rule_state": RuleState(saved.rule, saved.rule_arrays, saved.rule_t),
            "step_count": saved.step_count,
            "rate": saved.rate,
            "slope_source": saved.slope_source,
            "batch_size": saved.batch_size,
            "batch_order": saved.batch_order,
            "batch_cursor": saved.batch_cursor,
            "epoch": saved.epoch,
            **training,
            "last_update": data.last_update,
        }
        rng_states = {name: state for name, state in (("batch_rng", saved.batch_rng),
                                                     ("noise_rng", saved.noise_rng)) if state is not None}
        fields = list(values) + ["batch_rng", "noise_rng"]
        before = {**self._snapshot(fields), "history": (0, self.history.segment(0))}
        self._restore({**values, **rng_states})
        self.history.replace(saved.history)
        # The undo level keeps the loaded history itself (nothing else holds it): no second copy.
        after = {**self._snapshot(fields), "history": (0, saved.history)}
        self._commit(_Change(f"load {path.name}", before, after),
                     {"op": "load", "path": str(path.resolve()), "sha256": data.sha256})
        self.loaded.append(path)
        self._mark_saved()
        self.last_checkpoint = path
        note = "" if saved.model_digest == self.setup.digest else " (the model file has changed since it was saved)"
        self.last_action = f"loaded {path} at step {self.step_count}{note}"

    def _saved_training(self, meta: dict[str, Any]) -> dict[str, Any]:
        """The training settings a checkpoint holds (those it lacks stay as they are); ValueError if wrong."""
        out: dict[str, Any] = {}
        for key in ("l2", "weight_decay"):
            if key in meta:
                out[key] = check_setting(key, meta[key])
        if "clip_norm" in meta:
            norm = meta["clip_norm"]
            out["clip_norm"] = None if norm is None else check_setting("clip_norm", norm)
            if out["clip_norm"] == 0.0:
                raise ValueError("clip_norm 0 must be positive")
        if "schedule" in meta:
            out["schedule"] = schedule_from_dict(meta["schedule"])
        return out
