"""Wording of the training figures (metrics, settings, range tests, comparisons), shared by commands and the app.

Plain strings built from the core's results; the core computes and never words.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from stepper.core.descent import Descent
from stepper.core.metrics import Metrics, predicted_labels, true_labels
from stepper.core.ratetest import RangeResult
from stepper.core.schedules import Schedule
from stepper.core.weightdiff import WeightDiff

#: Short labels of the metrics, in the order they are shown.
LABELS = {"accuracy": "accuracy", "precision": "precision", "recall": "recall", "r2": "R2", "mae": "MAE"}


def number(value: float | None, digits: int = 4) -> str:
    """A figure in ``digits`` significant digits, ``-`` when undefined."""
    if value is None or not math.isfinite(value):
        return "-"
    return f"{value:.{digits}g}"


def finite_or_none(value: float) -> float | None:
    """``value``, or None when it is NaN or infinite (for JSON)."""
    return value if math.isfinite(value) else None


def metric_words(m: Metrics | None, short: bool = False) -> str:
    """``accuracy 0.8333, precision 0.8, recall 0.75`` (or ``acc 0.833 ...`` when short)."""
    if m is None:
        return "-"
    parts = []
    for name, value in m.figures().items():
        label = LABELS[name] if not short else {"accuracy": "acc", "precision": "prec", "recall": "rec"}.get(
            name, LABELS[name])
        parts.append(f"{label} {number(value, 3 if short else 4)}")
    return ", ".join(parts)


def row_words(task: str, names: Sequence[str], output: np.ndarray, target: np.ndarray) -> tuple[str, str]:
    """One row's prediction and target in words: ``marsh (0.812)`` and ``ridge`` for classes,
    ``0.917+`` and ``no`` for yes/no outputs, the numbers for regression. ``names``: the outputs."""
    if task == "classes":
        said = int(predicted_labels(task, output[None, :])[0])
        true = int(true_labels(task, target[None, :])[0])
        return f"{names[said]} ({output[said]:.3f})", names[true]
    if task == "binary":
        yes = predicted_labels(task, output[None, :])[0]
        truth = true_labels(task, target[None, :])[0]
        pred = " ".join(f"{v:.3f}{'+' if y else '-'}" for v, y in zip(output, yes))
        return pred, " ".join("yes" if t else "no" for t in truth)
    return " ".join(f"{v:.4g}" for v in output), " ".join(f"{v:.4g}" for v in target)


def confusion_lines(m: Metrics, class_names: Sequence[str]) -> list[str]:
    """The confusion matrix as text: true classes down, predicted across."""
    if m.confusion is None:
        return []
    names = list(class_names) if m.task == "classes" else ["no", "yes"]
    width = max(6, *(len(n) for n in names), len(str(int(m.confusion.max(initial=0)))))
    lines = [" " * (width + 8) + "predicted", f"{'true':<{width + 2}}      " + " ".join(n.rjust(width) for n in names)]
    for name, row in zip(names, m.confusion):
        lines.append(f"  {name:<{width}}      " + " ".join(str(int(c)).rjust(width) for c in row))
    return lines


def settings_words(l2: float, descent: Descent, rate: float | None = None, step: int | None = None) -> str:
    """``L2 1e-4, decay 0.01, clip 1, schedule cosine:steps=100`` (only what is set), or ``""``."""
    parts = []
    if l2:
        parts.append(f"L2 {l2:g}")
    if descent.weight_decay:
        parts.append(f"decay {descent.weight_decay:g}")
    if descent.clip_norm is not None:
        parts.append(f"clip {descent.clip_norm:g}")
    if descent.schedule.kind != "constant":
        parts.append(schedule_words(descent.schedule, rate, step))
    return ", ".join(parts)


def schedule_words(schedule: Schedule, rate: float | None = None, step: int | None = None) -> str:
    """``cosine:steps=100 (x 0.62 at step 40: rate 0.062)``."""
    if rate is None or step is None:
        return schedule.text()
    factor = schedule.factor_at(step)
    return f"{schedule.text()} (x {factor:.3g} at step {step}: rate {rate * factor:.3g})"


def range_lines(result: RangeResult) -> list[str]:
    """The range test as a table, the best rate marked."""
    best = result.best
    lines = [f"{result.steps} steps at each of {result.rates.size} rates, from train cost {result.start_cost:.6g}",
             f"{'rate':>12} {'train cost':>14} {'validation':>14}"]
    for k, rate in enumerate(result.rates):
        train = result.train[k]
        val = None if result.val is None else result.val[k]
        if result.diverged_at[k] is not None:
            cost = f"diverged at step {result.diverged_at[k]}"
            lines.append(f"{rate:>12.4g} {cost:>29}")
            continue
        mark = "  <- lowest" if k == best else ""
        lines.append(f"{rate:>12.4g} {number(train, 8):>14} {number(val, 8):>14}{mark}")
    if best is None:
        lines.append("every rate diverged or was not reached: try lower rates")
    return lines


def diff_lines(d: WeightDiff, names: Sequence[str], label_a: str, label_b: str) -> list[str]:
    """The comparison of two sets of weights as text."""
    lines = [f"a = {label_a}", f"b = {label_b}", "",
             f"{'':<12}{'a':>16}{'b':>16}",
             f"{'train cost':<12}{d.cost_a:>16.8g}{d.cost_b:>16.8g}"]
    if d.val_a is not None and d.val_b is not None:
        lines.append(f"{'validation':<12}{d.val_a:>16.8g}{d.val_b:>16.8g}")
    labels = [f"L{move.index + 1} {move.label}"[:40] for move in d.layers]
    width = max([24] + [len(label) + 1 for label in labels])  # a whole label, up to 40 characters
    lines += ["", f"change b - a: norm {d.change_norm:.4g}",
              f"{'layer':<{width}}{'|b - a|':>12}{'|a|':>12}{'|b|':>12}{'|b-a|/|a|':>12}"]
    for label, move in zip(labels, d.layers):
        lines.append(f"{label:<{width}}{move.change:>12.4g}"
                     f"{move.before:>12.4g}{move.after:>12.4g}{number(move.relative):>12}")
    lines += ["", f"cosine of the change with the slope at b: {number(d.cosine_b, 3)}; at a: {number(d.cosine_a, 3)}",
              "  (-1: the change went straight downhill along that slope; 0: unrelated to it; +1: uphill)"]
    if d.moved.size:
        lines += ["", "moved most:"]
        for i in d.moved:
            lines.append(f"  {names[i]:<16} {float(d.a[i]):>12.6g} -> {float(d.b[i]):<12.6g} "
                         f"({float(d.b[i] - d.a[i]):+.4g})")
    else:
        lines += ["", "no weight moved"]
    return lines
