"""The comparison panel: the current weights against a saved checkpoint.

From :func:`stepper.core.weightdiff.compare_weights` (the checkpoint as ``a``,
the current weights as ``b``): the cost of each, each layer's norm of change,
the cosine between the change and the current slope, and as many of the
weights that moved most as fit. The wording is :func:`stepper.training_report.diff_lines`,
the same as ``stepper diff``.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from stepper.core.weightdiff import WeightDiff
from stepper.training_report import diff_lines
from stepper.ui.panels import FiguresPanel


@dataclass(frozen=True)
class CompareFigures:
    """A comparison and what it compares.

    Attributes:
        path: the checkpoint (``a``).
        diff: the comparison with the current weights (``b``).
        names: every weight's name, in flat order.
    """

    path: Path
    diff: WeightDiff
    names: Sequence[str]


def compare_lines(f: CompareFigures, height: int) -> list[str]:
    """The comparison's text, the list of weights that moved most cut to fit ``height`` lines."""
    lines = diff_lines(f.diff, f.names, str(f.path), "the current weights")[3:]  # the panel's title names a, b
    if "moved most:" in lines and len(lines) > height > 0:
        head = lines.index("moved most:")
        keep = max(head + 2, height)
        lines = lines[:keep]
    return lines


class ComparePanel(FiguresPanel[CompareFigures]):
    """The comparison with a checkpoint; the app feeds it after every change of the weights."""

    def figures_title(self, figures: CompareFigures) -> str:
        return f"now (b) against {figures.path.name} (a) | D: another checkpoint"

    def figures_lines(self, figures: CompareFigures, width: int) -> list[str]:
        return compare_lines(figures, self.content_size.height)
