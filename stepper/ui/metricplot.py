"""The metric plot beside the cost: the task's main figure per step, training and validation.

Accuracy for a classifier, R^2 for regression (:func:`stepper.core.metrics.main_figure`).
The figure is recorded in the cost history while the plot is shown (the
session's ``track_metrics``): steps made while it was hidden have none, and
the title says from which step on it is known. Drawn like the cost plot
(``*`` train, ``o`` validation, the current step marked).
"""

from __future__ import annotations

import numpy as np

from stepper.ui.costplot import TRAIN_MARK, VAL_MARK, CostPlot, Curves
from stepper.ui.snapshot import Snapshot

LABEL = {"classes": "accuracy", "binary": "accuracy", "regression": "R2"}


class MetricPlot(CostPlot):
    """The main figure per step; the app feeds it snapshots while it is shown."""

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self.label = "figure"
        #: The first step with a recorded figure, or None.
        self.since: int | None = None

    def show(self, snap: Snapshot) -> None:
        self.label = LABEL.get(snap.task, "figure")
        known = np.flatnonzero(np.isfinite(snap.train_metric))
        self.since = int(snap.steps[known[0]]) if known.size else None
        self.curves = Curves(snap.steps, snap.train_metric, snap.val_metric, snap.step_count)
        self._set_title()
        self.replot()

    def has_data(self) -> bool:
        return self.curves is not None and bool(np.isfinite(self.curves.train).any())

    def _set_title(self) -> None:
        since = getattr(self, "since", None)  # CostPlot's constructor sets the title before ours runs
        known = "recorded from the next step on" if since is None else f"recorded since step {since}"
        self.border_title = f"{getattr(self, 'label', 'figure')}  {TRAIN_MARK} train  {VAL_MARK} validation | {known}"
