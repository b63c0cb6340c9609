"""Wording of one weight's slope breakdown, shared by ``stepper explain`` and the app's factor panel.

Plain strings built from a :class:`~stepper.core.breakdown.Breakdown` and the
network it came from; the core computes the figures and never words them.
"""

from __future__ import annotations

from typing import Sequence

from stepper.core.breakdown import Breakdown
from stepper.core.network import Network


def factor_names(b: Breakdown, *, unit_in_slope: bool = True) -> tuple[str, str, str]:
    """Titles of the three factors: the error signal, the activation slope and the input.

    ``unit_in_slope`` names the unit in the activation slope (``tanh'(Z[2])``);
    narrow columns leave it out (``tanh'(Z)``).
    """
    error = f"dC/dZ[{b.unit}]" if b.through_z else f"dC/dA[{b.unit}]"
    at = f"Z[{b.unit}]" if unit_in_slope else "Z"
    slope = "1 (at Z)" if b.through_z else f"{b.activation}'({at})"
    if b.source is None:
        source = "1 (bias)"
    elif b.layer == 0:
        source = f"input {b.source}"
    else:
        source = f"A{b.layer}[{b.source}]"
    return error, slope, source


def weight_place(net: Network, input_names: Sequence[str], b: Breakdown) -> str:
    """``weight from input 2 (weekday) to unit 3 of layer 1 (dense 4->6 tanh)``.

    ``input_names`` are the data's input columns, one per network input.
    """
    if b.source is None:
        what = f"bias of unit {b.unit}"
    elif b.layer == 0:
        what = f"weight from input {b.source} ({input_names[b.source]}) to unit {b.unit}"
    else:
        what = f"weight from unit {b.source} of layer {b.layer} to unit {b.unit}"
    return f"{what} of layer {b.layer + 1} ({net.layers[b.layer].label})"


def at_z_reason(net: Network, b: Breakdown) -> str | None:
    """Why the error signal is taken at the unit's input Z, or None when it is not."""
    if not b.through_z:
        return None
    last = b.layer == len(net.layers) - 1
    if last and net.fused is not None:
        return "the output activation is computed together with its loss, from Z"
    return f"{b.activation} couples its units"
