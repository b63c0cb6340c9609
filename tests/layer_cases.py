"""Built-in layers with settings that exercise every option, shared by the layer tests.

Each case is a layer, seeded random parameters and a seeded random input of a
few samples. Invented numbers, for checking the maths against outside
references (the tests name those); they establish nothing on their own.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import (
    BatchNorm, Builtin, Conv, Dropout, Embedding, Flatten, Grid, LayerNorm, Mode, Pool, same_padding,
)

N_SAMPLES = 6


def grid(size: tuple[int, ...], window: tuple[int, ...], stride: tuple[int, ...],
         padding: str | int = "valid") -> Grid:
    """A window geometry with ``valid``, ``same`` or a number of zeros on each side."""
    if padding == "same":
        pad = tuple(same_padding(n, w, s) for n, w, s in zip(size, window, stride))
    elif padding == "valid":
        pad = tuple((0, 0) for _ in size)
    else:
        pad = tuple((int(padding), int(padding)) for _ in size)
    return Grid(size, window, stride, pad)


@dataclass(frozen=True)
class Case:
    """One layer to check: its settings as a model file would give them, in words."""

    name: str
    layer: Builtin
    settings: dict[str, Any]


def cases() -> list[Case]:
    act = ACTIVATIONS
    out: list[Case] = []
    for padding in ("valid", "same", 1):
        g = grid((7, 6), (3, 2), (2, 1), padding)
        out.append(Case(f"conv2d-{padding}", Conv((2, 7, 6), 3, g, act["tanh"]),
                        {"kernel": (3, 2), "stride": (2, 1), "padding": padding, "activation": "tanh"}))
    for padding in ("valid", "same", 2):
        g = grid((11,), (4,), (2,), padding)
        out.append(Case(f"conv1d-{padding}", Conv((2, 11), 3, g, act["sigmoid"]),
                        {"kernel": (4,), "stride": (2,), "padding": padding, "activation": "sigmoid"}))
    out.append(Case("conv2d-relu-nobias", Conv((1, 5, 5), 2, grid((5, 5), (3, 3), (1, 1), 1), act["relu"], False),
                    {"kernel": (3, 3), "stride": (1, 1), "padding": 1, "activation": "relu", "bias": False}))
    out.append(Case("max_pool-2d", Pool((2, 6, 7), grid((6, 7), (2, 3), (2, 2)), "max"),
                    {"size": (2, 3), "stride": (2, 2)}))
    out.append(Case("max_pool-1d-overlap", Pool((3, 9), grid((9,), (3,), (2,)), "max"),
                    {"size": (3,), "stride": (2,)}))
    out.append(Case("avg_pool-2d", Pool((2, 6, 6), grid((6, 6), (2, 2), (2, 2)), "avg"),
                    {"size": (2, 2), "stride": (2, 2)}))
    out.append(Case("avg_pool-1d-overlap", Pool((2, 9), grid((9,), (3,), (2,)), "avg"),
                    {"size": (3,), "stride": (2,)}))
    out.append(Case("flatten", Flatten((2, 3, 4)), {}))
    out.append(Case("dropout", Dropout((10,), 0.4, seed=3).bind(Mode(True, 5), {}), {"rate": 0.4}))
    out.append(Case("layer_norm-shaped", LayerNorm((2, 3, 4)), {"epsilon": 1e-5}))
    out.append(Case("layer_norm-flat", LayerNorm((5,), 1e-3), {"epsilon": 1e-3}))
    out.append(Case("batch_norm-shaped", BatchNorm((3, 4, 5)), {"epsilon": 1e-5}))
    out.append(Case("batch_norm-1d", BatchNorm((2, 7)), {"epsilon": 1e-5}))
    out.append(Case("batch_norm-flat", BatchNorm((6,), epsilon=1e-3), {"epsilon": 1e-3}))
    out.append(Case("embedding", Embedding((4,), (0, 2), 5, 3), {"columns": (0, 2), "categories": 5, "size": 3}))
    return out


def params_of(layer: Builtin, seed: int = 0) -> dict[str, np.ndarray]:
    """Seeded random values for every parameter (scales around 1, so no entry is special)."""
    rng = np.random.default_rng(seed)
    return {spec.key: rng.normal(1.0 if spec.key == "scale" else 0.0, 0.7, spec.shape)
            for spec in layer.param_specs()}


def input_of(layer: Builtin, seed: int = 1, n: int = N_SAMPLES) -> np.ndarray:
    """Seeded random input rows ``(n, n_in)``; category columns of an embedding hold category numbers."""
    rng = np.random.default_rng(seed)
    X = rng.normal(0.0, 1.0, (n, layer.n_in))
    if isinstance(layer, Embedding):
        X[:, list(layer.columns)] = rng.integers(0, layer.categories, (n, len(layer.columns)))
    return X
