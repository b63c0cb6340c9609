"""Comparing analytic and numeric slopes: relative error and a verdict per parameter.

Relative error (common practice, e.g. Goodfellow, Bengio & Courville, *Deep
Learning*, 2016, section 11.5, compare the two slopes relative to their size):

    rel = |a - n| / max(|a|, |n|, floor)

The ``floor`` keeps two tiny slopes (both below rounding noise) from looking
far apart; it defaults to 1e-8 (common practice, no published source).

Verdicts (thresholds are common practice with no single published source):

- ``agree``     rel <= 1e-5
- ``doubtful``  1e-5 < rel <= 1e-3
- ``disagree``  rel > 1e-3
- ``kink``      not ``agree``, and a ReLU-like unit crossed its kink between the
  finite-difference evaluations: the numeric slope is not trustworthy there, so
  the parameter is not counted as failed.
- ``unresolved`` the two slopes differ by less than the numeric slope's
  rounding allowance (below), but the allowance is at least as large as both
  slopes and larger than the ``floor``: at this step the comparison cannot tell
  a right slope from a wrong one (a sign error included), so it is neither
  agree nor disagree. A larger finite-difference step lowers the allowance.

A slope that is not a finite number (the cost overflowed, or became NaN) cannot
agree with anything: such a parameter gets ``disagree``, so a check never passes on
it. ``""`` is kept for parameters whose numeric slope was not computed.

Rounding noise. A numeric slope is a difference of two costs divided by the
step, so it carries a rounding error of about ``eps * |C| / h`` whatever the
size of the slope (Press, Teukolsky, Vetterling & Flannery, *Numerical
Recipes*, 3rd ed., 2007, section 5.7). For slopes that small the relative error
means nothing: with the default central step and a cost of order one the noise
is about 4e-11, so a correct slope of 1e-9 could show a relative error of 1e-2.
A parameter whose two slopes differ by no more than :func:`noise_level` therefore
gets ``agree`` when at least one slope is larger than that allowance, and
``unresolved`` when neither is; its relative error is still reported as computed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

VERDICTS = ("agree", "doubtful", "disagree", "kink", "unresolved")
AGREE_BELOW = 1e-5
DISAGREE_ABOVE = 1e-3
FLOOR = 1e-8
#: Multiple of ``eps * |C| / h`` allowed for rounding in the two cost evaluations
#: of a numeric slope (common practice, no published source).
NOISE_FACTOR = 16.0
_EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True)
class Thresholds:
    """Verdict levels; see the module docstring."""

    agree: float = AGREE_BELOW
    disagree: float = DISAGREE_ABOVE
    floor: float = FLOOR


def relative_error(analytic: Array, numeric: Array, floor: float = FLOOR) -> Array:
    """``|a - n| / max(|a|, |n|, floor)`` elementwise; all shapes ``(n_params,)``."""
    scale = np.maximum(np.maximum(np.abs(analytic), np.abs(numeric)), floor)
    return np.abs(analytic - numeric) / scale


def noise_level(cost: float, h: float) -> float:
    """Rounding noise of a finite-difference slope: ``NOISE_FACTOR * eps * |cost| / h``."""
    return NOISE_FACTOR * _EPS * abs(cost) / h


def verdicts(
    rel: Array,
    kink: NDArray[np.bool_],
    limits: Thresholds = Thresholds(),
    within_noise: NDArray[np.bool_] | None = None,
    below_noise: NDArray[np.bool_] | None = None,
) -> NDArray[np.str_]:
    """One verdict string per parameter; NaN relative errors (not computed) give ``""``.

    ``within_noise`` (optional, ``(n_params,)``) is True where the two slopes differ
    by less than the numeric slope's rounding noise; those parameters agree, unless
    ``below_noise`` is True there too (both slopes within the noise): unresolved.
    """
    out = np.full(rel.shape, "disagree", dtype="<U10")
    out[rel <= limits.disagree] = "doubtful"
    agree = rel <= limits.agree
    if within_noise is not None:
        unresolved = within_noise & ~agree
        if below_noise is not None:
            out[unresolved & below_noise] = "unresolved"
            unresolved &= ~below_noise
        out[unresolved] = "agree"
    out[agree] = "agree"
    out[(out != "agree") & kink] = "kink"
    out[np.isnan(rel)] = ""
    return out


def judge(
    analytic: Array,
    numeric: Array,
    kink: NDArray[np.bool_],
    noise: float | Array,
    limits: Thresholds = Thresholds(),
    computed: NDArray[np.bool_] | None = None,
) -> tuple[Array, NDArray[np.str_]]:
    """Relative errors and verdicts of analytic against numeric slopes (arrays of one shape).

    ``noise`` is the rounding noise of the numeric slopes (a number, or one per
    entry, see :func:`noise_level`): two slopes closer than that agree. Where a
    slope was computed (``computed``; all when None) but either side is not
    finite, the verdict is ``disagree``: an overflow must never pass.
    """
    with np.errstate(invalid="ignore", over="ignore"):
        rel = relative_error(analytic, numeric, limits.floor)
        quiet = np.abs(analytic - numeric) <= noise
        # Below the floor slopes count as zero anyway: an allowance that small hides nothing.
        tiny = (np.maximum(np.abs(analytic), np.abs(numeric)) <= noise) & (np.asarray(noise) > limits.floor)
    verdict = verdicts(rel, kink, limits, quiet, tiny)
    if computed is None:
        computed = np.ones(analytic.shape, dtype=bool)
    verdict[computed & ~(np.isfinite(analytic) & np.isfinite(numeric))] = "disagree"
    return rel, verdict


def suggested_step(analytic: Array, numeric: Array, verdict: NDArray[np.str_], h: float, noise: float | Array) -> float | None:
    """A finite-difference step that would resolve the ``unresolved`` slopes, or None.

    The allowance ``16 u |C| / h`` falls as ``h`` grows: the step that puts it ten
    times below the smallest nonzero slope in question. None when nothing is
    unresolved or every such slope is zero.
    """
    mask = verdict == "unresolved"
    if not np.any(mask):
        return None
    size = np.maximum(np.abs(analytic), np.abs(numeric))[mask]
    size = size[size > 0]
    allowance = float(np.max(np.broadcast_to(noise, verdict.shape)[mask]))
    if size.size == 0 or allowance <= 0:
        return None
    return h * 10.0 * allowance / float(size.min())


def verdict_counts(v: NDArray[np.str_]) -> dict[str, int]:
    """How many parameters got each verdict."""
    return {name: int(np.count_nonzero(v == name)) for name in VERDICTS}
