"""The factor panel: the selected weight's slope as error signal x activation slope x input.

For the weight from unit ``i`` to unit ``j``, backpropagation sums over samples
the error signal at ``j``, the slope of ``j``'s activation and the activation of
``i`` (see :mod:`stepper.core.breakdown`). The panel shows the three factors
and their product averaged over the samples and for one sample, the sum of the
products against the slope in the table, and the flags the core raises
(saturated or dead unit, input near zero or large, error signal shrunk or
grown, samples cancelling). Everything is text, so it reads without colour.
"""

from __future__ import annotations

import textwrap

from stepper.report import factor_names
from stepper.ui.insight import FactorFigures
from stepper.ui.panels import FiguresPanel

#: Width of one number column.
CELL = 13
#: Width of the row labels.
LABEL = 20
#: Up to this relative error the sum of the products "matches" the table's slope
#: (the same sum taken in another order differs by rounding only; common practice).
MATCH = 1e-9


def _row(label: str, values: tuple[float, float, float, float]) -> str:
    return label[:LABEL].ljust(LABEL) + "".join(f"{v: .4e}".rjust(CELL) for v in values)


def factor_lines(f: FactorFigures, width: int) -> list[str]:
    """The panel's text for a content ``width`` (72 columns or more read best)."""
    b = f.result
    n = b.n_samples
    wrap = max(width, 40)
    lines = textwrap.wrap(f"{f.name}: {f.what}", wrap, subsequent_indent="  ")
    lines += [
        "slope = sum over samples of error signal x activation slope x input",
        " " * LABEL + "".join(h.rjust(CELL) for h in (*factor_names(b, unit_in_slope=False), "product")),
        _row(f"mean of {n}", b.means()),
        _row(f"sample {b.sample}" + (" (most)" if b.sample == f.largest else ""), b.at(b.sample)),
    ]
    verdict = "matches" if f.mismatch <= MATCH else f"DIFFERS (relative error {f.mismatch:.1e})"
    l2 = f" + L2 term {b.penalty: .3e}" if b.penalty else ""
    lines += textwrap.wrap(f"sum of products{l2} {b.total: .6e}, table's slope {f.table_slope: .6e}: {verdict}",
                           wrap, subsequent_indent="  ")
    if f.at_z is not None:
        lines += textwrap.wrap(f"error signal taken at Z, activation factor 1: {f.at_z}", wrap,
                               subsequent_indent="  ")
    if b.flags:
        for flag in b.flags:
            lines += textwrap.wrap(f"! {flag.text}", wrap, subsequent_indent="  ")
    else:
        lines += textwrap.wrap("no usual cause of a vanishing or exploding slope (saturated or dead unit, "
                               "input near zero or large, error signal shrunk or grown, samples "
                               "cancelling)", wrap, subsequent_indent="  ")
    lines.append(f", . sample  I type one (rows 0-{n - 1}; empty: the largest product)")
    return lines


class FactorPanel(FiguresPanel[FactorFigures]):
    """The factors of the selected weight's slope; the app feeds it."""

    def figures_title(self, figures: FactorFigures) -> str:
        return f"slope factors of {figures.name}"

    def figures_lines(self, figures: FactorFigures, width: int) -> list[str]:
        return factor_lines(figures, width)
