"""A read-only picture of the session, taken once per refresh, from which a frame is drawn.

The session is the only owner of model state. The widgets never keep it: the
app takes a :class:`Snapshot` after every operation (and, during a run, from
inside ``call_from_thread`` while the worker thread waits), and hands it to the
widgets, which draw from it and drop the previous one. Taking the picture in
one place means that a frame is consistent even while a worker thread is
stepping the session, and that no widget ever calls the session.

Every per-parameter array has shape ``(n_params,)``. The weights and the
frozen mask, which the session changes in place, are copies; the slopes and a
check's numbers, which it replaces but never changes, are shared as read-only
views (copying a million of each per frame cost more than drawing it); the
names and layer numbers are the layout's own (they never change).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable

import numpy as np
from numpy.typing import NDArray

from stepper.core.compare import VERDICTS
from stepper.core.names import WeightNames
from stepper.core.schedules import CONSTANT, Schedule
from stepper.errors import StepperError
from stepper.formats.custom_layer import CustomLayer
from stepper.scenarios import scenarios_root

if TYPE_CHECKING:
    from stepper.core.gradcheck import CheckResult
    from stepper.session import History, Session, SetMetrics

Array = NDArray[np.float64]

#: Verdict codes, ordered by severity so that sorting by code puts the worst first.
NO_VERDICT = 0
VERDICT_CODE = {"agree": 1, "kink": 2, "unresolved": 3, "doubtful": 4, "disagree": 5}
#: How each verdict reads in the table: a word, so it needs no colour (the same words as ``stepper check``).
VERDICT_TEXT = {NO_VERDICT: "-", 1: "agree", 2: "kink", 3: "unresolved", 4: "doubtful", 5: "disagree"}
#: What the verdict column says for a numeric slope computed before the weights last changed.
STALE_TEXT = "stale"
VERDICT_NAME = {code: name for name, code in VERDICT_CODE.items()}


@dataclass(frozen=True)
class Snapshot:
    """The session at one moment.

    Attributes:
        name: the model's label.
        source: the model file as the screen names it (see :func:`shown_path`).
        code: the Python files of the model's custom layers, whose code Stepper runs.
        names: parameter names in flat order.
        layer: 0-based layer of each parameter, int.
        value: current values.
        analytic: slopes by backpropagation at the current values.
        numeric: slopes by finite differences from the last check (NaN when none).
        rel_error: relative error from the last check (NaN when none).
        verdict: verdict codes (:data:`VERDICT_CODE`, 0 when none), int8.
        frozen: True where the parameter is frozen.
        has_check: a numeric check has been run.
        n_checked: how many parameters the last check computed (a large model's starts with a sample).
        stale: the weights changed since the last check.
        steps, train, val: the cost history; ``val`` is NaN where there is none.
        step_count, rate, rule, slope_source, batch_size: the descent settings.
        train_cost, val_cost: the current costs.
        counts: number of parameters per verdict of the last check.
        last_action: the session's description of its last operation.
        dirty: changes since the last save or load.
        can_undo, can_redo: whether undo and redo have a level to apply.
        undo_levels: how many levels undo has (the oldest are dropped past the session's memory budget).
        version: the session's parameter version (changes whenever a weight does).
        problem: why the slopes or costs could not be computed (a custom layer raised, say);
            the missing numbers are NaN. None when all is well.
        task: ``classes``, ``binary`` or ``regression`` (:func:`stepper.core.metrics.task_of`).
        metrics: the task's figures on the training and validation rows now (None when they
            could not be computed).
        train_metric, val_metric: the task's main figure per history entry, NaN where not tracked.
        l2, penalty: the L2 strength and the L2 term's part of the training cost.
        weight_decay, clip_norm, schedule, scheduled_rate: the other training settings, and the
            rate the next step will use.
    """

    name: str
    source: str
    code: tuple[str, ...]
    names: WeightNames
    layer: NDArray[np.int64]
    n_layers: int
    value: Array
    analytic: Array
    numeric: Array
    rel_error: Array
    verdict: NDArray[np.int8]
    frozen: NDArray[np.bool_]
    has_check: bool
    n_checked: int
    stale: bool
    steps: NDArray[np.int64]
    train: Array
    val: Array
    step_count: int
    rate: float
    rule: str
    slope_source: str
    batch_size: int | None
    train_cost: float
    val_cost: float | None
    counts: dict[str, int]
    last_action: str | None
    dirty: bool
    can_undo: bool
    can_redo: bool
    undo_levels: int
    version: int
    problem: str | None
    task: str = "regression"
    metrics: SetMetrics | None = None
    train_metric: Array = field(default_factory=lambda: np.zeros(0))
    val_metric: Array = field(default_factory=lambda: np.zeros(0))
    l2: float = 0.0
    penalty: float = 0.0
    weight_decay: float = 0.0
    clip_norm: float | None = None
    schedule: Schedule = CONSTANT
    scheduled_rate: float = 0.0

    @property
    def n_params(self) -> int:
        return len(self.names)


def verdict_codes(verdict: NDArray[Any]) -> NDArray[np.int8]:
    """Verdict strings ``(n_params,)`` to codes; unknown or empty strings give 0."""
    codes = np.zeros(verdict.shape, dtype=np.int8)
    for name, code in VERDICT_CODE.items():
        codes[verdict == name] = code
    return codes


class HistoryArrays:
    """The cost history as arrays, copying only the entries added since the last call.

    A long run leaves millions of entries; copying them all on every refresh
    would cost milliseconds. The session's :class:`~stepper.session.History`
    keeps its entries in arrays and changes its ``generation`` whenever it cuts
    or replaces them (undo, load): while the generation holds, the entries
    copied before are still in place.
    """

    def __init__(self) -> None:
        self._generation: tuple[int, int] | None = None
        self._steps = np.zeros(0, dtype=np.int64)
        self._train = np.zeros(0)
        self._val = np.zeros(0)
        self._train_metric = np.zeros(0)
        self._val_metric = np.zeros(0)

    def arrays(self, history: History) -> tuple[NDArray[np.int64], Array, Array]:
        """``(steps, train, val)`` for ``history``; ``val`` is NaN where there is none."""
        n = self._steps.size
        key = (id(history), history.generation)
        if key != self._generation or n > len(history):
            n = 0
            self._steps, self._train, self._val = np.zeros(0, dtype=np.int64), np.zeros(0), np.zeros(0)
            self._train_metric, self._val_metric = np.zeros(0), np.zeros(0)
        if len(history) > n:
            new = history.columns(n)
            self._steps = np.concatenate([self._steps, new.steps])
            self._train = np.concatenate([self._train, new.train])
            self._val = np.concatenate([self._val, new.val])
            self._train_metric = np.concatenate([self._train_metric, new.metric_column("train")])
            self._val_metric = np.concatenate([self._val_metric, new.metric_column("val")])
        self._generation = key
        return self._steps, self._train, self._val

    def metric_arrays(self) -> tuple[Array, Array]:
        """The main figure per entry, ``(train, val)``, as of the last :meth:`arrays` call (NaN: none)."""
        return self._train_metric, self._val_metric



def take(session: Session, history: HistoryArrays | None = None) -> Snapshot:
    """Copy what the screen shows out of ``session``. Call it on the app's thread only.

    ``history`` keeps the cost history's arrays between calls (pass the same one
    each time for one session); without it they are built afresh.
    """
    net = session.net
    layout = net.layout
    n = net.n_params
    check = session.check
    numeric, rel, codes, counts, n_checked = _check_arrays(check, n)
    arrays = history or HistoryArrays()
    steps, train, val = arrays.arrays(session.history)
    train_metric, val_metric = arrays.metric_arrays()
    # A custom layer's code may raise at these weights: the frame still draws, with NaN
    # where a number is missing and the message in ``problem`` (never a crash of the app).
    problems: list[str] = []
    analytic = _or_nan(session.analytic_slopes, np.full(n, np.nan), problems)
    train_cost = _or_nan(session.train_cost, np.nan, problems)
    val_cost = _or_nan(session.val_cost, np.nan, problems)
    metrics = _or_nan(session.metrics, None, problems)
    penalty = _or_nan(session.penalty, np.nan, problems)
    return Snapshot(
        name=session.setup.name,
        source=_shown_path(str(session.setup.path), os.getcwd()),
        code=tuple(dict.fromkeys(layer.path.name for layer in net.layers if isinstance(layer, CustomLayer))),
        names=layout.names,
        layer=layout.layer_index,
        n_layers=len(net.layers),
        value=np.array(session.theta, dtype=np.float64),
        analytic=_read_only(analytic),
        numeric=numeric,
        rel_error=rel,
        verdict=codes,
        frozen=np.array(session.frozen, dtype=bool),
        has_check=check is not None,
        n_checked=n_checked,
        stale=bool(check is not None and session.check_is_stale),
        steps=steps,
        train=train,
        val=val,
        step_count=int(session.step_count),
        rate=float(session.rate),
        rule=str(session.rule),
        slope_source=str(session.slope_source),
        batch_size=session.batch_size,
        train_cost=float(train_cost),
        val_cost=None if val_cost is None else float(val_cost),
        counts=counts,
        last_action=session.last_action,
        dirty=bool(session.dirty),
        can_undo=bool(session.can_undo),
        can_redo=bool(session.can_redo),
        undo_levels=int(session.undo_levels),
        version=int(session.version),
        problem=problems[0] if problems else None,
        task=session.task,
        metrics=metrics,
        train_metric=train_metric,
        val_metric=val_metric,
        l2=float(session.l2),
        penalty=float(penalty),
        weight_decay=float(session.weight_decay),
        clip_norm=session.clip_norm,
        schedule=session.schedule,
        scheduled_rate=float(session.scheduled_rate()),
    )


def shown_path(path: Path, cwd: Path | None = None) -> str:
    """A model file as the screen names it: a bundled scenario by its folder, a file under the
    current folder relative to it, one under the home folder from ``~``, anything else in full."""
    path = Path(path)
    cwd = Path.cwd() if cwd is None else cwd
    try:
        path = path.resolve()
        if path.is_relative_to(scenarios_root().resolve()):
            return f"bundled {path.parent.name}/{path.name}"
        if path.is_relative_to(cwd.resolve()):
            return str(path.relative_to(cwd.resolve()))
        home = Path.home().resolve()
        if path.is_relative_to(home):
            return "~/" + str(path.relative_to(home))
    except (OSError, RuntimeError):
        pass
    return str(path)


@lru_cache(maxsize=8)
def _shown_path(path: str, cwd: str) -> str:
    """:func:`shown_path`, kept: the model's path does not change between frames."""
    return shown_path(Path(path), Path(cwd))


#: The arrays of the last check drawn, and what they were drawn from (compared by identity).
_drawn_check: list[Any] = [None, None]


def _check_arrays(check: CheckResult | None, n: int) -> tuple[Array, Array, NDArray[np.int8], dict[str, int], int]:
    """``(numeric, rel_error, verdict codes, counts, n_checked)`` of ``check``, read-only.

    A check's arrays are never changed once made (a new check is a new object),
    so they are shown as they are, and their verdict codes are worked out once
    per check rather than once per frame (a million strings compared four times
    each took tens of milliseconds).
    """
    if check is None:
        nothing = _read_only(np.full(n, np.nan))
        return nothing, nothing, _read_only(np.zeros(n, dtype=np.int8)), {v: 0 for v in VERDICTS}, 0
    if _drawn_check[0] is not check:
        codes = _read_only(verdict_codes(np.asarray(check.verdict)))
        counts = {name: int(np.count_nonzero(codes == VERDICT_CODE[name])) for name in VERDICTS}
        _drawn_check[:] = [check, (_read_only(check.numeric), _read_only(check.rel_error), codes, counts,
                                   int(np.count_nonzero(codes)))]
    numeric, rel, codes, counts, n_checked = _drawn_check[1]
    return numeric, rel, codes, dict(counts), n_checked


def _read_only(values: Any) -> Any:
    """A read-only view of ``values`` (float64 or int8 arrays are not copied)."""
    view = np.asarray(values).view()
    view.flags.writeable = False
    return view


def _or_nan(compute: Callable[[], Any], missing: Any, problems: list[str]) -> Any:
    """``compute()``, or ``missing`` when it raises a StepperError (its message goes to ``problems``)."""
    try:
        return compute()
    except StepperError as exc:
        problems.append(exc.message)
        return missing
