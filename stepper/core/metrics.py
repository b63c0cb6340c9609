"""Figures of how well a network does its task, besides the cost.

The task follows from the model (:func:`task_of`):

- ``classes`` (a softmax output, or categorical cross-entropy): each row's class
  is its largest target and its prediction the largest output. Accuracy is the
  share of rows whose prediction is their class; the confusion matrix counts
  rows by true class (rows of the matrix) and predicted class (columns), as
  scikit-learn's ``confusion_matrix`` does.
- ``binary`` (binary cross-entropy): each output is a yes/no label of its own.
  An output says yes when it is at least :data:`THRESHOLD` (0.5, the output
  being a probability; common practice), and a target counts as yes when it is
  at least 0.5. Accuracy is the share of rows whose every label is right (with
  one output, the share of right answers); precision ``TP / (TP + FP)`` and recall
  ``TP / (TP + FN)`` count over all outputs together ("micro" averaging), and
  the 2 x 2 confusion matrix ``[[TN, FP], [FN, TP]]`` sums them too. A
  precision or recall with nothing to count (no yes predicted, no yes in the
  targets) is NaN: undefined, not 0.
- ``regression`` (anything else): R^2, ``1 - SS_res / SS_tot`` per output,
  averaged over outputs (NaN for an output whose targets are all equal), and
  the mean absolute error over all outputs.

Every figure is computed over whole arrays, never a loop over rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import Dense
from stepper.core.network import Network

Array = NDArray[np.float64]

TASKS = ("classes", "binary", "regression")

#: An output at or above this says yes (a probability; common practice, no published source).
THRESHOLD = 0.5


def task_of(net: Network) -> str:
    """``classes``, ``binary`` or ``regression``, from the loss and the output activation."""
    last = net.layers[-1]
    softmax = isinstance(last, Dense) and last.activation.name == "softmax"
    if net.loss == "categorical_cross_entropy" or softmax:
        return "classes"
    if net.loss == "binary_cross_entropy":
        return "binary"
    return "regression"


@dataclass(frozen=True)
class Metrics:
    """The figures of one set of rows; those that do not apply to the task are None.

    Attributes:
        task: one of :data:`TASKS`.
        n: number of rows.
        accuracy: share of rows right (``classes``, ``binary``).
        confusion: counts, true by predicted: ``(n_classes, n_classes)`` for
            ``classes``, ``(2, 2)`` for ``binary``.
        precision, recall: ``binary`` only (NaN when undefined).
        r2, mae: ``regression`` only.
        threshold: the yes threshold (``binary``).
    """

    task: str
    n: int
    accuracy: float | None = None
    confusion: NDArray[np.int64] | None = None
    precision: float | None = None
    recall: float | None = None
    r2: float | None = None
    mae: float | None = None
    threshold: float | None = None

    def figures(self) -> dict[str, float]:
        """The scalar figures that apply, by name (for status lines and plots)."""
        names = ("accuracy", "precision", "recall", "r2", "mae")
        return {name: float(getattr(self, name)) for name in names if getattr(self, name) is not None}


#: The one figure that sums up each task (what the app plots beside the cost).
MAIN_FIGURE = {"classes": "accuracy", "binary": "accuracy", "regression": "r2"}


def main_figure(m: Metrics) -> float:
    """The task's main figure of ``m``: accuracy, or R^2 for regression (NaN when undefined)."""
    value = getattr(m, MAIN_FIGURE[m.task])
    return float("nan") if value is None else float(value)


def predicted_labels(task: str, output: Array, threshold: float = THRESHOLD) -> NDArray[np.int64]:
    """Per row, the predicted class (``classes``, ``(n,)``) or yes/no labels (``binary``, ``(n, m)``)."""
    if task == "classes":
        return np.argmax(output, axis=-1).astype(np.int64)
    return (output >= threshold).astype(np.int64)


def true_labels(task: str, target: Array) -> NDArray[np.int64]:
    """Per row, the true class (``classes``, ``(n,)``) or yes/no labels (``binary``, ``(n, m)``)."""
    if task == "classes":
        return np.argmax(target, axis=-1).astype(np.int64)
    return (target >= 0.5).astype(np.int64)


def metrics(task: str, output: Array, target: Array, threshold: float = THRESHOLD) -> Metrics:
    """The figures for outputs and targets of shape ``(n_samples, n_outputs)``."""
    n = int(output.shape[0])
    if task == "classes":
        k = output.shape[1]
        true = true_labels(task, target)
        pred = predicted_labels(task, output)
        confusion = np.bincount(true * k + pred, minlength=k * k).reshape(k, k).astype(np.int64)
        accuracy = float(np.mean(true == pred)) if n else float("nan")
        return Metrics(task, n, accuracy=accuracy, confusion=confusion)
    if task == "binary":
        truth = true_labels(task, target).astype(bool)
        said = predicted_labels(task, output, threshold).astype(bool)
        tp = int(np.count_nonzero(truth & said))
        fp = int(np.count_nonzero(~truth & said))
        fn = int(np.count_nonzero(truth & ~said))
        tn = int(np.count_nonzero(~truth & ~said))
        accuracy = float(np.mean(np.all(truth == said, axis=1))) if n else float("nan")
        return Metrics(task, n, accuracy=accuracy, confusion=np.array([[tn, fp], [fn, tp]], dtype=np.int64),
                       precision=_ratio(tp, tp + fp), recall=_ratio(tp, tp + fn), threshold=float(threshold))
    if task != "regression":
        raise ValueError(f"unknown task {task!r}")
    if n == 0:
        return Metrics(task, 0, r2=float("nan"), mae=float("nan"))
    residual = np.sum((target - output) ** 2, axis=0)
    spread = np.sum((target - target.mean(axis=0)) ** 2, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        per_output = np.where(spread > 0, 1.0 - residual / np.where(spread > 0, spread, 1.0), np.nan)
    r2 = float(np.mean(per_output)) if not np.any(np.isnan(per_output)) else float("nan")
    return Metrics(task, n, r2=r2, mae=float(np.mean(np.abs(target - output))))


def _ratio(part: int, whole: int) -> float:
    return part / whole if whole else float("nan")


def metrics_document(m: Metrics) -> dict[str, object]:
    """The figures as a JSON-ready object (NaN becomes null)."""
    doc: dict[str, object] = {"rows": m.n}
    for name, value in m.figures().items():
        doc[name] = value if np.isfinite(value) else None
    if m.confusion is not None:
        doc["confusion"] = m.confusion.tolist()
    if m.threshold is not None:
        doc["threshold"] = m.threshold
    return doc
