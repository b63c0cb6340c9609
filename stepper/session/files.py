"""Saving and loading checkpoints of a session."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from stepper.core.descent import check_setting
from stepper.core.optimizers import fresh_state
from stepper.core.schedules import ScheduleError
from stepper.core.schedules import from_dict as schedule_from_dict
from stepper.errors import CheckpointError, UsageError
from stepper.formats.checkpoint import CheckpointData, load_checkpoint, save_checkpoint
from stepper.session.core import SLOPE_SOURCES, HistoryEntry, SessionCore, _Change, _check_rate


class Files(SessionCore):
    """Checkpoints: the whole state to a safetensors file and back (loading is undoable)."""

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
            "frozen": self.names.of(np.flatnonzero(self.frozen)),
            "history": [[h.step, h.train_cost, h.val_cost, h.rate, h.rule] for h in self.history],
            "batch_rng": self.batch_rng.bit_generator.state,
            "noise_rng": self.noise_rng.bit_generator.state,
            "l2": self.l2,
            "weight_decay": self.weight_decay,
            "clip_norm": self.clip_norm,
            "schedule": self.schedule.as_dict(),
        }
        save_checkpoint(target, self.net.layout,
                        CheckpointData(self.theta, self.rule_state.arrays, meta, last_update=self.last_update))
        self._mark_saved()
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
            values.update(self._saved_training(meta))
            values["last_update"] = data.last_update
        except (KeyError, TypeError, ValueError, UsageError, ScheduleError) as exc:
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
        self._mark_saved()
        self.last_checkpoint = path
        note = "" if meta.get("model_digest") == self.setup.digest else " (the model file has changed since it was saved)"
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
