"""A helper for a user's own test suite: check one custom layer alone, on random inputs.

In the manner of a framework's gradient checker, with Stepper's per-weight
verdicts::

    from stepper.testing import check_layer
    from mylayers import GatedUnits

    def test_gated_units_backward():
        check_layer(GatedUnits(n_in=5, units=3, options={}), n_in=5)

The layer is the same class a model file names (see README.md, "Custom
layers"): ``n_out``, ``init(rng)``, ``forward(params, X)`` and
``backward(params, cache, dOut)``. It runs on seeded random inputs ``X``
``(n_samples, n_in)`` against a half squared error to random targets, so every
output and every weight takes part. Each parameter's slope from ``backward`` is
compared with central finite differences, and so is ``dX``. Any disagreement
raises AssertionError naming the worst weights; a layer that raises or returns
arrays of the wrong shape fails the same way, with its own traceback lines.
"""

from __future__ import annotations

import inspect
from pathlib import Path
from typing import Any

import numpy as np

from stepper.api import CheckReport, report_of
from stepper.core.network import Network
from stepper.errors import CustomLayerError
from stepper.formats.custom_layer import wrap_user_layer


def check_layer(layer: Any, n_in: int, *, n_samples: int = 8, seed: int = 0,
                params: dict[str, np.ndarray] | None = None, method: str = "central",
                delta: float | None = None, show: int = 5) -> CheckReport:
    """Check ``layer``'s backward pass against finite differences; AssertionError if a slope disagrees.

    Args:
        layer: an instance of the user's layer class.
        n_in: width of its input.
        n_samples: rows of the random input ``X``, shape ``(n_samples, n_in)``.
        seed: seeds ``X``, the targets and (through ``layer.init``) the parameters.
        params: parameter values to check at, instead of ``layer.init``'s.
        method, delta: the finite differences (central, step the cube root of machine epsilon).
        show: how many of the worst weights the message names.

    Returns the report when every slope agrees.
    """
    __tracebackhide__ = True  # pytest shows the user's test line and the message, not this helper's code
    cls = type(layer).__name__
    try:
        source = inspect.getsourcefile(type(layer))
    except TypeError:
        source = None
    try:
        wrapped = wrap_user_layer(cls, Path(source or f"{cls}.py"), cls, layer, n_in, None)
        net = Network(n_in, [wrapped], "half_squared_error")
        rng = np.random.default_rng(seed)
        values = wrapped.initial_values(rng) if params is None else params
        theta = np.zeros(net.n_params)
        for key, view in net.views(theta)[0].items():
            if key not in values:
                raise AssertionError(f"{cls}: params has no {key!r} (the layer's parameters: "
                                     f"{', '.join(net.views(theta)[0])})")
            view[...] = np.asarray(values[key], dtype=np.float64)
        X = rng.normal(size=(n_samples, n_in))
        Y = rng.normal(size=(n_samples, wrapped.n_out))
        report = report_of(net, theta, X, Y, None, method, delta, n_samples)
    except CustomLayerError as exc:
        raise AssertionError(exc.message) from None
    if report.passed:
        return report
    bad = [row for row in report.rows if row.verdict == "disagree"]
    parts = []
    if bad:
        named = "; ".join(
            f"{row.name.removeprefix('L1.')}: analytic {row.analytic:.6g}, numeric {row.numeric:.6g}, "
            f"relative error {row.relative_error:.2e}"
            for row in report.worst(show) if row.verdict == "disagree")
        parts.append(f"{len(bad)} of {len(report.rows)} slopes disagree with finite differences "
                     f"(worst first: {named})")
    for c in report.input_slopes:
        if not c.passed:
            sample, entry = c.worst()
            parts.append(f"its input slopes dX disagree with finite differences (worst relative error "
                         f"{c.worst_error:.2e} at sample {sample}, input {entry})")
    raise AssertionError(f"{cls}: " + "; ".join(parts))
