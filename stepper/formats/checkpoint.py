"""Checkpoints: one safetensors file holding the weights and the session's state.

Layout (our own):

- tensors ``L1.W``, ``L1.b``, ... : the parameters, one float64 array per
  layer array, named like the weights in the table (without indices);
- tensors ``rule.<array>.<L1.W>`` : the update rule's memory (momentum's
  velocity, Adam's m and v), split the same way;
- tensors ``last_update.<L1.W>`` (optional): the change the last step made;
- header metadata key ``stepper``: a JSON document with ``format`` (1), the
  step count, rate, rule, rule step ``t``, slope source, batch size, the names
  of frozen parameters, the cost history, the SHA-256 of the model file, and
  the training settings (``l2``, ``weight_decay``, ``clip_norm``, ``schedule``;
  optional, a checkpoint without them keeps the model file's).

The file is a plain safetensors file: any safetensors reader can open it.
Nothing in it is executable and nothing is ever unpickled. Every array is made
C-contiguous before saving (safetensors 0.8.0's numpy API was found to save
transposed or strided arrays without error and read them back wrong).
"""

from __future__ import annotations

import hashlib
import json
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import ParamLayout
from stepper.errors import CheckpointError
from stepper.formats.atomic import write_atomic

Array = NDArray[np.float64]

FORMAT = 1
META_KEY = "stepper"
LAST_UPDATE = "last_update."


@dataclass
class CheckpointData:
    """What a checkpoint holds, in flat form.

    Attributes:
        theta: parameters ``(n_params,)``.
        rule_arrays: the rule's memory, each ``(n_params,)``.
        meta: the JSON metadata (see module docstring).
        sha256: SHA-256 of the file's bytes, when read from a file (journals record it).
        last_update: the last step's change ``(n_params,)``, or None when there is none.
    """

    theta: Array
    rule_arrays: dict[str, Array] = field(default_factory=dict)
    meta: dict[str, Any] = field(default_factory=dict)
    sha256: str = ""
    last_update: Array | None = None


def encode(layout: ParamLayout, data: CheckpointData) -> bytes:
    """The bytes of a safetensors checkpoint."""
    from safetensors.numpy import save

    tensors: dict[str, Array] = {}
    for block in layout.blocks:
        tensors[block.prefix] = np.ascontiguousarray(data.theta[block.start : block.stop].reshape(block.shape))
        for key, array in data.rule_arrays.items():
            tensors[f"rule.{key}.{block.prefix}"] = np.ascontiguousarray(
                array[block.start : block.stop].reshape(block.shape)
            )
        if data.last_update is not None:
            tensors[f"{LAST_UPDATE}{block.prefix}"] = np.ascontiguousarray(
                data.last_update[block.start : block.stop].reshape(block.shape)
            )
    meta = dict(data.meta, format=FORMAT)
    return bytes(save(tensors, metadata={META_KEY: json.dumps(meta)}))


def save_checkpoint(path: Path, layout: ParamLayout, data: CheckpointData) -> None:
    """Write a checkpoint atomically (an interrupted save leaves the old file intact)."""
    try:
        write_atomic(Path(path), encode(layout, data))
    except OSError as exc:
        raise CheckpointError(f"{path}: cannot write the checkpoint ({exc.strerror or exc})") from None


def read_header(path: Path, raw: bytes) -> dict[str, Any]:
    """The JSON header of a safetensors file (tensor table and ``__metadata__``)."""
    if len(raw) < 8:
        raise CheckpointError(f"{path}: too short to be a safetensors file")
    (size,) = struct.unpack("<Q", raw[:8])
    if size > len(raw) - 8:
        raise CheckpointError(f"{path}: not a safetensors file (header length {size} is past the end)")
    try:
        header = json.loads(raw[8 : 8 + size])
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise CheckpointError(f"{path}: not a safetensors file (its header is not JSON)") from None
    if not isinstance(header, dict):
        raise CheckpointError(f"{path}: not a safetensors file (its header is not a table)")
    return header


def read_tensors(path: Path) -> tuple[dict[str, Array], dict[str, Any]]:
    """All tensors of a safetensors file, and its header; errors name the file."""
    return _parse(path, _read_bytes(path))


def _read_bytes(path: Path) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise CheckpointError(f"{path}: no such file") from None
    except OSError as exc:
        raise CheckpointError(f"{path}: cannot be read ({exc.strerror})") from None


def _parse(path: Path, raw: bytes) -> tuple[dict[str, Array], dict[str, Any]]:
    from safetensors.numpy import load

    header = read_header(path, raw)
    try:
        tensors = load(raw)
    except Exception as exc:  # the library raises its own error types for corrupt files
        raise CheckpointError(f"{path}: not a readable safetensors file ({exc})") from None
    return dict(tensors), header


def read_meta(path: Path) -> dict[str, Any]:
    """The JSON metadata of a checkpoint, without checking its tensors against a model."""
    header = read_header(path, _read_bytes(path))
    return _meta_of(path, header)


def _meta_of(path: Path, header: dict[str, Any]) -> dict[str, Any]:
    meta_text = (header.get("__metadata__") or {}).get(META_KEY)
    if meta_text is None:
        raise CheckpointError(f"{path}: not a Stepper checkpoint (no '{META_KEY}' metadata)")
    try:
        meta = json.loads(meta_text)
    except json.JSONDecodeError:
        raise CheckpointError(f"{path}: the '{META_KEY}' metadata is not valid JSON") from None
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise CheckpointError(f"{path}: unsupported checkpoint format {meta.get('format')!r} (expected {FORMAT})"
                              if isinstance(meta, dict) else f"{path}: the metadata is not a JSON object")
    return meta


def load_checkpoint(path: Path, layout: ParamLayout) -> CheckpointData:
    """Read a checkpoint and check that it fits ``layout`` (names, shapes, dtype)."""
    raw = _read_bytes(path)
    tensors, header = _parse(path, raw)
    meta = _meta_of(path, header)
    expected = {block.prefix: block for block in layout.blocks}
    weights = {k: v for k, v in tensors.items() if not k.startswith(("rule.", LAST_UPDATE))}
    missing = sorted(set(expected) - set(weights))
    extra = sorted(set(weights) - set(expected))
    if missing or extra:
        parts = []
        if missing:
            parts.append(f"missing {', '.join(missing)}")
        if extra:
            parts.append(f"has {', '.join(extra)} which the model does not")
        raise CheckpointError(f"{path}: does not fit the model: {'; '.join(parts)}")
    theta = np.empty(layout.size)
    for name, block in expected.items():
        theta[block.start : block.stop] = _fit(path, name, weights[name], block.shape)
    rule_arrays = {key: _flat_group(path, tensors, layout, f"rule.{key}.")
                   for key in sorted({k.split(".")[1] for k in tensors if k.startswith("rule.")})}
    last_update = (_flat_group(path, tensors, layout, LAST_UPDATE)
                   if any(k.startswith(LAST_UPDATE) for k in tensors) else None)
    return CheckpointData(theta, rule_arrays, meta, hashlib.sha256(raw).hexdigest(), last_update)


def _flat_group(path: Path, tensors: dict[str, Array], layout: ParamLayout, prefix: str) -> Array:
    """The tensors ``<prefix><L1.W>``, one per layer array, as one flat array ``(n_params,)``."""
    flat = np.empty(layout.size)
    for block in layout.blocks:
        tensor_name = f"{prefix}{block.prefix}"
        if tensor_name not in tensors:
            raise CheckpointError(f"{path}: does not fit the model: missing {tensor_name}")
        flat[block.start : block.stop] = _fit(path, tensor_name, tensors[tensor_name], block.shape)
    return flat


def _fit(path: Path, name: str, array: Array, shape: tuple[int, ...]) -> Array:
    if array.dtype != np.float64:
        raise CheckpointError(f"{path}: tensor {name} is {array.dtype}, expected float64")
    if tuple(array.shape) != tuple(shape):
        raise CheckpointError(
            f"{path}: tensor {name} has shape {tuple(array.shape)}, the model needs {tuple(shape)}"
        )
    return np.ascontiguousarray(array).ravel()
