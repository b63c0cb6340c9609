"""Stepper from Python: load a model, check its slopes, drive a session, open the app, export.

For scripts, notebooks and a user's own test suite::

    import numpy as np
    from stepper import api

    setup = api.from_arrays([{"units": 8, "activation": "tanh"}, {"units": 1, "activation": "identity"}],
                            X, Y, loss="mean_squared_error", seed=3)
    report = api.check(setup)              # every weight's analytic and numeric slope
    assert report.passed, report.worst(5)
    session = api.session(setup, rate=0.05)
    session.step(100)                       # every Session operation: undo, freeze, save_checkpoint...
    api.export(session, "net.onnx")         # or "state.safetensors" (PyTorch's layout)

Everything a user can get wrong raises a :class:`stepper.errors.StepperError`
(its message is one sentence naming the file, key or argument). Loading a model
with a custom layer runs that layer's Python file: load only files you trust.
"""

from __future__ import annotations

import argparse
import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from stepper.core.compare import VERDICTS
from stepper.core.gemm import ScaledDense
from stepper.core.gradcheck import iter_check
from stepper.core.input_slopes import DEFAULT_SAMPLES, InputSlopeCheck, check_input_slopes
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.numeric import run_to_end
from stepper.errors import StepperError, UsageError
from stepper.formats.dataset import Dataset
from stepper.formats.export import Exported, export_weights
from stepper.formats.model_file import Setup, load_setup, setup_from_doc
from stepper.formats.weight_sources import WeightOrigin
from stepper.scenarios import resolve_model
from stepper.session import Session

Array = NDArray[np.float64]

__all__ = ["Setup", "Session", "StepperError", "WeightRow", "CheckReport", "load", "from_arrays", "check",
           "session", "open_app", "export"]


@dataclass(frozen=True)
class WeightRow:
    """One weight of a check.

    Attributes:
        name: Stepper's name, ``L1.W[3,0]``.
        source: the file's tensor and index it came from (``fc1.weight[0,3]``), or None.
        value: the weight's value.
        analytic, numeric: its slope by backpropagation and by finite differences.
        relative_error: how far they disagree (NaN where not computed).
        verdict: ``agree``, ``doubtful``, ``disagree`` or ``kink``.
    """

    name: str
    source: str | None
    value: float
    analytic: float
    numeric: float
    relative_error: float
    verdict: str

    def __str__(self) -> str:
        where = f" ({self.source})" if self.source else ""
        return (f"{self.name}{where}: analytic {self.analytic:.6g}, numeric {self.numeric:.6g}, "
                f"relative error {self.relative_error:.2e}, {self.verdict}")


@dataclass(frozen=True)
class CheckReport:
    """A whole check: every weight's row, and the custom layers' input slopes.

    Attributes:
        rows: one :class:`WeightRow` per weight, in Stepper's flat order.
        cost: the cost at the weights checked.
        method, h: the finite differences used.
        input_slopes: per custom layer, its ``dX`` against numeric input slopes.
    """

    rows: tuple[WeightRow, ...]
    cost: float
    method: str
    h: float
    input_slopes: tuple[InputSlopeCheck, ...]

    @property
    def passed(self) -> bool:
        """True when no weight's slopes disagree and every custom layer's ``dX`` agrees."""
        return all(row.verdict != "disagree" for row in self.rows) and all(c.passed for c in self.input_slopes)

    @property
    def counts(self) -> dict[str, int]:
        return {v: sum(row.verdict == v for row in self.rows) for v in VERDICTS}

    def row(self, name: str) -> WeightRow:
        """The row of weight ``name`` (``"L1.W[3,0]"``); KeyError if there is none."""
        for row in self.rows:
            if row.name == name:
                return row
        raise KeyError(name)

    def worst(self, n: int = 5) -> list[WeightRow]:
        """The ``n`` rows with the largest relative error, largest first."""
        def key(row: WeightRow) -> float:
            return -1.0 if row.relative_error != row.relative_error else row.relative_error

        return sorted(self.rows, key=key, reverse=True)[:n]

    def __str__(self) -> str:
        counts = self.counts
        lines = [f"{'passed' if self.passed else 'FAILED'}: " + ", ".join(f"{counts[v]} {v}" for v in VERDICTS)
                 + f" (cost {self.cost:.10g}, {self.method} differences, h = {self.h:.3g})"]
        lines += [f"  {row}" for row in self.worst(5) if row.verdict != "agree"]
        lines += [f"  L{c.layer + 1} input slopes (dX): worst relative error {c.worst_error:.2e}"
                  for c in self.input_slopes if not c.passed]
        return "\n".join(lines)


def load(path: str | Path, *, data: str | Path | None = None, targets: Sequence[str] | None = None,
         inputs: Sequence[str] | None = None, loss: str | None = None) -> Setup:
    """A model file, a scenario folder or name, or an ONNX file with its data.

    For an ONNX file give ``data`` (a CSV file), ``targets`` (column names) and
    ``loss``; ``inputs`` defaults to every other column.
    """
    model = resolve_model(str(path))
    if model.suffix.lower() != ".onnx":
        if any(v is not None for v in (data, targets, inputs, loss)):
            raise UsageError("data, targets, inputs and loss are for an ONNX file; a model file names its own")
        return load_setup(model)
    from stepper.commands.graph_data import load_graph_setup

    args = argparse.Namespace(data=None if data is None else Path(data), loss=loss,
                              targets=None if targets is None else ",".join(targets),
                              inputs=None if inputs is None else ",".join(inputs))
    return load_graph_setup(args, model)


def from_arrays(network: Sequence[dict[str, Any]] | str | Path, X: ArrayLike, Y: ArrayLike, loss: str, *,
                X_val: ArrayLike | None = None, Y_val: ArrayLike | None = None, init: str = "glorot_uniform",
                seed: int = 0, name: str = "arrays", folder: str | Path = ".") -> Setup:
    """A setup from arrays: ``X`` ``(n_samples, n_inputs)``, ``Y`` ``(n_samples, n_outputs)``.

    ``network`` is a list of layer tables as a model file's ``[[layers]]`` give
    them (``{"units": 8, "activation": "tanh"}``; custom layers too, their
    ``file`` relative to ``folder``), or the path of an ONNX file. Starting
    weights are drawn by ``init`` with ``seed``, unless the layers give them
    inline or the graph holds them. A ``Y`` of one column of class numbers in
    front of a softmax output becomes one-hot targets.
    """
    data = _dataset(X, Y, X_val, Y_val)
    doc: dict[str, Any] = {"name": name, "loss": loss}
    if isinstance(network, (str, Path)):
        doc["network"] = str(Path(network).resolve())
    else:
        doc["layers"] = [dict(layer) for layer in network]
        if not all("weights" in layer for layer in network):
            doc["init"] = {"scheme": init, "seed": seed}
    digest = hashlib.sha256(json.dumps(doc, sort_keys=True, default=str).encode("utf-8"))
    for array in (data.X, data.Y, data.X_val, data.Y_val):
        digest.update(np.ascontiguousarray(array).tobytes())
    path = Path(folder).resolve() / f"{name}.toml"
    return setup_from_doc(doc, path, digest.digest(), data=data, label=f"{name} (from arrays)")


def _array(name: str, value: ArrayLike, rows: int | None = None) -> Array:
    try:
        array = np.array(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise UsageError(f"{name}: expected an array of numbers") from None
    if array.ndim == 1:
        array = array[:, None]
    if array.ndim != 2 or array.shape[0] == 0 or array.shape[1] == 0:
        raise UsageError(f"{name}: expected shape (n_samples, n_columns), got {array.shape}")
    if rows is not None and array.shape[0] != rows:
        raise UsageError(f"{name}: {array.shape[0]} rows, but X has {rows}")
    if not np.all(np.isfinite(array)):
        raise UsageError(f"{name}: holds a value that is not a finite number")
    return array


def _dataset(X: ArrayLike, Y: ArrayLike, X_val: ArrayLike | None, Y_val: ArrayLike | None) -> Dataset:
    x = _array("X", X)
    y = _array("Y", Y, x.shape[0])
    if (X_val is None) != (Y_val is None):
        raise UsageError("X_val and Y_val come together")
    if X_val is not None and Y_val is not None:
        xv = _array("X_val", X_val)
        yv = _array("Y_val", Y_val, xv.shape[0])
        if xv.shape[1] != x.shape[1] or yv.shape[1] != y.shape[1]:
            raise UsageError("X_val and Y_val must have the columns of X and Y")
    else:
        xv, yv = np.empty((0, x.shape[1])), np.empty((0, y.shape[1]))
    return Dataset(x, y, xv, yv, tuple(f"x{i}" for i in range(x.shape[1])),
                   tuple(f"y{i}" for i in range(y.shape[1])), np.zeros(x.shape[1]), np.ones(x.shape[1]), "arrays")


def check(model: Setup | Session, *, method: str = "central", delta: float | None = None,
          samples: int | None = None, input_samples: int = DEFAULT_SAMPLES) -> CheckReport:
    """Every weight's analytic slope against its numeric slope, at the model's current weights.

    ``samples`` uses only the first N training samples; ``delta`` is the
    finite-difference step (default: the cube root of machine epsilon for
    central differences). Custom layers' input slopes are checked too.
    """
    setup, theta = (model.setup, model.theta.copy()) if isinstance(model, Session) else (model, model.theta0)
    X, Y = setup.data.X, setup.data.Y
    if samples is not None:
        if not 1 <= samples <= X.shape[0]:
            raise UsageError(f"samples={samples}: the training set has {X.shape[0]} samples")
        X, Y = X[:samples], Y[:samples]
    return report_of(setup.network, theta, X, Y, setup.origin, method, delta, input_samples)


def report_of(net: Network, theta: Array, X: Array, Y: Array, origin: WeightOrigin | None, method: str,
              delta: float | None, input_samples: int) -> CheckReport:
    """The check of ``net`` at ``theta`` ``(n_params,)`` on ``X`` ``(n, n_in)``, ``Y`` ``(n, n_out)``."""
    with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
        result = run_to_end(iter_check(net, theta, X, Y, method, delta))
        assert result is not None
        inputs = tuple(check_input_slopes(net, theta, X, Y, i, input_samples, method, delta)
                       for i, layer in enumerate(net.layers) if not isinstance(layer, (Dense, ScaledDense)))
    sources = origin.source_names(net.layout) if origin is not None else (None,) * net.n_params
    rows = tuple(
        WeightRow(name, sources[i], float(theta[i]), float(result.analytic[i]), float(result.numeric[i]),
                  float(result.rel_error[i]), str(result.verdict[i]))
        for i, name in enumerate(net.layout.names)
    )
    return CheckReport(rows, result.cost, result.method, result.h, inputs)


def session(setup: Setup, *, rate: float = 0.1, rule: str = "gd", seed: int = 0,
            journal: str | Path | None = None) -> Session:
    """A :class:`stepper.session.Session` over ``setup``: step, undo, freeze, perturb, save..."""
    return Session(setup, journal=None if journal is None else Path(journal), rate=rate, rule=rule, seed=seed)


def open_app(session: Session, log_file: str | Path | None = None) -> int:
    """Open the terminal app on ``session`` (blocks until the app is closed); returns its exit code.

    The app draws on the terminal: call it from a terminal, not from a notebook.
    """
    from stepper.commands.parsers import default_log_file
    from stepper.ui.app import run_app

    return run_app(session, Path(log_file) if log_file is not None else default_log_file())


def export(model: Setup | Session, path: str | Path, *, layout: str | None = None,
           dtype: str | None = None) -> Exported:
    """Write the weights to ``path``: ``.onnx``, or ``.safetensors`` in ``layout`` (``torch`` or ``stepper``)."""
    if isinstance(model, Session):
        return export_weights(model.setup, model.theta.copy(), Path(path), layout, dtype, state=model.state.copy(),
                              step=model.step_count)
    return export_weights(model, model.theta0, Path(path), layout, dtype)
