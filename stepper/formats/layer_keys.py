"""The keys of a ``[[layers]]`` table, per layer type: read, checked and built into a layer.

Every layer table may give ``type`` (default ``"dense"``); the other keys
depend on it (``stepper.formats.model_file``'s docstring shows them all)::

    type = "conv2d"        # or conv1d: input [channels, height, width] or [channels, length]
    channels = 8           # output channels
    kernel = 3             # or [3, 3]: the window, one number per spatial axis or one for all
    stride = 1             # optional, default 1
    padding = "same"       # optional: "valid" (default), "same", or a number of zeros on each side
    activation = "relu"    # optional, default "identity" (softmax is for dense layers)
    bias = true            # optional, default true

    type = "max_pool"      # or avg_pool, over [channels, length] or [channels, height, width]
    size = 2               # or [2, 2]
    stride = 2             # optional, default the size

    type = "flatten"       # no other keys

    type = "dropout"
    rate = 0.25            # share of entries dropped while training, 0 <= rate < 1
    seed = 5               # optional, default the layer's position

    type = "layer_norm"
    epsilon = 1e-5         # optional

    type = "batch_norm"
    momentum = 0.9         # optional: share of the running statistics kept at each step
    epsilon = 1e-5         # optional

    type = "activation"    # an activation on its own, over flat or shaped rows; no weights
    activation = "relu"    # any but softmax (which belongs to a dense output layer)

    type = "embedding"     # only as the first layer
    columns = ["weekday"]  # input columns holding category numbers 0 .. categories - 1
    categories = 7
    size = 3               # length of each learned vector

A key the layer's type does not take is refused, naming the key and what the
type takes; so is a layer whose input has the wrong shape for it.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import (
    ActivationLayer, BatchNorm, Conv, Dense, Dropout, Embedding, Flatten, Grid, Layer, LayerNorm, Pool, same_padding, shape_text,
)
from stepper.core.layers.norm import EPSILON, MOMENTUM

#: The keys each layer type takes besides ``type``.
KEYS: dict[str, tuple[str, ...]] = {
    "dense": ("units", "activation", "bias", "weights", "biases"),
    "conv1d": ("channels", "kernel", "stride", "padding", "activation", "bias"),
    "conv2d": ("channels", "kernel", "stride", "padding", "activation", "bias"),
    "max_pool": ("size", "stride"),
    "avg_pool": ("size", "stride"),
    "flatten": (),
    "dropout": ("rate", "seed"),
    "layer_norm": ("epsilon",),
    "batch_norm": ("momentum", "epsilon"),
    "embedding": ("columns", "categories", "size"),
    "activation": ("activation",),
    "custom": ("file", "class", "units", "options"),
}
TYPES = tuple(KEYS)
#: The activations that act entry by entry (all but softmax): convolutions and activation layers take these.
ELEMENTWISE = tuple(name for name, act in ACTIVATIONS.items() if act.elementwise)
#: Keys a custom layer refuses with a message of its own (stepper.formats.custom_layer).
_CUSTOM_REFUSES = ("activation", "bias", "weights", "biases")
#: The most categories an embedding may have (a typo guard, like model_file.MAX_PARAMETERS).
MAX_CATEGORIES = 1_000_000


def check_keys(keys: Any, kind: str) -> None:
    """Refuse keys that layers of type ``kind`` do not take, naming what they take."""
    takes = KEYS[kind]
    allowed = set(takes) | {"type"} | (set(_CUSTOM_REFUSES) if kind == "custom" else set())
    for key in keys.table:
        if key in allowed:
            continue
        others = [t for t in TYPES if key in KEYS[t]]
        listing = ", ".join(sorted(takes + ("type",)))
        if not others:
            keys.fail(key, f"unknown key ({_a(kind)} layer takes: {listing})")
        if others == ["custom"]:
            keys.fail(key, 'only a layer with type = "custom" takes this key')
        keys.fail(key, f"{_a(kind)} layer does not take this key (it takes: {listing})")


def _a(kind: str) -> str:
    return f"an {kind}" if kind[0] in "aeiou" else f"a {kind}"


def build_layer(keys: Any, kind: str, index: int, shape: tuple[int, ...], model_path: Path,
                input_names: tuple[str, ...]) -> Layer:
    """The layer a ``[[layers]]`` table describes, for input rows of ``shape``.

    Args:
        keys: the table (``toml_keys.Keys``: its errors name the file and the key).
        kind: the table's ``type``; index: its position (0-based).
        shape: the shape of the layer's input rows.
        model_path: the model file (custom layers' files are relative to it).
        input_names: the data's input columns (an embedding names some).
    """
    check_keys(keys, kind)
    if kind == "custom":
        from stepper.formats.custom_layer import build_custom_layer

        return build_custom_layer(keys, math.prod(shape), model_path)
    if kind == "dense":
        need_flat(keys, kind, shape, index)
        units = _positive(keys, "units", "number of units")
        activation = keys.choice("activation", ACTIVATIONS)
        return Dense(shape[0], units, ACTIVATIONS[activation], keys.get("bias", bool, True))
    if kind in ("conv1d", "conv2d"):
        return _conv(keys, kind, index, shape)
    if kind in ("max_pool", "avg_pool"):
        dims = _need_spatial(keys, kind, index, shape)
        window = _per_axis(keys, "size", dims)
        stride = _per_axis(keys, "stride", dims, window)
        grid = Grid(shape[1:], window, stride, tuple((0, 0) for _ in window))
        _fits(keys, "size", grid, shape)
        return Pool(shape, grid, kind.split("_")[0])
    if kind == "flatten":
        return Flatten(shape)
    if kind == "activation":
        return ActivationLayer(shape, ACTIVATIONS[keys.choice("activation", ELEMENTWISE)])
    if kind == "dropout":
        rate = keys.get("rate", float)
        if not (math.isfinite(rate) and 0.0 <= rate < 1.0):
            keys.fail("rate", f"{rate} is outside [0, 1) (the share of entries dropped)")
        seed = keys.seed("seed") if keys.has("seed") else index
        return Dropout(shape, rate, seed)
    if kind == "layer_norm":
        return LayerNorm(shape, _epsilon(keys))
    if kind == "batch_norm":
        momentum = keys.get("momentum", float, MOMENTUM)
        if not (math.isfinite(momentum) and 0.0 <= momentum < 1.0):
            keys.fail("momentum", f"{momentum} is outside [0, 1) (the share of the running statistics "
                                  "kept at each step)")
        return BatchNorm(shape, momentum, _epsilon(keys))
    return _embedding(keys, index, shape, input_names)


def category_columns(entry: Any) -> tuple[list[str], int] | None:
    """For a first ``[[layers]]`` table that looks like an embedding, its columns and category count.

    Read leniently, before the table is checked, so that the data can leave
    those columns unscaled and check their values; :func:`build_layer` checks
    the keys themselves afterwards.
    """
    if not isinstance(entry, dict) or entry.get("type") != "embedding":
        return None
    columns, count = entry.get("columns"), entry.get("categories")
    if not isinstance(columns, list) or not all(isinstance(c, str) for c in columns):
        return None
    if not isinstance(count, int) or isinstance(count, bool) or not 1 <= count <= MAX_CATEGORIES:
        return None
    return columns, count


def _positive(keys: Any, key: str, what: str = "whole number") -> int:
    value: int = keys.get(key, int)
    if value < 1:
        keys.fail(key, f"{value} is not a positive {what}")
    return value


def _epsilon(keys: Any) -> float:
    value: float = keys.get("epsilon", float, EPSILON)
    if not (math.isfinite(value) and value > 0.0):
        keys.fail("epsilon", f"{value} must be a positive number (it keeps the division finite)")
    return value


def _source(index: int) -> str:
    return "the data's rows" if index == 0 else f"L{index}'s output"


def need_flat(keys: Any, kind: str, shape: tuple[int, ...], index: int) -> None:
    if len(shape) != 1:
        keys.fail("type" if keys.has("type") else "",
                  f"a {kind} layer takes flat rows, but its input ({_source(index)}) has shape "
                  f"{shape_text(shape)}; put a layer with type = \"flatten\" before it")


def _need_spatial(keys: Any, kind: str, index: int, shape: tuple[int, ...], dims: int | None = None) -> int:
    """The number of spatial axes of ``shape`` (1 or 2); refuses a flat or mismatched shape."""
    wanted = {1: "[channels, length]", 2: "[channels, height, width]"}
    if dims is None and len(shape) in (2, 3):
        return len(shape) - 1
    if dims is not None and len(shape) == dims + 1:
        return dims
    want = wanted[dims] if dims is not None else f"{wanted[1]} or {wanted[2]}"
    hint = " (set [data] input_shape, e.g. [1, 8, 8] for 8x8 images of one channel)" if index == 0 else ""
    keys.fail("type", f"a {kind} layer takes rows of shape {want}, but its input ({_source(index)}) has shape "
                      f"{shape_text(shape)}{hint}")
    raise AssertionError


def _per_axis(keys: Any, key: str, dims: int, default: Any = ...) -> tuple[int, ...]:
    """A positive whole number for every axis, or a list of ``dims`` of them."""
    if not keys.has(key) and default is not ...:
        return tuple(default)
    value = keys.table.get(key)
    if isinstance(value, int) and not isinstance(value, bool):
        values = [value] * dims
    elif isinstance(value, list) and len(value) == dims and all(
            isinstance(v, int) and not isinstance(v, bool) for v in value):
        values = list(value)
    elif isinstance(value, list):
        keys.fail(key, f"expected a whole number or a list of {dims} whole numbers")
    else:
        keys.get(key, int)  # refuses a missing key or a wrong type with the usual message
        raise AssertionError
    if any(v < 1 for v in values):
        keys.fail(key, f"{value} is not positive")
    return tuple(values)


def _fits(keys: Any, key: str, grid: Grid, shape: tuple[int, ...]) -> None:
    if min(grid.out) < 1:
        padded = shape_text(grid.padded)
        keys.fail(key, f"a {shape_text(grid.window)} window does not fit the input's "
                       f"{shape_text(shape[1:])} positions ({padded} with padding)")


def _conv(keys: Any, kind: str, index: int, shape: tuple[int, ...]) -> Conv:
    dims = _need_spatial(keys, kind, index, shape, int(kind[4]))
    channels = _positive(keys, "channels", "number of channels")
    window = _per_axis(keys, "kernel", dims)
    stride = _per_axis(keys, "stride", dims, (1,) * dims)
    padding = keys.table.get("padding", "valid")
    size = shape[1:]
    if padding == "valid":
        pad = tuple((0, 0) for _ in size)
    elif padding == "same":
        pad = tuple(same_padding(n, w, s) for n, w, s in zip(size, window, stride))
    elif isinstance(padding, int) and not isinstance(padding, bool) and 0 <= padding <= max(window):
        pad = tuple((padding, padding) for _ in size)
    else:
        keys.fail("padding", f"{padding!r} is not \"valid\", \"same\" or a number of zeros from 0 to the "
                             f"kernel size {max(window)}")
    activation = keys.choice("activation", ELEMENTWISE, "identity")
    grid = Grid(size, window, stride, pad)
    _fits(keys, "kernel", grid, shape)
    return Conv(shape, channels, grid, ACTIVATIONS[activation], keys.get("bias", bool, True))


def _embedding(keys: Any, index: int, shape: tuple[int, ...], input_names: tuple[str, ...]) -> Embedding:
    if index != 0:
        keys.fail("type", "an embedding reads category columns of the data, so it must be the first layer")
    if len(shape) != 1:
        keys.fail("type", f"an embedding takes flat rows, but [data].input_shape makes them {shape_text(shape)}")
    columns = keys.names("columns")
    unknown = [c for c in columns if c not in input_names]
    if unknown:
        keys.fail("columns", f"{unknown[0]!r} is not one of [data].inputs ({', '.join(input_names)})")
    count = _positive(keys, "categories")
    if count > MAX_CATEGORIES:
        keys.fail("categories", f"{count:,} is more than the {MAX_CATEGORIES:,} Stepper handles")
    size = _positive(keys, "size")
    return Embedding(shape, tuple(input_names.index(c) for c in columns), count, size)
