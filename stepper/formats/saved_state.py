"""The session state a checkpoint holds besides the weights, checked field by field.

:func:`read_state` turns a checkpoint's metadata and state tensors into a
:class:`SavedState` whose every value has been checked for type and range
(a step count is a whole number of at least 0, a rate a finite positive
number, a batch size between 1 and the training rows, a generator state one
that numpy would produce, the cost history arrays of one length...). Nothing
read from the file reaches the session unchecked.

The cost history is kept as arrays (:class:`CostHistory`), in memory and in
the file: ``history.train`` (and ``history.val`` when there is a validation
set) hold one cost per entry; the step numbers, rates and rules change
rarely, so they are stored as runs: ``history.step_runs`` ``(k, 2)`` holds
``[first entry, its step]`` of each run of steps counting up by one, and
``history.setting_runs`` ``(k, 3)`` holds ``[first entry, rate, rule code]``
of each run of equal settings (rule codes index ``history_rules`` in the
metadata). While the session recorded the task's main figure,
``history.train_metric`` and ``history.val_metric`` hold it (NaN for the
entries without one).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import ParamLayout
from stepper.core.optimizers import RULES, fresh_state
from stepper.errors import CheckpointError
from stepper.formats import fields
from stepper.formats.checkpoint import CheckpointData

Array = NDArray[np.float64]

#: Entries of the cost history copied into the metadata for other readers.
SAMPLE_ENTRIES = 1000


@dataclass
class CostHistory:
    """The cost after each step; arrays of one length ``n`` (entry 0: the start).

    Attributes:
        steps: step count of each entry, int64.
        train: training cost.
        val: validation cost, NaN where there is none.
        rates: the rate in force.
        rules: code of the rule in force (index into :data:`stepper.core.optimizers.RULES`), uint8.
        train_metric, val_metric: the task's main figure per entry (NaN: none), or None when no
            entry has one.
    """

    steps: NDArray[np.int64]
    train: Array
    val: Array
    rates: Array
    rules: NDArray[np.uint8]
    train_metric: Array | None = None
    val_metric: Array | None = None

    def __len__(self) -> int:
        return int(self.steps.size)

    def metric_column(self, which: str) -> Array:
        """``train_metric`` or ``val_metric`` (``which``: ``train`` or ``val``), NaN where there is none."""
        column = self.train_metric if which == "train" else self.val_metric
        return np.full(len(self), np.nan) if column is None else column


def history_tensors(history: CostHistory) -> tuple[dict[str, NDArray[Any]], dict[str, Any]]:
    """The state tensors and metadata entries that store ``history`` (see the module docstring)."""
    n = len(history)
    tensors: dict[str, NDArray[Any]] = {"history.train": history.train}
    if not np.all(np.isnan(history.val)):
        tensors["history.val"] = history.val
    if not np.all(np.isnan(history.metric_column("train"))):
        tensors["history.train_metric"] = history.metric_column("train")
        tensors["history.val_metric"] = history.metric_column("val")
    idx = np.arange(n)
    new_step_run = np.ones(n, dtype=bool)
    new_step_run[1:] = history.steps[1:] != history.steps[:-1] + 1
    starts = idx[new_step_run]
    tensors["history.step_runs"] = np.stack([starts, history.steps[starts]], axis=1).astype(np.int64)
    new_setting = np.ones(n, dtype=bool)
    new_setting[1:] = (history.rates[1:] != history.rates[:-1]) | (history.rules[1:] != history.rules[:-1])
    starts = idx[new_setting]
    tensors["history.setting_runs"] = np.stack(
        [starts.astype(np.float64), history.rates[starts], history.rules[starts].astype(np.float64)], axis=1)
    pick = np.unique(np.concatenate([np.linspace(0, n - 1, min(n, SAMPLE_ENTRIES)).round().astype(np.int64),
                                     [n - 1]]))
    sample = [[int(history.steps[i]), float(history.train[i]),
               None if np.isnan(history.val[i]) else float(history.val[i]),
               float(history.rates[i]), RULES[int(history.rules[i])]] for i in pick]
    meta = {"history_length": n, "history_rules": list(RULES), "history_sample": _finite_json(sample)}
    return tensors, meta


def _finite_json(rows: list[list[Any]]) -> list[list[Any]]:
    """Infinite costs become None: JSON has no Infinity."""
    return [[None if isinstance(v, float) and not np.isfinite(v) else v for v in row] for row in rows]


@dataclass
class SavedState:
    """Everything a checkpoint restores besides the weights and the rule's memory, checked.

    Attributes:
        step_count, rate, rule, rule_t, slope_source, batch_size: the settings.
        frozen: True for frozen parameters, ``(n_params,)``.
        history: the cost history.
        batch_rng, noise_rng: numpy ``bit_generator.state`` dicts, or None (older files).
        batch_order, batch_cursor, epoch: the mini-batch epoch (order of the
            training rows ``(n_train,)``, rows used of it, epochs begun), or None
            when the file has none.
        model_digest: SHA-256 of the model file when it was saved, or None.
        rule_arrays: the rule's memory, each ``(n_params,)``.
    """

    step_count: int
    rate: float
    rule: str
    rule_t: int
    slope_source: str
    batch_size: int | None
    frozen: NDArray[np.bool_]
    history: CostHistory
    batch_rng: dict[str, Any] | None
    noise_rng: dict[str, Any] | None
    batch_order: NDArray[np.int64] | None
    batch_cursor: int
    epoch: int
    model_digest: str | None
    rule_arrays: dict[str, Array]


def read_state(path: Path, data: CheckpointData, layout: ParamLayout, n_train: int,
               slope_sources: Sequence[str]) -> SavedState:
    """Check every field of ``data``'s metadata and state tensors; CheckpointError names the first bad one."""
    meta = data.meta

    def error(message: str) -> CheckpointError:
        return CheckpointError(f"{path}: the checkpoint's metadata is incomplete or wrong ({message})")

    def get(key: str) -> Any:
        if key not in meta:
            raise error(f"no '{key}'")
        return meta[key]

    rule = fields.choice(get("rule"), RULES, error, "rule")
    wanted = fresh_state(rule, layout.size).arrays
    for key in wanted:
        if key not in data.rule_arrays:
            raise CheckpointError(f"{path}: does not fit: the {rule} rule's memory (tensors rule.{key}.*) is missing")
    rule_arrays = {key: data.rule_arrays[key] for key in wanted}
    for key, array in rule_arrays.items():
        if not np.all(np.isfinite(array)) or (key in ("v", "count") and np.any(array < 0)) \
                or (key == "count" and np.any(array != np.floor(array))):
            raise CheckpointError(f"{path}: the {rule} rule's memory rule.{key} holds a value out of range")
    frozen = np.zeros(layout.size, dtype=bool)
    frozen_names = fields.names(get("frozen"), error, "frozen")
    if frozen_names:  # (the names of a large model are built only when needed)
        for name in frozen_names:
            if name not in layout.index_of:
                raise CheckpointError(f"{path}: does not fit the model: frozen parameter {name} is not in it")
        frozen[[layout.index_of[name] for name in frozen_names]] = True
    batch = get("batch_size")
    digest = meta.get("model_digest")
    state = SavedState(
        step_count=fields.whole(get("step_count"), error, "step_count"),
        rate=fields.number(get("rate"), error, "rate", positive=True),
        rule=rule,
        rule_t=fields.whole(get("rule_t"), error, "rule_t"),
        slope_source=_slope_source(path, get("slope_source"), slope_sources),
        batch_size=None if batch is None else fields.whole(batch, error, "batch_size", 1, n_train),
        frozen=frozen,
        history=_history(path, data, error),
        batch_rng=_generator(path, meta.get("batch_rng"), "batch"),
        noise_rng=_generator(path, meta.get("noise_rng"), "noise"),
        batch_order=None,
        batch_cursor=0,
        epoch=0,
        model_digest=digest if isinstance(digest, str) else None,
        rule_arrays=rule_arrays,
    )
    order = data.extra.get("batch.order")
    if order is not None:
        if order.dtype != np.int64 or order.shape != (n_train,) \
                or not np.array_equal(np.sort(order), np.arange(n_train)):
            raise CheckpointError(f"{path}: tensor batch.order is not an order of the {n_train} training rows")
        state.batch_order = np.array(order, dtype=np.int64)
        state.batch_cursor = fields.whole(get("batch_cursor"), error, "batch_cursor", 0, n_train)
        state.epoch = fields.whole(get("epoch"), error, "epoch")
    return state


def _slope_source(path: Path, value: Any, allowed: Sequence[str]) -> str:
    if not isinstance(value, str) or value not in allowed:
        raise CheckpointError(f"{path}: unknown slope source {value!r}")
    return value


def _generator(path: Path, value: Any, what: str) -> dict[str, Any] | None:
    """A PCG64 state as numpy writes it, every number in range; None when absent."""
    if value is None:
        return None
    bad = CheckpointError(f"{path}: the checkpoint's {what} generator state is not valid")
    if not isinstance(value, dict) or set(value) != {"bit_generator", "state", "has_uint32", "uinteger"}:
        raise bad
    inner = value["state"]
    if value["bit_generator"] != "PCG64" or not isinstance(inner, dict) or set(inner) != {"state", "inc"}:
        raise bad
    for number, high in ((inner["state"], 2**128), (inner["inc"], 2**128), (value["has_uint32"], 2),
                         (value["uinteger"], 2**32)):
        if isinstance(number, bool) or not isinstance(number, int) or not 0 <= number < high:
            raise bad
    if inner["inc"] % 2 == 0:  # numpy's PCG64 increment is always odd
        raise bad
    return value


def _history(path: Path, data: CheckpointData, error: Any) -> CostHistory:
    meta = data.meta
    if meta.get("format") == 1:
        return _history_list(meta.get("history"), error)
    n = fields.whole(meta.get("history_length"), error, "history_length", 1)
    codes = fields.names(meta.get("history_rules"), error, "history_rules")
    if not codes or not set(codes) <= set(RULES):
        raise error("history_rules names an unknown rule")
    tensors = data.extra

    def tensor(name: str, dtype: Any, shape: tuple[int, ...]) -> NDArray[Any]:
        array = tensors.get(name)
        if array is None:
            raise CheckpointError(f"{path}: the cost history is incomplete (no tensor {name})")
        if array.dtype != dtype or array.shape != shape:
            raise CheckpointError(f"{path}: tensor {name} is {array.dtype} {array.shape}, expected "
                                  f"{np.dtype(dtype)} {shape}")
        return array

    train = tensor("history.train", np.float64, (n,))
    val = tensor("history.val", np.float64, (n,)) if "history.val" in tensors else np.full(n, np.nan)
    step_runs = tensors.get("history.step_runs")
    setting_runs = tensors.get("history.setting_runs")
    if step_runs is None or setting_runs is None:
        raise CheckpointError(f"{path}: the cost history is incomplete (no step or setting runs)")
    if step_runs.dtype != np.int64 or step_runs.ndim != 2 or step_runs.shape[1] != 2 \
            or setting_runs.dtype != np.float64 or setting_runs.ndim != 2 or setting_runs.shape[1] != 3:
        raise CheckpointError(f"{path}: the cost history's runs have the wrong type or shape")
    steps = _runs(path, step_runs[:, 0], n, "step")
    if np.any(step_runs[:, 1] < 0):
        raise CheckpointError(f"{path}: the cost history holds a negative step")
    lengths = np.diff(np.append(steps, n))
    step_values = np.repeat(step_runs[:, 1], lengths) + (np.arange(n) - np.repeat(steps, lengths))
    starts = setting_runs[:, 0]
    if not np.all(starts == np.floor(starts)):
        raise CheckpointError(f"{path}: the cost history's setting runs start at entries that are not whole")
    setting_starts = _runs(path, starts.astype(np.int64), n, "setting")
    rates, rule_codes = setting_runs[:, 1], setting_runs[:, 2]
    if not (np.all(np.isfinite(rates)) and np.all(rates > 0)):
        raise CheckpointError(f"{path}: the cost history holds a rate that is not a positive number")
    if not (np.all(rule_codes == np.floor(rule_codes)) and np.all((rule_codes >= 0) & (rule_codes < len(codes)))):
        raise CheckpointError(f"{path}: the cost history holds an unknown rule code")
    ours = np.array([RULES.index(name) for name in codes], dtype=np.uint8)[rule_codes.astype(np.int64)]
    lengths = np.diff(np.append(setting_starts, n))
    _costs(path, train, val)
    metrics = [tensor(f"history.{which}_metric", np.float64, (n,)) if f"history.{which}_metric" in tensors
               else None for which in ("train", "val")]
    for column in metrics:
        if column is not None and np.any(np.isinf(column)):
            raise CheckpointError(f"{path}: the cost history's figures hold an infinite value")
    # (train, val and the figures are the reader's own arrays already: no copy)
    return CostHistory(step_values.astype(np.int64), train, val, np.repeat(rates, lengths), np.repeat(ours, lengths),
                       metrics[0], metrics[1])


def _runs(path: Path, starts: NDArray[np.int64], n: int, what: str) -> NDArray[np.int64]:
    if starts.size == 0 or starts[0] != 0 or np.any(np.diff(starts) <= 0) or starts[-1] >= n:
        raise CheckpointError(f"{path}: the cost history's {what} runs do not cover its {n} entries in order")
    return starts


def _costs(path: Path, train: Array, val: Array) -> None:
    # A cost is a number or +inf (a manual change can overflow it); never NaN or negative infinity.
    if np.any(np.isnan(train)) or np.any(train == -np.inf) or np.any(val == -np.inf):
        raise CheckpointError(f"{path}: the cost history holds a cost that is not a number")


def _history_list(value: Any, error: Any) -> CostHistory:
    """Format 1: ``[[step, train, val or null, rate, rule], ...]``."""
    if not isinstance(value, list) or not value:
        raise error("the cost history is empty" if value == [] else "the cost history is not a list")
    n = len(value)
    steps = np.empty(n, dtype=np.int64)
    train, val, rates = np.empty(n), np.empty(n), np.empty(n)
    rules = np.empty(n, dtype=np.uint8)
    for i, row in enumerate(value):
        where = f"history[{i}]"
        if not isinstance(row, list) or len(row) != 5:
            raise error(f"{where} is not [step, train cost, validation cost, rate, rule]")
        steps[i] = fields.whole(row[0], error, where + " step")
        train[i] = fields.number(row[1], error, where + " train cost")
        val[i] = np.nan if row[2] is None else fields.number(row[2], error, where + " validation cost")
        rates[i] = fields.number(row[3], error, where + " rate", positive=True)
        rules[i] = RULES.index(fields.choice(row[4], RULES, error, where + " rule"))
    return CostHistory(steps, train, val, rates, rules)
