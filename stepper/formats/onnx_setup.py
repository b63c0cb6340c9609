"""The ``network = "net.onnx"`` key of a model file: the layers and weights from an ONNX graph."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import Embedding
from stepper.core.network import Network
from stepper.formats.onnx_import import import_onnx
from stepper.formats.weight_sources import WeightOrigin

Array = NDArray[np.float64]


def graph_network(top: Any, model_path: Path, loss: str) -> tuple[Network, Array, WeightOrigin]:
    """The network of the graph that ``network`` names, its weights ``(n_params,)`` and their origin.

    ``top`` is the model file's top-level ``toml_keys.Keys``.
    """
    name = top.get("network", str)
    if not name.strip() or "\0" in name:
        top.fail("network", f"{name!r} is not a file name")
    path = Path(name) if Path(name).is_absolute() else model_path.parent / name
    if path.suffix.lower() != ".onnx":
        top.fail("network", f"'{name}' is not an ONNX file (expected a name ending in .onnx)")
    imported = import_onnx(path)
    network = Network(imported.n_inputs, imported.layers, loss, input_shape=imported.input_shape)
    theta = np.zeros(network.n_params)
    for views, values in zip(network.views(theta), imported.values):
        for key, array in values.items():
            views[key][...] = array
    if network.has_state:
        # Running statistics from the graph (a BatchNormalization's input_mean and input_var).
        state = network.initial_state()
        for block in network.state_layout.blocks:
            if block.prefix in imported.state:
                state[block.start : block.stop] = imported.state[block.prefix].ravel()
        network.start_state = state
    return network, theta, imported.origin


def graph_categories(network: Network) -> tuple[list[str] | None, int] | None:
    """For a graph that starts with an embedding (a Gather), ``(None, categories)``: every input column
    holds category numbers (see ``data_options.load_data``); None otherwise."""
    first = network.layers[0]
    return (None, first.categories) if isinstance(first, Embedding) else None
