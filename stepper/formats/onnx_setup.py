"""The ``network = "net.onnx"`` key of a model file: the layers and weights from an ONNX graph."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network
from stepper.formats.onnx_import import import_onnx
from stepper.formats.weight_sources import WeightOrigin

Array = NDArray[np.float64]


def graph_network(top: Any, model_path: Path, loss: str) -> tuple[Network, Array, WeightOrigin]:
    """The network of the graph that ``network`` names, its weights ``(n_params,)`` and their origin.

    ``top`` is the model file's top-level ``model_file._Keys``.
    """
    name = top.get("network", str)
    if not name.strip() or "\0" in name:
        top.fail("network", f"{name!r} is not a file name")
    path = Path(name) if Path(name).is_absolute() else model_path.parent / name
    if path.suffix.lower() != ".onnx":
        top.fail("network", f"'{name}' is not an ONNX file (expected a name ending in .onnx)")
    imported = import_onnx(path)
    network = Network(imported.n_inputs, imported.layers, loss)
    theta = np.zeros(network.n_params)
    for views, values in zip(network.views(theta), imported.values):
        for key, array in values.items():
            views[key][...] = array
    return network, theta, imported.origin
