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
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]

VERDICTS = ("agree", "doubtful", "disagree", "kink")
AGREE_BELOW = 1e-5
DISAGREE_ABOVE = 1e-3
FLOOR = 1e-8


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


def verdicts(rel: Array, kink: NDArray[np.bool_], limits: Thresholds = Thresholds()) -> NDArray[np.str_]:
    """One verdict string per parameter; NaN relative errors (not computed) give ``""``."""
    out = np.full(rel.shape, "disagree", dtype="<U8")
    out[rel <= limits.disagree] = "doubtful"
    out[rel <= limits.agree] = "agree"
    out[(out != "agree") & kink] = "kink"
    out[np.isnan(rel)] = ""
    return out


def verdict_counts(v: NDArray[np.str_]) -> dict[str, int]:
    """How many parameters got each verdict."""
    return {name: int(np.count_nonzero(v == name)) for name in VERDICTS}
