"""Shared fixtures: model files in a temporary folder, and small seeded networks."""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import pytest

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.network import Network


@pytest.fixture
def write_model(tmp_path: Path) -> Callable[..., Path]:
    """Write a model file, and optionally its CSV, into ``tmp_path``; returns the model's path.

    Usage: ``write_model(toml_text, csv_text, name="model.toml", csv_name="data.csv")``.
    """

    def write(toml_text: str, csv_text: str | None = None, name: str = "model.toml",
              csv_name: str = "data.csv") -> Path:
        path = tmp_path / name
        path.write_text(toml_text, encoding="utf-8")
        if csv_text is not None:
            (tmp_path / csv_name).write_text(csv_text, encoding="utf-8")
        return path

    return write


@pytest.fixture
def dense_net() -> Callable[..., tuple[Network, np.ndarray]]:
    """Build a network of dense layers with seeded normal weights.

    Usage: ``net, theta = dense_net(n_in, [(units, activation), ...], loss, seed=0, scale=0.6)``;
    a third tuple entry ``False`` drops that layer's bias. Biases are drawn too, so
    they take part in every check.
    """

    def build(n_in: int, spec: Sequence[tuple], loss: str, seed: int = 0,
              scale: float = 0.6) -> tuple[Network, np.ndarray]:
        layers = []
        width = n_in
        for entry in spec:
            units, activation = entry[0], entry[1]
            bias = entry[2] if len(entry) > 2 else True
            layers.append(Dense(width, units, ACTIVATIONS[activation], bias))
            width = units
        net = Network(n_in, layers, loss)
        theta = np.random.default_rng(seed).normal(0.0, scale, net.n_params)
        return net, theta

    return build
