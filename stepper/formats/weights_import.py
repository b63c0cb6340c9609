"""Initial weights from a safetensors file written by another program.

Declared in the model file::

    [init]
    file = "trained.safetensors"        # relative to the model file
    [init.names]                         # our array name = the file's tensor name
    "L1.W" = { tensor = "0.weight", transpose = true }
    "L1.b" = "0.bias"
    "L2.W" = { tensor = "2.weight", transpose = true }
    "L2.b" = "2.bias"

A PyTorch ``Linear`` layer stores its weight output-by-input, ``(n_out, n_in)``,
while Stepper's ``W`` is ``(n_in, n_out)``: such tensors need ``transpose = true``.
Every array of the model must be named, in quotes (unquoted, ``L1.W`` is a
TOML dotted key: a key ``W`` inside a table ``L1``); any float dtype is
converted to float64. Only tensors are read: safetensors files hold no code.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network
from stepper.errors import CheckpointError, ModelFileError
from stepper.formats.checkpoint import read_tensors

Array = NDArray[np.float64]


def import_weights(label: str, init: Any, network: Network) -> Array:
    """Parameters ``(n_params,)`` read from the file ``[init].file`` through ``[init.names]``.

    ``init`` is the model file's ``[init]`` table accessor (``model_file._Keys``).
    """
    for key in ("scheme", "seed", "range"):
        if init.has(key):
            init.fail(key, "not used together with [init].file")
    file = init.get("file", str)
    names = init.get("names", dict, None)
    if names is None:
        init.fail("names", "missing: map each array (e.g. \"L1.W\") to a tensor of the file")
    path = Path(file) if Path(file).is_absolute() else Path(label).parent / file
    try:
        tensors, _ = read_tensors(path)
    except CheckpointError as exc:
        raise ModelFileError(f"{label}: init.file: {exc.message}") from None
    theta = np.zeros(network.n_params)
    blocks = {block.prefix: block for block in network.layout.blocks}
    unknown = sorted(set(names) - set(blocks))
    if unknown:
        name = unknown[0]
        hint = ""
        entry = names[name]
        if isinstance(entry, dict):
            # Unquoted, L1.W = ... is TOML for the key W of a table L1.
            dotted = [f"{name}.{key}" for key in entry if f"{name}.{key}" in blocks]
            if dotted:
                hint = (f'; write the name in quotes: "{dotted[0]}" = ... '
                        f"(without them TOML reads {dotted[0]} as a key {dotted[0].split('.', 1)[1]} "
                        f"inside a table {name})")
        init.fail(f"names.{name}", f"the model has no array {name} (it has {', '.join(blocks)}){hint}")
    for prefix, block in blocks.items():
        where = f"names.{prefix}"
        if prefix not in names:
            init.fail("names", f"no tensor given for {prefix}")
        entry = names[prefix]
        if isinstance(entry, str):
            tensor_name, transpose = entry, False
        elif isinstance(entry, dict) and isinstance(entry.get("tensor"), str) \
                and isinstance(entry.get("transpose", False), bool) and set(entry) <= {"tensor", "transpose"}:
            tensor_name, transpose = entry["tensor"], entry.get("transpose", False)
        else:
            init.fail(where, "expected a tensor name, or { tensor = \"...\", transpose = true|false }")
            raise AssertionError
        if tensor_name not in tensors:
            init.fail(where, f"{path} has no tensor {tensor_name!r} (it has {', '.join(sorted(tensors)) or 'none'})")
        array = tensors[tensor_name]
        if not np.issubdtype(array.dtype, np.floating):
            init.fail(where, f"tensor {tensor_name!r} is {array.dtype}, not floating point")
        if transpose:
            array = array.T
        if tuple(array.shape) != block.shape:
            hint = " (did you mean transpose = true?)" if tuple(array.shape[::-1]) == block.shape else ""
            init.fail(where, f"tensor {tensor_name!r} gives shape {tuple(array.shape)}, "
                             f"the model needs {block.shape}{hint}")
        values = np.ascontiguousarray(array, dtype=np.float64).ravel()
        if not np.all(np.isfinite(values)):
            init.fail(where, f"tensor {tensor_name!r} holds a value that is not finite")
        theta[block.start : block.stop] = values
    return theta
