"""Operations that change settings, the frozen mask and weight values (each undoable and journaled)."""

from __future__ import annotations

import math
from typing import Any, Iterable

import numpy as np
from numpy.typing import NDArray

from stepper.core.names import matching
from stepper.core.nearest import arrays_text, unknown_name
from stepper.core.optimizers import RULES, fresh_state
from stepper.errors import UsageError
from stepper.session.core import Array, SessionCore, _Change, _check_batch_size, _check_rate, _check_slope_source


class Edits(SessionCore):
    """Settings (rate, rule, slope source, batch size), freezing, setting and perturbing values, reset."""

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
        self._commit(_Change(f"update rule {before['rule_state'].rule} -> {rule}", before, after),
                     {"op": "set_rule", "rule": rule})
        self.last_action = f"update rule {before['rule_state'].rule} -> {rule} (its memory starts afresh)"

    def set_slope_source(self, source: str) -> None:
        source = _check_slope_source(source)
        how = "backpropagation (analytic)" if source == "analytic" else "finite differences (numeric)"
        self._setting(f"switch to {source} slopes", "slope_source", source,
                      {"op": "set_slope_source", "source": source})
        self.last_action = f"steps now take their slopes from {how}"

    def set_batch_size(self, size: int | None) -> None:
        size = _check_batch_size(size, self.setup.data.n_train)
        label = "the full batch" if size is None else f"mini-batches of {size}"
        self._setting(f"switch to {label}", "batch_size", size, {"op": "set_batch_size", "size": size})
        self.last_action = ("each step now uses every training sample" if size is None else
                            f"each step now uses a mini-batch of {size} samples, drawn afresh")

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
                         {"op": "freeze", "names": self.names.of(idx)})

    def unfreeze(self, indices: Iterable[int]) -> None:
        idx = self._indices(indices)
        self._set_frozen(idx, False, f"unfroze {self._describe(idx)}",
                         {"op": "unfreeze", "names": self.names.of(idx)})

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
        # Matched array by array, without spelling out every name of a large model.
        hits = matching(self.net.layout, pattern)
        if not hits.size:
            hint = (unknown_name(self.net.layout, pattern) if not any(c in pattern for c in "*?")
                    else f"the model's arrays: {arrays_text(self.net.layout)}")
            raise UsageError(f"no parameter name matches {pattern!r} ({hint})")
        return hits

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
        chosen = np.arange(self.net.n_params) if indices is None else self._indices(indices)
        idx = chosen[~self.frozen[chosen]]
        if idx.size == 0:
            raise UsageError("every chosen parameter is frozen: nothing to perturb")
        if seed is None:
            seed = int(self.noise_rng.integers(0, 2**31 - 1))
        noise = np.random.default_rng(seed).normal(0.0, scale, idx.size)
        before = self.train_cost()
        name = f"perturbed {self._perturbed(idx, chosen.size, indices is None, noise)}"
        self._set_values(idx, self.theta[idx] + noise, name,
                         {"op": "perturb", "scale": scale, "seed": seed,
                          "names": None if indices is None else self.names.of(idx)})
        self.last_action = f"{name} (noise sd {scale:g}): cost {before:.6g} -> {self.train_cost():.6g}"

    def _perturbed(self, idx: NDArray[np.int64], n_chosen: int, everything: bool, noise: Array) -> str:
        """What a perturbation changed: ``L1.W[0,0] by +0.0123``, or how many moved and by how much."""
        if idx.size == 1:
            return f"{self.names[int(idx[0])]} by {noise[0]:+.3g}"
        skipped = n_chosen - idx.size
        if skipped == 0:
            which = f"all {idx.size} parameters" if everything else f"{idx.size} parameters"
        else:
            which = f"{idx.size} of {n_chosen} parameters ({skipped} frozen, left alone)"
        return f"{which} by {float(np.sqrt(np.mean(noise * noise))):.3g} rms"

    def reset(self) -> None:
        """All parameters back to their initial values; the rule's memory and the running statistics start afresh."""
        before_cost = self.train_cost()
        before = self._snapshot(["theta", "rule_state", "state"])
        after = {"theta": self.setup.theta0.copy(), "rule_state": fresh_state(self.rule, self.net.n_params),
                 "state": self.net.initial_state()}
        self._manual_change("reset", before, after, {"op": "reset"})
        self.last_action = (f"reset every weight to its initial value (the step counter stays at {self.step_count} "
                            f"and the cost history goes on): cost {before_cost:.6g} -> {self.train_cost():.6g}")
