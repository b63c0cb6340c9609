"""Which weights to check: a name pattern, a count or a share, drawn so every array is represented.

A specification (``check --weights SPEC``, and the app's default for a large
model) is one of

- a share, ``1%`` or ``0.5%``: that fraction of the weights, at least one;
- a count, ``500``: that many weights (all of them when the model has fewer);
- a name pattern, ``L2.*`` or ``L1.b[*]``: every weight whose name matches
  (shell-style, see :mod:`stepper.core.names`).

A count or a share is a seeded random subset, stratified by array: each
parameter array (``L1.W``, ``L1.b``, ...) gets a share of the count in
proportion to its size, and at least one entry, so a bias vector of ten
entries beside a million weights is still checked. The draw inside each array
is uniform without replacement, from ``numpy.random.default_rng(seed)``, so
the same seed picks the same weights on any machine.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.names import matching
from stepper.core.network import ParamLayout

IntArray = NDArray[np.int64]

_SHARE = re.compile(r"^\s*(\d+(?:\.\d*)?|\.\d+)\s*%\s*$")
_COUNT = re.compile(r"^\s*\d+\s*$")


@dataclass(frozen=True)
class WeightChoice:
    """The weights chosen by a specification.

    Attributes:
        indices: sorted flat indices, ``(n_chosen,)``.
        kind: ``"all"``, ``"share"``, ``"count"`` or ``"pattern"``.
        spec: the specification as given (``""`` for all).
        seed: the seed of a random draw; None for ``all`` and ``pattern``.
        n_params: the model's number of parameters.
    """

    indices: IntArray
    kind: str
    spec: str
    seed: int | None
    n_params: int

    @property
    def count(self) -> int:
        return int(self.indices.size)

    @property
    def is_all(self) -> bool:
        return self.count == self.n_params

    def describe(self) -> str:
        """How the weights were chosen, as a phrase: ``"10,010 of 1,000,959 weights: ..."``."""
        head = f"{self.count:,} of {self.n_params:,} weights"
        if self.kind == "all" or self.is_all:
            return f"all {self.n_params:,} weights"
        if self.kind == "pattern":
            return f"{head}: the names matching {self.spec}"
        what = f"a random {self.spec} of each array" if self.kind == "share" else \
            f"a random {self.spec} drawn from the arrays in proportion to their sizes"
        return f"{head}: {what}, at least one from each (seed {self.seed})"

    def as_dict(self) -> dict[str, object]:
        """The JSON form."""
        return {"count": self.count, "of": self.n_params, "chosen": self.kind, "spec": self.spec or None,
                "seed": self.seed}


def every_weight(layout: ParamLayout) -> WeightChoice:
    return WeightChoice(np.arange(layout.size, dtype=np.int64), "all", "", None, layout.size)


def parse_share(spec: str) -> float | None:
    """The fraction (0, 1] that ``"N%"`` stands for, or None when ``spec`` is no share.

    Raises ValueError for a share outside (0, 100]%.
    """
    match = _SHARE.match(spec)
    if not match:
        return None
    percent = float(match[1])
    if not 0.0 < percent <= 100.0:
        raise ValueError("a share must be more than 0% and at most 100%")
    return percent / 100.0


def choose(layout: ParamLayout, spec: str, seed: int = 0) -> WeightChoice:
    """The weights a specification names (see the module docstring).

    Raises ValueError with a sentence for the user when ``spec`` names nothing.
    """
    text = spec.strip()
    if not text:
        raise ValueError("an empty specification names no weights (give a share like 1%, a count "
                         "like 500, or a name pattern like L2.*)")
    share = parse_share(text)
    if share is not None:
        count = max(1, round(share * layout.size))
        return WeightChoice(stratified(layout, count, seed), "share", text, seed, layout.size)
    if _COUNT.match(text):
        count = int(text)
        if count < 1:
            raise ValueError("a count of weights must be at least 1")
        return WeightChoice(stratified(layout, count, seed), "count", text, seed, layout.size)
    hits = matching(layout, text)
    if hits.size == 0:
        first = layout.blocks[0].prefix if layout.blocks else "L1.W"
        raise ValueError(f"no weight name matches it (names look like {first}[0,0]; * and ? are wildcards)")
    return WeightChoice(hits, "pattern", text, None, layout.size)


def allocate(sizes: list[int], count: int) -> list[int]:
    """How many entries to draw from arrays of ``sizes``: proportional, at least one each.

    The total is ``count`` (or every entry when ``count`` is larger), except that
    each non-empty array gets one entry even when ``count`` is smaller than
    the number of arrays. Shares are rounded by largest remainder.
    """
    total = sum(sizes)
    if count >= total:
        return list(sizes)
    quota = [count * s / total for s in sizes]
    take = [min(s, max(1 if s else 0, math.floor(q))) for s, q in zip(sizes, quota)]
    left = count - sum(take)
    if left > 0:
        # Largest remainders first (ties: the earlier array), among arrays with room.
        order = sorted(range(len(sizes)), key=lambda i: (-(quota[i] - math.floor(quota[i])), i))
        while left > 0:
            moved = False
            for i in order:
                if left == 0:
                    break
                if take[i] < sizes[i]:
                    take[i] += 1
                    left -= 1
                    moved = True
            if not moved:
                break
    return take


def stratified(layout: ParamLayout, count: int, seed: int) -> IntArray:
    """A seeded random set of about ``count`` flat indices, drawn array by array (sorted)."""
    sizes = [block.size for block in layout.blocks]
    take = allocate(sizes, count)
    rng = np.random.default_rng(seed)
    parts = []
    for block, k in zip(layout.blocks, take):
        if k == block.size:
            parts.append(np.arange(block.start, block.stop, dtype=np.int64))
        elif k:
            pick = rng.choice(block.size, size=k, replace=False)
            parts.append(block.start + np.sort(pick).astype(np.int64))
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)
