"""Initial weights from a safetensors file written by another program.

Three ways to say which tensor fills which array, in the model file's ``[init]``::

    [init]
    file = "state.safetensors"           # relative to the model file
    layout = "torch"                     # an nn.Sequential state_dict: 0.weight, 0.bias, 2.weight...

    [init]
    file = "weights.safetensors"
    layout = "stepper"                   # Stepper's own names and arrangement (L1.W (in, out), L1.b)

    [init]
    file = "trained.safetensors"
    [init.names]                         # our array name = the file's tensor name
    "L1.W" = { tensor = "0.weight", transpose = true }
    "L1.b" = "0.bias"

``layout = "torch"`` maps the Linear layers of an ``nn.Sequential`` state_dict
(tensors ``N.weight`` of shape ``(out, in)`` and ``N.bias``, optionally all
under one prefix such as ``net.``) to the dense layers in the order of their
numbers ``N``, transposes them to Stepper's ``(in, out)``, and gives each layer
its units and its bias from the shapes (:func:`read_torch_layout`); the
``[[layers]]`` then need only their activations.

With ``[init.names]`` every array must be named, in quotes (unquoted, ``L1.W``
is a TOML dotted key: a key ``W`` inside a table ``L1``). A PyTorch ``Linear``
stores its weight ``(out, in)`` and needs ``transpose = true``. A square matrix
fits either way round, so its mapping must say ``transpose = true`` or
``false``: Stepper never guesses it.

Any float dtype is converted to float64. Only tensors are read: safetensors
files hold no code. The model remembers each array's tensor
(:mod:`stepper.formats.weight_sources`) to name weights both ways and to write
them back in the same layout.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network
from stepper.errors import CheckpointError, ModelFileError
from stepper.formats.checkpoint import read_tensors
from stepper.formats.weight_sources import TensorSource, WeightOrigin

Array = NDArray[np.float64]

LAYOUTS = ("torch", "stepper")
_TORCH_NAME = re.compile(r"^(.*?)(\d+)\.(weight|bias)$")


@dataclass(frozen=True)
class TorchLinear:
    """One Linear layer of an nn.Sequential state_dict.

    Attributes:
        weight: tensor name, e.g. ``"0.weight"``; its values ``(out, in)`` in ``W``.
        bias: tensor name or None; its values ``(out,)`` in ``b``.
    """

    weight: str
    W: Array
    bias: str | None
    b: Array | None

    @property
    def n_in(self) -> int:
        return int(self.W.shape[1])

    @property
    def n_out(self) -> int:
        return int(self.W.shape[0])


@dataclass(frozen=True)
class TorchState:
    """The Linear layers of a state_dict in order, with the file and its float type."""

    path: Path
    dtype: str
    linears: tuple[TorchLinear, ...]


def weights_path(label: str, init: Any) -> Path:
    file = init.get("file", str)
    if not file.strip() or "\0" in file:
        init.fail("file", f"{file!r} is not a file name")
    return Path(file) if Path(file).is_absolute() else Path(label).parent / file


def _read(label: str, path: Path) -> dict[str, Array]:
    try:
        tensors, _ = read_tensors(path)
    except CheckpointError as exc:
        raise ModelFileError(f"{label}: init.file: {exc.message}") from None
    return tensors


def _dtype_of(arrays: list[Array]) -> str:
    return "float32" if arrays and all(a.dtype == np.float32 for a in arrays) else "float64"


def read_torch_layout(label: str, init: Any) -> TorchState:
    """The Linear layers of the state_dict ``[init].file`` (with ``layout = "torch"``), in order."""
    if init.has("names"):
        init.fail("names", "not used with layout = \"torch\": the state_dict's own names say which tensor goes where")
    path = weights_path(label, init)
    tensors = _read(label, path)
    found: dict[int, dict[str, str]] = {}
    prefixes = set()
    for name in sorted(tensors):
        match = _TORCH_NAME.match(name)
        if match is None:
            init.fail("layout", f"tensor {name!r} of {path} is not a Linear layer's weight or bias "
                                "(layout = \"torch\" reads N.weight and N.bias of an nn.Sequential)")
            raise AssertionError
        prefixes.add(match[1])
        found.setdefault(int(match[2]), {})[match[3]] = name
    if len(prefixes) > 1:
        init.fail("layout", f"the tensors of {path} sit under several prefixes ({', '.join(sorted(map(repr, prefixes)))}); "
                            "layout = \"torch\" reads one nn.Sequential")
    if not found:
        init.fail("file", f"{path} holds no tensors")
    linears = []
    for number in sorted(found):
        names = found[number]
        if "weight" not in names:
            init.fail("layout", f"{path} has {names['bias']!r} but no {names['bias'][:-4]}weight")
        W = _checked(init, "layout", tensors, names["weight"])
        if W.ndim != 2:
            init.fail("layout", f"tensor {names['weight']!r} has shape {W.shape}; a Linear weight is 2-D (out, in)")
        b = None
        if "bias" in names:
            b = _checked(init, "layout", tensors, names["bias"])
            if b.shape != (W.shape[0],):
                init.fail("layout", f"tensor {names['bias']!r} has shape {b.shape}, but {names['weight']!r} "
                                    f"has {W.shape[0]} outputs")
        linears.append(TorchLinear(names["weight"], W, names.get("bias"), b))
    return TorchState(path, _dtype_of(list(tensors.values())), tuple(linears))


def _checked(init: Any, where: str, tensors: dict[str, Array], name: str) -> Array:
    array = tensors[name]
    if not np.issubdtype(array.dtype, np.floating):
        init.fail(where, f"tensor {name!r} is {array.dtype}, not floating point")
    if not np.all(np.isfinite(array)):
        init.fail(where, f"tensor {name!r} holds a value that is not finite")
    return array


def import_weights(label: str, init: Any, network: Network,
                   torch: TorchState | None = None) -> tuple[Array, WeightOrigin]:
    """Parameters ``(n_params,)`` read from ``[init].file``, and where each array came from.

    ``init`` is the model file's ``[init]`` table accessor (``toml_keys.Keys``);
    ``torch`` the state_dict already read when ``layout = "torch"``.
    """
    for key in ("scheme", "seed", "range"):
        if init.has(key):
            init.fail(key, "not used together with [init].file")
    if torch is not None:
        return _from_torch(network, torch)
    layout = init.choice("layout", LAYOUTS, None) if init.has("layout") else None
    names = init.get("names", dict, None)
    path = weights_path(label, init)
    if layout == "stepper":
        if names is not None:
            init.fail("names", "not used with layout = \"stepper\": the tensors carry Stepper's own names")
        names = {block.prefix: {"tensor": block.prefix, "transpose": False} for block in network.layout.blocks}
    elif names is None:
        init.fail("names", "missing: map each array (e.g. \"L1.W\") to a tensor of the file, "
                           "or give layout = \"torch\" for an nn.Sequential state_dict")
    tensors = _read(label, path)
    theta = np.zeros(network.n_params)
    blocks = {block.prefix: block for block in network.layout.blocks}
    _refuse_unknown(init, names, blocks)
    sources: dict[str, TensorSource] = {}
    used: list[Array] = []
    for prefix, block in blocks.items():
        where = f"names.{prefix}" if layout is None else "layout"
        if prefix not in names:
            init.fail("names", f"no tensor given for {prefix}")
        tensor_name, transpose = _entry(init, where, names[prefix])
        if tensor_name not in tensors:
            init.fail(where, f"{path} has no tensor {tensor_name!r} (it has {', '.join(sorted(tensors)) or 'none'})")
        array = _checked(init, where, tensors, tensor_name)
        used.append(array)
        if transpose is None and array.ndim == 2 and array.shape[0] == array.shape[1] and array.shape[0] > 1:
            init.fail(where, f"tensor {tensor_name!r} is square ({array.shape[0]}x{array.shape[1]}), so its shape "
                             "cannot tell which way round it is stored: say transpose = true (PyTorch's Linear "
                             "stores (out, in)) or transpose = false (stored (in, out)), or use layout = \"torch\"")
        perm = tuple(range(array.ndim))[::-1] if transpose else tuple(range(array.ndim))
        if tuple(array.shape[p] for p in perm) != block.shape:
            hint = " (did you mean transpose = true?)" if tuple(array.shape[::-1]) == block.shape else ""
            init.fail(where, f"tensor {tensor_name!r} gives shape {tuple(array.shape)}, "
                             f"the model needs {block.shape}{hint}")
        values = np.ascontiguousarray(array.transpose(perm), dtype=np.float64).ravel()
        theta[block.start : block.stop] = values
        sources[prefix] = TensorSource(tensor_name, tuple(int(s) for s in array.shape), perm)
    origin = WeightOrigin("safetensors", path, _dtype_of(used), sources, layout or "names")
    return theta, origin


def _refuse_unknown(init: Any, names: dict[str, Any], blocks: dict[str, Any]) -> None:
    unknown = sorted(set(names) - set(blocks))
    if not unknown:
        return
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


def _entry(init: Any, where: str, entry: Any) -> tuple[str, bool | None]:
    """Tensor name and transpose flag (None when not declared) of one ``[init.names]`` entry."""
    if isinstance(entry, str):
        return entry, None
    if isinstance(entry, dict) and isinstance(entry.get("tensor"), str) \
            and isinstance(entry.get("transpose", False), bool) and set(entry) <= {"tensor", "transpose"}:
        return entry["tensor"], entry.get("transpose")
    init.fail(where, "expected a tensor name, or { tensor = \"...\", transpose = true|false }")
    raise AssertionError


def _from_torch(network: Network, torch: TorchState) -> tuple[Array, WeightOrigin]:
    """Parameters from the Linear layers (already matched to the dense layers by the model file)."""
    theta = np.zeros(network.n_params)
    views = network.views(theta)
    sources: dict[str, TensorSource] = {}
    for index, linear in enumerate(torch.linears):
        views[index]["W"][...] = linear.W.T
        sources[f"L{index + 1}.W"] = TensorSource(linear.weight, (linear.n_out, linear.n_in), (1, 0))
        if linear.b is not None and linear.bias is not None:
            views[index]["b"][...] = linear.b
            sources[f"L{index + 1}.b"] = TensorSource(linear.bias, (linear.n_out,), (0,))
    return theta, WeightOrigin("safetensors", torch.path, torch.dtype, sources, "torch")
