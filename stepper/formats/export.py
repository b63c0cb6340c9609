"""One entry point for writing the weights out: ``export_weights`` picks the format by the file's suffix.

Used by ``stepper export``, the Python API and the app's save. The output
never overwrites a file the model was read from, and it is written atomically
(a temporary file, flushed, then renamed), so an interrupted export leaves any
earlier file at that path as it was.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from stepper.errors import UsageError
from stepper.formats.atomic import write_atomic
from stepper.formats.model_file import Setup
from stepper.formats.weight_sources import DTYPES
from stepper.formats.weights_export import LAYOUTS, default_dtype, safetensors_bytes

Array = NDArray[np.float64]

SUFFIXES = (".onnx", ".safetensors")


@dataclass(frozen=True)
class Exported:
    """What an export wrote.

    Attributes:
        path: the file written.
        kind: ``"onnx"`` or ``"safetensors"``.
        layout: the safetensors layout (``"torch"`` or ``"stepper"``), or ``"onnx"``.
        dtype: the float type written.
        cost: the training cost at the weights as Stepper holds them.
        written_cost: the training cost at the weights as written (rounded to ``dtype``).
        evaluation_cost: for a network with dropout or batch norm, whose training
            and evaluation differ, the cost of the evaluation forward pass (no
            dropout, batch norm on the running statistics written) at the weights
            as written: what an inference runtime computes on the training rows; else None.
    """

    path: Path
    kind: str
    layout: str
    dtype: str
    cost: float
    written_cost: float
    evaluation_cost: float | None = None


def export_weights(setup: Setup, theta: Array, target: Path, layout: str | None = None,
                   dtype: str | None = None, inputs: tuple[Path, ...] = (), *, state: Array | None = None,
                   step: int = 0) -> Exported:
    """Write weights ``theta`` ``(n_params,)`` of ``setup``'s network to ``target``.

    ``layout`` (safetensors only) defaults to ``torch``; ``dtype`` to the float
    type the weights came in. ``inputs`` are further files that must not be
    overwritten (a checkpoint the weights were loaded from). ``state``
    ``(n_state,)``: the layers' kept arrays (batch norm's running statistics,
    which an ONNX file holds); by default the network's starting ones.
    ``step``: the update count, whose dropout masks the training cost uses (as
    the session's training cost at that step does).
    """
    target = Path(target)
    suffix = target.suffix.lower()
    if suffix not in SUFFIXES:
        raise UsageError(f"{target}: export writes a .onnx or a .safetensors file")
    if layout is not None and layout not in LAYOUTS:
        raise UsageError(f"unknown layout {layout!r} (expected one of: {', '.join(LAYOUTS)})")
    if layout is not None and suffix == ".onnx":
        raise UsageError(f"{target}: --layout is for a .safetensors file; an ONNX file has the graph's own layout")
    dtype = dtype or default_dtype(setup.origin)
    if dtype not in DTYPES:
        raise UsageError(f"unknown float type {dtype!r} (expected one of: {', '.join(DTYPES)})")
    _refuse_inputs(setup, target, inputs)
    net = setup.network
    if suffix == ".onnx":
        from stepper.formats.onnx_write import onnx_bytes

        data = onnx_bytes(net, theta, setup.origin, dtype, setup.name, state)
        layout = "onnx"
    else:
        layout = layout or "torch"
        data = safetensors_bytes(net, theta, setup.origin, layout, dtype, state, step)
    try:
        write_atomic(target, data)
        # The temporary file was private (0600); a file for another program gets the usual mode.
        os.chmod(target, 0o666 & ~_umask())
    except OSError as exc:
        raise UsageError(f"{target}: cannot be written ({exc.strerror or exc})") from None
    rounded = theta.astype(np.float32).astype(np.float64) if dtype == "float32" else theta
    X, Y = setup.data.X, setup.data.Y
    evaluation = None
    training = net
    if net.has_state or net.varies_by_step:
        kept = net.initial_state() if state is None else state
        training = net.at(True, step, kept)
        kept = kept.astype(np.float32).astype(np.float64) if dtype == "float32" else kept
        evaluation = net.at(False, state=kept).cost(rounded, X, Y)
    return Exported(target, suffix[1:], layout, dtype, training.cost(theta, X, Y), training.cost(rounded, X, Y),
                    evaluation)


def _umask() -> int:
    """The process's file-creation mask (read from /proc where it can be, without changing it)."""
    try:
        with open("/proc/self/status", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    return 0o022  # common practice


def _refuse_inputs(setup: Setup, target: Path, inputs: tuple[Path, ...]) -> None:
    if target.exists() and not target.is_file():
        raise UsageError(f"{target}: exists and is not a regular file; export writes only regular files")
    read = [setup.path, *inputs]
    if setup.origin is not None:
        read.append(setup.origin.file)
    for path in read:
        if _same(path, target):
            raise UsageError(f"{target}: is a file this model was read from; export never overwrites its "
                             "inputs (choose another name)")


def _same(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.realpath(a) == os.path.realpath(b)
