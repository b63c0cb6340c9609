"""Read-only figures of a session's current state: row losses, metrics, histograms, comparison with a checkpoint.

None of these changes anything; the row losses and metrics are cached
against the parameters' version, like the costs.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from stepper.core.histograms import DEFAULT_BINS, LayerSpread, layer_spreads
from stepper.core.metrics import THRESHOLD, Metrics, main_figure, metrics, task_of
from stepper.core.rows import RowLosses, row_losses
from stepper.core.weightdiff import Nets, WeightDiff, compare_weights
from stepper.formats.checkpoint import load_checkpoint
from stepper.formats.saved_state import read_state
from stepper.session.core import SLOPE_SOURCES, SessionCore


SPLITS = ("both", "train", "validation")


@dataclass(frozen=True)
class RowTable:
    """Rows of the training set, the validation set or both, training rows first.

    Attributes:
        loss: each row's loss, ``(n,)``.
        output, target: ``(n, n_outputs)``.
        validation: True for a validation row, ``(n,)``.
        index: the row's number within its own set (training rows are the samples the slopes sum over), ``(n,)``.
        line: the row's line in the data file (the header is line 1), ``(n,)``.
    """

    loss: NDArray[np.float64]
    output: NDArray[np.float64]
    target: NDArray[np.float64]
    validation: NDArray[np.bool_]
    index: NDArray[np.int64]
    line: NDArray[np.int64]

    @property
    def n(self) -> int:
        return int(self.loss.size)


@dataclass(frozen=True)
class SetMetrics:
    """Metrics of the training rows and, when there are any, of the validation rows."""

    train: Metrics
    validation: Metrics | None


class Measures(SessionCore):
    """Row losses, metrics, layer histograms, and the comparison with a checkpoint."""

    @property
    def task(self) -> str:
        """``classes``, ``binary`` or ``regression`` (:func:`stepper.core.metrics.task_of`)."""
        return task_of(self.net)

    def rows(self, validation: bool = False) -> RowLosses:
        """Loss, output and target of every training (or validation) row.

        The training rows run as the training cost does (the next step's dropout
        masks, batch statistics), the validation rows as the validation cost
        (no dropout, batch norm's running statistics), so each split's mean row
        loss is its cost's data term.
        """
        data = self.setup.data
        X, Y = (data.X_val, data.Y_val) if validation else (data.X, data.Y)
        # Each split's rows run as its cost does: training at the step's masks, validation in evaluation.
        net = self.evaluation_net() if validation else self.training_net()
        result: RowLosses = self._cached("rows-val" if validation else "rows",
                                         lambda: row_losses(net, self.theta, X, Y))
        return result

    def row_table(self, split: str = "both") -> RowTable:
        """Every row of ``split`` (one of :data:`SPLITS`) with its loss, output, target and place."""
        if split not in SPLITS:
            raise ValueError(split)
        data = self.setup.data
        parts = []
        if split in ("both", "train"):
            parts.append((self.rows(), False, data.train_lines))
        if split in ("both", "validation") and data.n_val:
            parts.append((self.rows(validation=True), True, data.val_lines))
        m = self.net.n_outputs
        if not parts:
            return RowTable(np.empty(0), np.empty((0, m)), np.empty((0, m)), np.empty(0, dtype=bool),
                            np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64))
        return RowTable(
            np.concatenate([r.loss for r, _, _ in parts]),
            np.concatenate([r.output for r, _, _ in parts]),
            np.concatenate([r.target for r, _, _ in parts]),
            np.concatenate([np.full(r.n, v) for r, v, _ in parts]),
            np.concatenate([np.arange(r.n, dtype=np.int64) for r, _, _ in parts]),
            np.concatenate([np.asarray(lines, dtype=np.int64) for _, _, lines in parts]),
        )

    def set_track_metrics(self, on: bool) -> None:
        """Record the task's main figure in every new history entry (costs a forward pass per step)."""
        self.track_metrics = bool(on)

    def _main_figures(self) -> tuple[float | None, float | None]:
        found = self.metrics()
        val = None if found.validation is None else main_figure(found.validation)
        return main_figure(found.train), val

    def metrics(self, threshold: float = THRESHOLD) -> SetMetrics:
        """Task metrics on the training and validation rows."""
        def compute() -> SetMetrics:
            train = self.rows()
            val = self.rows(validation=True) if self.setup.data.n_val else None
            return SetMetrics(metrics(self.task, train.output, train.target, threshold),
                              None if val is None else metrics(self.task, val.output, val.target, threshold))

        result: SetMetrics = self._cached(f"metrics-{threshold!r}", compute)
        return result

    def spreads(self, bins: int = DEFAULT_BINS) -> list[LayerSpread]:
        """Histograms of each layer's weights, slopes, last updates and activations (training rows)."""
        return layer_spreads(self.training_net(), self.theta, self.analytic_slopes(), self.last_update, self.setup.data.X,
                             bins)

    def checkpoint_weights(self, path: Path | str) -> NDArray[np.float64]:
        """The weights of the checkpoint at ``path``, checked against the model; nothing is loaded."""
        return self.checkpoint_side(path)[0]

    def checkpoint_side(self, path: Path | str) -> tuple[NDArray[np.float64], Nets]:
        """The checkpoint's weights ``(n_params,)`` and its networks (its step's dropout masks, its
        running statistics), checked against the model; nothing is loaded."""
        path = Path(path)
        data = load_checkpoint(path, self.net.layout, self.net.state_layout, digest=False)
        if not (self.net.varies_by_step or self.net.has_state):
            return data.theta, (self.net, self.net)
        saved = read_state(path, data, self.net.layout, self.setup.data.n_train, SLOPE_SOURCES)
        return data.theta, self.nets_at(saved.step_count, data.state)

    def nets_at(self, step: int, state: NDArray[np.float64]) -> Nets:
        """The network as it trains at update ``step`` and as it is evaluated, with kept arrays ``state``."""
        return self.net.at(True, step, state), self.net.at(False, step, state)

    def compare_with(self, path: Path | str, top: int = 10) -> WeightDiff:
        """The checkpoint at ``path`` (as ``a``) against the current weights (as ``b``)."""
        theta, nets = self.checkpoint_side(path)
        return self.compare_to(theta, top=top, nets_a=nets)

    def compare_to(self, a: NDArray[np.float64], b: NDArray[np.float64] | None = None, top: int = 10,
                   nets_a: Nets | None = None) -> WeightDiff:
        """Weights ``a`` against ``b`` (default: the current weights), both ``(n_params,)``.

        ``b`` runs through the session's current networks; ``a`` through ``nets_a``
        (default: the starting ones, step 0 and the initial running statistics).
        """
        data = self.setup.data
        b = self.theta.copy() if b is None else b
        start = nets_a or self.nets_at(0, self.net.initial_state())
        return compare_weights(self.net, a, b, data.X, data.Y, data.X_val, data.Y_val, top,
                               nets_a=start, nets_b=(self.training_net(), self.evaluation_net()))
