"""Plots of the training figures drawn with plotext: histograms and the rate range test.

``draw_*`` functions draw into a plotext figure that the caller has cleared and
sized (the app's plot widgets, or :func:`figure` for text written to a file);
:func:`text_of` builds a figure into plain text. plotext keeps one figure for
the whole process: call these from one thread at a time (the app's own).
"""

from __future__ import annotations

import sys
import types
from typing import Any, Sequence

import numpy as np

from stepper.core.histograms import QUANTITIES, Histogram, LayerSpread
from stepper.core.ratetest import RangeResult


def _plotext() -> Any:
    """plotext, imported without building its documentation object.

    plotext's package import formats its whole documentation (``plotext.doc``),
    about a tenth of a second and a tenth of the app's start-up; Stepper never
    reads it, so a placeholder stands in for that one module. Should a plotext
    laid out otherwise refuse the placeholder, it is imported whole.
    """
    docs = "plotext._doc.doc"
    if "plotext" not in sys.modules and docs not in sys.modules:
        placeholder = types.ModuleType(docs)
        placeholder.docs = None  # type: ignore[attr-defined]
        sys.modules[docs] = placeholder
        try:
            import plotext  # type: ignore[import-untyped]  # noqa: F401
        except ImportError:
            del sys.modules[docs]
    import plotext

    return plotext


def figure(width: int, height: int) -> Any:
    """plotext's figure, cleared, colourless and ``width`` x ``height`` cells, whatever the terminal."""
    plotext = _plotext()
    fig: Any = plotext.figure
    plotext.terminal.limit(False, False)
    fig.clear()
    fig.theme("colorless")
    fig.plot_size(width, height)
    return fig


def text_of(fig: Any) -> str:
    """The figure built as plain text; the figure is cleared afterwards."""
    text: str = fig.build().string(colorless=True)
    fig.clear()
    return text.rstrip()


def draw_histogram(fig: Any, hist: Histogram, title: str) -> None:
    """Bars of ``hist``'s counts at the bins' centres, with ``title`` (and the count of non-finite values)."""
    centres = (hist.edges[:-1] + hist.edges[1:]) / 2.0
    note = f", {hist.nonfinite} not finite" if hist.nonfinite else ""
    fig.title(f"{title} ({hist.n} values{note})")
    if hist.n == 0:
        return
    fig.draw(fig.bar(centres.tolist(), hist.counts.tolist(), width=1, _reset_ticks=False))


#: The range plot shows costs up to this many times the starting cost; higher ones sit on its top edge.
RANGE_CAP = 1.5


def draw_range(fig: Any, result: RangeResult) -> None:
    """Final cost against the rate on a log axis (``*`` train, ``o`` validation, ``X`` the lowest).

    Costs above :data:`RANGE_CAP` times the starting cost, and rates that
    diverged, are drawn as ``^`` on the top edge, so one blow-up does not
    flatten the rest.
    """
    fig.title(f"cost after {result.steps} steps: * train, o validation, X lowest, ^ off the top")
    fig.label("rate", axis="x")
    sets = [(result.train, "*")] + ([(result.val, "o")] if result.val is not None else [])
    shown = np.concatenate([values[np.isfinite(values)] for values, _ in sets])
    cap = RANGE_CAP * result.start_cost if result.start_cost > 0 else float(np.max(shown, initial=1.0))
    inside = shown[shown <= cap]
    lo = float(inside.min()) if inside.size else 0.0
    hi = max(cap if shown.size and shown.max() > cap else float(inside.max(initial=lo)), lo)
    top = hi if hi > lo else lo + max(abs(lo), 1.0) * 1e-3
    for values, marker in sets:
        ok = np.isfinite(values) & (values <= cap)
        if np.count_nonzero(ok):
            signal = fig.signal(result.rates[ok].tolist(), values[ok].tolist(), marker=marker)
            fig.draw(signal.lines() if marker == "*" else signal)
    over = ~(np.isfinite(result.train) & (result.train <= cap)) & ~np.isnan(result.train)
    if np.count_nonzero(over):
        fig.draw(fig.signal(result.rates[over].tolist(), [top] * int(np.count_nonzero(over)), marker="^"))
    best = result.best
    if best is not None and result.train[best] <= cap:
        fig.draw(fig.signal([float(result.rates[best])], [float(result.train[best])], marker="X"))
    low, high = float(result.rates.min()), float(result.rates.max())
    if high > low:
        fig.ruler("x").scale("log")
        fig.ruler("x").lim(low / 1.2, high * 1.2)
    pad = 0.05 * (top - lo)
    # Costs are never negative here: keep the axis from showing negative values for them.
    fig.ruler("y").lim(max(lo - pad, 0.0) if lo >= 0.0 else lo - pad, top + pad)


def spreads_text(spreads: Sequence[LayerSpread], width: int = 76, height: int = 12,
                 quantities: Sequence[str] = QUANTITIES) -> str:
    """Every layer's histograms as text, one plot under the other."""
    parts = []
    for spread in spreads:
        for quantity in quantities:
            fig = figure(width, height)
            hist = spread.hists[quantity]
            draw_histogram(fig, hist, f"L{spread.index + 1} {quantity} ({spread.label})")
            summary = (f"  mean {hist.mean:.4g}, spread (std) {hist.std:.4g}, exactly 0: {hist.zeros}"
                       if hist.n else "  (nothing to count: no step since the start, a load or an undo)"
                       if quantity == "updates" else "  (nothing to count)")
            parts.append(text_of(fig) + "\n" + summary)
    return "\n\n".join(parts)


def range_text(result: RangeResult, width: int = 76, height: int = 20) -> str:
    """The range test plot as text."""
    fig = figure(width, height)
    draw_range(fig, result)
    return text_of(fig)
