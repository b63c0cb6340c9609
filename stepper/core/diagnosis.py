"""Saying why slopes disagree: the likely cause, read from the pattern of the disagreement.

A gradient check says *which* slopes disagree; the pattern usually says *why*.
:func:`diagnose` looks at a check's per-parameter slopes and verdicts, the
network's layout, and the input-slope checks of layers with a hand-written
backward pass, and names the likely cause in one plain sentence per pattern:

``input_slopes``
    A layer whose input slopes ``dX`` disagree. Slopes flow backwards, so a wrong
    ``dX`` of layer k makes the parameter slopes of every layer before k wrong
    while k's own parameters may agree: that layer's backward is named as the
    cause, and the earlier layers' disagreements are not diagnosed on their own.
``ratio``
    Every disagreeing entry of one array shares one ratio numeric / analytic.
    Named ratios: ``n`` (the number of samples: the analytic slope was divided by
    n once too often, an average over samples taken twice), ``1/n`` (summed over
    samples without the 1/n of the average), ``2`` or ``1/2`` (a lost or extra
    factor of two, such as the one-half in a squared error), ``-1`` (a sign
    error). Any other shared ratio is printed as a constant factor.
``biases_only`` / ``weights_only``
    In a layer with both kinds of parameter, only its biases disagree (or only
    its weights): the slope of that kind in its backward is the place to look.
``unexplained``
    Slopes disagree and none of the above fits: the sentence names where they
    are and the largest relative error.

A later layer's wrong ``dX`` explains earlier layers, a shared ratio is more
specific than "only the biases", so hints come in that order. The sentences
are plain text for the command line and the app; each :class:`Hint` also
carries its parts for JSON.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from numpy.typing import NDArray

from stepper.core.gradcheck import CheckResult
from stepper.core.input_slopes import InputSlopeCheck
from stepper.core.network import Block, Network

Array = NDArray[np.float64]

#: Ratios numeric / analytic count as one when they differ from their median
#: by at most this fraction (numeric slopes are good to about 1e-7 relative;
#: the margin is common practice, no published source).
RATIO_TOLERANCE = 1e-3


@dataclass(frozen=True)
class Hint:
    """One likely cause, as a sentence and its parts.

    Attributes:
        code: ``input_slopes``, ``ratio``, ``biases_only``, ``weights_only`` or ``unexplained``.
        text: one plain sentence.
        layer: 0-based layer the hint points at, or None.
        arrays: the arrays concerned, e.g. ``("L2.b",)``.
        ratio: the shared ratio numeric / analytic, where there is one.
    """

    code: str
    text: str
    layer: int | None = None
    arrays: tuple[str, ...] = ()
    ratio: float | None = None


def shared_ratio(analytic: Array, numeric: Array, tolerance: float = RATIO_TOLERANCE) -> float | None:
    """The one ratio ``numeric / analytic`` that every entry shares, or None.

    ``analytic`` and ``numeric`` have one shape; entries where either slope is
    zero or not finite have no ratio, and then there is none shared.
    """
    a = np.asarray(analytic, dtype=np.float64).ravel()
    n = np.asarray(numeric, dtype=np.float64).ravel()
    if a.size == 0 or not (np.all(np.isfinite(a)) and np.all(np.isfinite(n))) or np.any(a == 0) or np.any(n == 0):
        return None
    ratios = n / a
    middle = float(np.median(ratios))
    if np.all(np.abs(ratios - middle) <= tolerance * abs(middle)):
        return middle
    return None


def ratio_meaning(ratio: float, n_samples: int, tolerance: float = RATIO_TOLERANCE) -> tuple[str, str]:
    """How to write ``ratio`` and what it suggests: ``("1/442", "summed over ... without the 1/n")``."""

    def near(target: float) -> bool:
        return abs(ratio - target) <= tolerance * abs(target)

    if n_samples > 2 and near(float(n_samples)):
        return (f"{n_samples} (the number of samples)",
                "the analytic slope was divided by the number of samples once too often, "
                "as if averaged over the samples twice")
    if n_samples > 2 and near(1.0 / n_samples):
        return (f"1/{n_samples} (one over the number of samples)",
                "the analytic slope is summed over the samples without the 1/n of the average")
    if near(-1.0):
        return "-1", "the analytic slope has the wrong sign"
    if near(2.0):
        return "2", "the analytic slope lost a factor of 2 (such as the 2 from squaring)"
    if near(0.5):
        return "1/2", "the analytic slope has an extra factor of 2 (such as a one-half dropped from the cost)"
    if near(-2.0) or near(-0.5):
        return f"{ratio:.4g}", "the analytic slope has the wrong sign and is off by a factor of 2"
    return f"{ratio:.4g}", "the analytic slope is off by a constant factor (a missing or extra scale)"


def diagnose(
    net: Network,
    result: CheckResult,
    n_samples: int,
    inputs: Sequence[InputSlopeCheck] = (),
) -> list[Hint]:
    """The likely causes of the disagreements in ``result``, most telling first; empty when all agree.

    Args:
        net: the network the check ran on (its layout and layer labels).
        result: the parameter check; its arrays are ``(n_params,)``.
        n_samples: the number of samples the cost averaged over.
        inputs: input-slope checks of layers with a hand-written backward pass.
    """
    layout = net.layout
    bad: NDArray[np.bool_] = result.verdict == "disagree"
    hints: list[Hint] = []
    explained = np.zeros(layout.size, dtype=bool)
    for check in sorted(inputs, key=lambda c: -c.layer):
        if check.passed:
            continue
        before = bad & (layout.layer_index < check.layer) & ~explained
        hints.append(_input_hint(net, check, bad, before, n_samples))
        explained |= layout.layer_index < check.layer
    left = np.zeros(layout.size, dtype=bool)
    for layer in range(len(net.layers)):
        in_layer = layout.layer_index == layer
        if not np.any(bad & in_layer & ~explained):
            continue
        found = _layer_hints(net, result, bad, layer, n_samples)
        hints.extend(found)
        if not found:
            left |= bad & in_layer
    if np.any(left):
        hints.append(_unexplained(net, result, left))
    return hints


def _layer_name(net: Network, layer: int) -> str:
    return f"L{layer + 1} ({net.layers[layer].label})"


def _input_hint(net: Network, check: InputSlopeCheck, bad: NDArray[np.bool_], before: NDArray[np.bool_],
                n_samples: int) -> Hint:
    """A layer's wrong ``dX``, named as the cause of the earlier layers' disagreement (``before``)."""
    own = net.layout.layer_index == check.layer
    name = f"L{check.layer + 1}"
    where = _layer_name(net, check.layer)
    wrong = check.verdict == "disagree"
    ratio = shared_ratio(check.analytic[wrong], check.numeric[wrong])
    clause = ""
    if ratio is not None:
        written, meaning = ratio_meaning(ratio, n_samples)
        clause = f" (numeric / analytic = {written} on every disagreeing entry: {meaning})"
    earlier = sorted({f"L{int(i) + 1}" for i in net.layout.layer_index[before]})
    own_text = "its own parameters disagree too" if bool(np.any(bad & own)) else "its own parameters agree"
    if earlier:
        text = (f"The backward of {where} returns a wrong input slope dX{clause}; {_and(earlier)} "
                f"{'disagrees' if len(earlier) == 1 else 'disagree'} because of it "
                f"({own_text}): fix the dX that {name}'s backward returns first.")
    else:
        text = f"The backward of {where} returns a wrong input slope dX{clause}; {own_text}."
    return Hint("input_slopes", text, check.layer, (f"{name}.dX",), ratio)


def _layer_hints(net: Network, result: CheckResult, bad: NDArray[np.bool_], layer: int,
                 n_samples: int) -> list[Hint]:
    """Shared ratios per array, then "only the biases" or "only the weights" for one layer."""
    hints: list[Hint] = []
    blocks = [b for b in net.layout.blocks if b.layer == layer]
    wrong = [b for b in blocks if np.any(bad[b.start:b.stop])]
    for block in wrong:
        part = slice(block.start, block.stop)
        mask = bad[part]
        ratio = shared_ratio(result.analytic[part][mask], result.numeric[part][mask])
        if ratio is None:
            continue
        written, meaning = ratio_meaning(ratio, n_samples)
        count = int(mask.sum())
        every = "the one disagreeing entry" if count == 1 else f"every disagreeing entry ({count})"
        hints.append(Hint(
            "ratio",
            f"{block.prefix}: numeric / analytic = {written} on {every}: {meaning}; "
            f"look at {block.prefix}'s slope in the backward of {_layer_name(net, layer)}.",
            layer, (block.prefix,), ratio,
        ))
    kinds = {b.kind for b in blocks}
    wrong_kinds = {b.kind for b in wrong}
    if kinds == {"weight", "bias"} and len(wrong_kinds) == 1:
        kind = wrong_kinds.pop()
        names = tuple(b.prefix for b in wrong)
        spread = _spread(result, bad, wrong)
        hints.append(Hint(
            "biases_only" if kind == "bias" else "weights_only",
            f"In {_layer_name(net, layer)} only {'biases' if kind == 'bias' else 'weights'} disagree "
            f"({_and(list(names))}{spread}) and every {'weight' if kind == 'bias' else 'bias'} agrees: "
            f"look at the slope of {_and(list(names))} in that layer's backward.",
            layer, names,
        ))
    return hints


def _spread(result: CheckResult, bad: NDArray[np.bool_], blocks: Sequence[Block]) -> str:
    """``; numeric / analytic from 0.406 to 0.752, not one factor`` when the entries have no shared ratio."""
    index = np.concatenate([np.flatnonzero(bad[b.start:b.stop]) + b.start for b in blocks])
    a, n = result.analytic[index], result.numeric[index]
    usable = np.isfinite(a) & np.isfinite(n) & (a != 0)
    if index.size < 2 or not np.all(usable) or shared_ratio(a, n) is not None:
        return ""
    ratios = n / a
    return f"; numeric / analytic from {ratios.min():.3g} to {ratios.max():.3g}, not one factor"


def _unexplained(net: Network, result: CheckResult, bad: NDArray[np.bool_]) -> Hint:
    layers = sorted({int(i) for i in net.layout.layer_index[bad]})
    rel = np.where(bad & np.isfinite(result.rel_error), result.rel_error, -1.0)
    worst = int(np.argmax(rel))
    count = int(bad.sum())
    where = _and([f"L{i + 1}" for i in layers])
    largest = (f"; the largest relative error is {net.layout.names[worst]}'s ({result.rel_error[worst]:.2e})"
               if rel[worst] >= 0 else "")
    return Hint(
        "unexplained",
        f"{count} slope{'s' if count != 1 else ''} in {where} disagree{'s' if count == 1 else ''} with no "
        f"common pattern (a shared ratio, only biases or only weights, a wrong dX){largest}.",
        layers[-1] if layers else None,
        tuple(b.prefix for b in net.layout.blocks if np.any(bad[b.start:b.stop])),
    )


def _and(words: list[str]) -> str:
    if len(words) < 2:
        return "".join(words)
    return f"{', '.join(words[:-1])} and {words[-1]}"

