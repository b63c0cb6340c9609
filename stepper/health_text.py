"""Layer health unit by unit, as text: one unit or channel, a convolution's channels, the idle ones.

Shared by ``stepper check`` (its table of a convolution's channels and the
lists of dead and saturated units), ``stepper explain`` on a kernel weight (the
health of its output channel) and the app's health panel (the unit or channel
under the cursor). The figures are :mod:`stepper.core.health`'s.
"""

from __future__ import annotations

from typing import Any

from stepper.core.health import MOST, SATURATED_BELOW, HealthReport, UnitHealth, unit_health
from stepper.core.network import Network


def _share(value: float | None) -> str:
    return "-" if value is None else f"{100.0 * value:.1f}%"


def _ratio(value: float) -> str:
    return "-" if value != value else f"{value:.1e}"


def state_of(u: UnitHealth) -> str:
    """``dead``, ``saturated`` or ``""``: what is wrong with the unit, in one word."""
    if u.dead:
        return "dead"
    if u.saturated_most:
        return "saturated"
    return ""


def unit_summary(u: UnitHealth) -> str:
    """One sentence of figures: ``channel 3: ReLU passes on 63.2% of samples x positions, ...``."""
    incoming = "kernel" if u.per == "channel" else "weights in"
    over = "samples x positions" if u.per == "channel" else "samples"
    parts = []
    if u.active is not None:
        parts.append(f"ReLU passes on {_share(u.active)} of {over}")
    if u.saturated is not None:
        parts.append(f"saturated (activation slope < {SATURATED_BELOW:g}) on {_share(u.saturated)} of {over}")
    parts += [f"|{incoming}| {u.weights:.3e}", f"|slopes| {u.slopes:.3e}", f"update/weight {_ratio(u.update_ratio)}",
              f"error rms {u.signal_rms:.2e}"]
    state = state_of(u)
    warning = ""
    if state == "dead":
        warning = (f"; DEAD: zero at every position of every sample, so no slope reaches its {incoming.split()[0]}"
                   if u.per == "channel" else "; DEAD: zero on every sample, so no slope reaches its weights")
    elif state == "saturated":
        warning = f"; SATURATED on at least {MOST:.0%} of {over}: its slopes are damped"
    return f"{u.per} {u.unit}: " + ", ".join(parts) + warning


def channel_table(report: HealthReport, net: Network, layer: int) -> list[str]:
    """A convolution's channels, one row each: activity, saturation, norms, update ratio, error signal."""
    e = report.layers[layer]
    if e.per != "channel" or e.unit_weights is None:
        return []
    lines = [f"channels of L{layer + 1} {e.label} at rate {report.rate:g}",
             f"{'channel':>7}  {'active':>7}  {'saturated':>9}  {'|kernel|':>10}  {'|slopes|':>10}  "
             f"{'update/weight':>13}  {'error rms':>9}"]
    for unit in range(e.unit_weights.size):
        u = unit_health(report, net, layer, unit)
        assert u is not None
        lines.append(f"{unit:>7}  {_share(u.active):>7}  {_share(u.saturated):>9}  {u.weights:>10.3e}  "
                     f"{u.slopes:>10.3e}  {_ratio(u.update_ratio):>13}  {u.signal_rms:>9.2e}  {state_of(u)}".rstrip())
    lines.append(f"(active: share of samples x positions where the ReLU passes, dead at 0%; saturated: share where "
                 f"the activation slope is below {SATURATED_BELOW:g}, at {MOST:.0%} or more)")
    return lines


def idle_lines(report: HealthReport) -> list[str]:
    """One line per layer that has dead or saturated units (or channels), naming them."""
    lines = []
    for e in report.layers:
        plural = "channels" if e.per == "channel" else "units"
        for kind, found in (("dead", e.dead_units), ("saturated", e.saturated_units)):
            if found.size:
                shown = ", ".join(str(int(i)) for i in found[:20]) + (", ..." if found.size > 20 else "")
                lines.append(f"L{e.index + 1} {e.label}: {found.size} {kind} {plural}: {shown}")
    return lines


def unit_document(u: UnitHealth) -> dict[str, Any]:
    """The JSON form of one unit's or channel's health."""
    ratio = u.update_ratio if u.update_ratio == u.update_ratio else None
    return {"layer": u.layer + 1, "per": u.per, "index": u.unit, "positions": u.positions, "active": u.active,
            "saturated": u.saturated, "weight_norm": u.weights, "slope_norm": u.slopes, "update_ratio": ratio,
            "signal_rms": u.signal_rms, "state": state_of(u) or None}
