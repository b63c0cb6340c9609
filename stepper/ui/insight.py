"""The figures behind the three "why" panels, computed by the core from a snapshot.

Widgets do no maths: the app asks :class:`Figures` for what a panel shows and
hands the result to the panel. Everything here reads the snapshot's copy of the
weights (so a panel agrees with the table on screen) and the setup's network
and data, which never change during a session; nothing here changes the session.

A custom layer's code may raise while it runs here: that comes back as the
:class:`~stepper.errors.CustomLayerError` the layer wrapper made of it, for the
app to show.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
from numpy.typing import NDArray

from stepper.core.breakdown import Breakdown, slope_breakdown
from stepper.core.compare import relative_error
from stepper.core.diagnosis import diagnose
from stepper.core.gradcheck import CheckResult
from stepper.core.health import HealthReport, UnitHealth, layer_health, unit_health, unit_of
from stepper.core.input_slopes import InputSlopeCheck, check_input_slopes
from stepper.core.layers import Builtin, Conv, is_builtin
from stepper.core.network import Network
from stepper.core.slice import CostSlice, cost_slice
from stepper.formats.dataset import Dataset
from stepper.report import at_z_reason, weight_place
from stepper.ui.snapshot import Snapshot

Array = NDArray[np.float64]


@dataclass(frozen=True)
class SliceFigures:
    """The cost along one weight.

    Attributes:
        name: the weight's name.
        result: the core's sweep, tangent, curvature and step.
        automatic: the span is the core's default (no span was asked for).
    """

    name: str
    result: CostSlice
    automatic: bool

    @property
    def span(self) -> float:
        """Half-width of the sweep."""
        return float(self.result.points[-1] - self.result.points[0]) / 2.0


@dataclass(frozen=True)
class FactorFigures:
    """One weight's slope taken apart into its factors.

    Attributes:
        name: the weight's name.
        what: where the weight sits, e.g. ``weight from input 2 (wind) to unit 0 of layer 1 (dense 4->5 tanh)``.
        result: the core's breakdown.
        input_name: the input column's name for a first-layer weight, else None.
        table_slope: the slope the table shows for the weight.
        mismatch: relative error between the sum of the products and ``table_slope``.
        largest: the sample whose product is largest in size.
        at_z: why the error signal is taken at the unit's input, or None when it is not.
    """

    name: str
    what: str
    result: Breakdown
    input_name: str | None
    table_slope: float
    mismatch: float
    largest: int
    at_z: str | None


@dataclass(frozen=True)
class HealthFigures:
    """Layer health, and the custom layers' input-slope checks when there are any.

    Attributes:
        report: the core's health report at the snapshot's weights and rate.
        kinds: a short name per layer, e.g. ``tanh 4->5`` or ``custom 5->3``.
        custom: 0-based indices of custom layers.
        inputs: the last input-slope checks of the custom layers (None: never run).
        inputs_stale: the weights changed since those checks.
        focus: the selected weight's name and the health of the unit (or convolution
            channel) it feeds, when it feeds one.
    """

    report: HealthReport
    kinds: tuple[str, ...]
    custom: tuple[int, ...]
    inputs: tuple[InputSlopeCheck, ...] | None
    inputs_stale: bool
    focus: tuple[str, UnitHealth] | None = None


@dataclass(frozen=True)
class InputChecks:
    """The custom layers' input-slope checks at one parameter version."""

    version: int
    checks: tuple[InputSlopeCheck, ...]


class Figures:
    """Computes each panel's figures, keeping the last result of each panel.

    A result is reused while the weights (the snapshot's version), the rate, the
    selected weight and the panel's setting stay the same, so redrawing after a
    change that moves no weight (freezing, say) computes nothing.
    """

    def __init__(self, net: Network, data: Dataset) -> None:
        self.net = net
        self.data = data
        self.custom = tuple(i for i, layer in enumerate(net.layers) if not is_builtin(layer))
        self.kinds = tuple(
            layer.kind if isinstance(layer, Builtin) else f"custom {layer.n_in}->{layer.n_out}"
            for layer in net.layers
        )
        self._last: dict[str, tuple[tuple[Any, ...], Any]] = {}
        self._hints: tuple[CheckResult, InputChecks | None, list[str]] | None = None

    def _cached(self, panel: str, key: tuple[Any, ...], compute: Callable[[], Any]) -> Any:
        hit = self._last.get(panel)
        if hit is not None and hit[0] == key:
            return hit[1]
        value = compute()
        self._last[panel] = (key, value)
        return value

    def training(self, snap: Snapshot) -> Network:
        """The network as it trains at the snapshot's step (its dropout masks), as the table's slopes do."""
        return self.net.at(True, snap.step_count) if self.net.varies_by_step else self.net

    def slice(self, snap: Snapshot, index: int, span: float | None) -> SliceFigures:
        """The cost along weight ``index``, swept over ``value +- span`` (the core's default when None)."""
        X, Y = self.data.X, self.data.Y

        def compute() -> SliceFigures:
            result = cost_slice(self.training(snap), snap.value, X, Y, index, snap.rate, span)
            return SliceFigures(snap.names[index], result, span is None)

        figures: SliceFigures = self._cached("slice", (snap.version, index, span, snap.rate), compute)
        return figures

    def factors(self, snap: Snapshot, index: int, sample: int | None) -> FactorFigures | str:
        """The factors of weight ``index``'s slope, or a sentence saying why there are none.

        ``sample`` is the training row shown on its own (None: the one contributing most).
        """
        X, Y = self.data.X, self.data.Y

        def compute() -> FactorFigures | str:
            try:
                b = slope_breakdown(self.training(snap), snap.value, X, Y, index, sample)
            except ValueError as exc:  # a custom layer's parameter: no units to break down
                return str(exc)
            table = float(snap.analytic[index])
            mismatch = float(relative_error(np.array([b.total]), np.array([table]))[0])
            input_name = self.data.input_names[b.source] if b.layer == 0 and b.source is not None else None
            largest = int(np.argmax(np.abs(b.products)))
            return FactorFigures(snap.names[index], weight_place(self.net, self.data.input_names, b), b,
                                 input_name, table, mismatch, largest, at_z_reason(self.net, b))

        figures: FactorFigures | str = self._cached("factors", (snap.version, index, sample), compute)
        return figures

    def feeds_channel(self, index: int) -> bool:
        """True when parameter ``index`` is a convolution's (its channel has a health of its own)."""
        found = unit_of(self.net, index)
        return found is not None and isinstance(self.net.layers[found[0]], Conv)

    def health(self, snap: Snapshot, inputs: InputChecks | None, index: int | None = None) -> HealthFigures:
        """Layer health at the snapshot's weights and rate, with the last input-slope checks, and the
        health of the unit or channel that weight ``index`` (the cursor's) feeds."""
        X, Y = self.data.X, self.data.Y
        report: HealthReport = self._cached(
            "health", (snap.version, snap.rate), lambda: layer_health(self.training(snap), snap.value, X, Y, snap.rate))
        checks = None if inputs is None else inputs.checks
        stale = inputs is not None and inputs.version != snap.version
        found = None if index is None else unit_of(self.net, index)
        unit = None if found is None else unit_health(report, self.net, *found)
        focus = None if unit is None or index is None else (snap.names[index], unit)
        return HealthFigures(report, self.kinds, self.custom, checks, stale, focus)

    def hints(self, check: CheckResult, inputs: InputChecks | None) -> list[str]:
        """The likely causes of ``check``'s disagreements, one sentence each (empty when all agree).

        ``inputs`` count only when they were taken at the check's weights.
        """
        last = self._hints
        if last is not None and last[0] is check and last[1] is inputs:
            return last[2]
        checks = () if inputs is None else inputs.checks
        hints = [h.text for h in diagnose(self.net, check, self.data.X.shape[0], checks)]
        self._hints = (check, inputs, hints)
        return hints

    def input_slopes(self, theta: Array, cancelled: Callable[[], bool],
                     net: Network | None = None) -> tuple[InputSlopeCheck, ...] | None:
        """Input-slope checks of every custom layer at ``theta`` ``(n_params,)``; None if cancelled.

        ``net`` is the network as the session trains it now (its dropout masks); default the setup's.

        Runs the network many times (twice per checked input entry): the app calls
        it in its check worker, which has the session to itself.
        """
        out = []
        for layer in self.custom:
            if cancelled():
                return None
            out.append(check_input_slopes(net or self.net, theta, self.data.X, self.data.Y, layer))
        return tuple(out)
