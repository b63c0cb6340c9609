"""Checkpoints: one safetensors file holding the weights and the session's state.

Layout (our own), format 2:

- tensors ``L1.W``, ``L1.b``, ... : the parameters, one float64 array per
  layer array, named like the weights in the table (without indices);
- tensors ``rule.<array>.<L1.W>`` : the update rule's memory (momentum's
  velocity, Adam's m and v), split the same way;
- tensors ``last_update.<L1.W>`` (optional): the change the last step made;
- tensors ``history.*``: the cost history, whatever its length, as arrays
  (:mod:`stepper.formats.history_tensors`); a session of ten million steps
  loads in a fraction of a second;
- tensors ``batch.*``: the order of the training rows in the current epoch of
  mini-batches (:func:`stepper.formats.saved_state.read_state` names them);
- tensors ``state.<L2.running_mean>``: what layers keep besides their weights
  (a batch norm's running mean and variance), when the model has any;
- header metadata key ``stepper``: a JSON document with ``format`` (2), the
  step count, rate, rule, rule step ``t``, slope source, batch size, the names
  of frozen parameters, the random generators' states, the SHA-256 of the
  model file, and ``history_sample``, a thinned copy of the cost history (at
  most 1,000 entries) for programs that read only the metadata; and the
  training settings (``l2``, ``weight_decay``, ``clip_norm``, ``schedule``;
  optional, a checkpoint without them keeps the model file's).

Format 1 (the history as a list in the metadata) is still read.

The file is a plain safetensors file: any safetensors reader can open it.
Nothing in it is executable and nothing is ever unpickled. Every array is made
C-contiguous before saving (safetensors 0.8.0's numpy API was found to save
transposed or strided arrays without error and read them back wrong).

Reading is bounded: only a regular file is read, its header length is checked
against :data:`MAX_HEADER` before the header is read, and every tensor's
offsets against the file's size before the tensors are read.
"""

from __future__ import annotations

import hashlib
import json
import os
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import ParamLayout
from stepper.errors import CheckpointError
from stepper.formats.atomic import write_atomic
from stepper.formats.reading import CHECKPOINT_LIMIT, loads_json, open_regular, record_read

Array = NDArray[np.float64]

FORMAT = 2
READABLE_FORMATS = (1, 2)
META_KEY = "stepper"
#: Largest safetensors header read (the safetensors library's own limit).
MAX_HEADER = 100 * 1024 * 1024
LAST_UPDATE = "last_update."
#: Prefixes of tensors that are not parameters.
STATE = "state."
STATE_PREFIXES = ("rule.", "history.", "batch.", LAST_UPDATE, STATE)


@dataclass
class CheckpointData:
    """What a checkpoint holds, in flat form.

    Attributes:
        theta: parameters ``(n_params,)``.
        rule_arrays: the rule's memory, each ``(n_params,)``.
        meta: the JSON metadata (see module docstring).
        sha256: SHA-256 of the file's bytes, when read from a file (journals record it).
        last_update: the last step's change ``(n_params,)``, or None when there is none.
        extra: other state tensors by name (``history.*``, ``batch.*``).
        state: the layers' kept arrays ``(n_state,)`` (running statistics); empty when none.
    """

    theta: Array
    rule_arrays: dict[str, Array] = field(default_factory=dict)
    meta: dict[str, Any] = field(default_factory=dict)
    sha256: str = ""
    last_update: Array | None = None
    extra: dict[str, NDArray[Any]] = field(default_factory=dict)
    state: Array = field(default_factory=lambda: np.empty(0))


def encode(layout: ParamLayout, data: CheckpointData, state_layout: ParamLayout | None = None) -> bytes:
    """The bytes of a safetensors checkpoint (``state_layout`` places ``data.state``)."""
    from safetensors.numpy import save

    tensors: dict[str, NDArray[Any]] = {}
    for block in (state_layout.blocks if state_layout is not None else ()):
        tensors[f"{STATE}{block.prefix}"] = np.ascontiguousarray(
            data.state[block.start : block.stop].reshape(block.shape))
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
    for name, array in data.extra.items():
        assert name.startswith(STATE_PREFIXES), name
        tensors[name] = np.ascontiguousarray(array)
    meta = dict(data.meta, format=FORMAT)
    return bytes(save(tensors, metadata={META_KEY: json.dumps(meta, allow_nan=False)}))


def save_checkpoint(path: Path, layout: ParamLayout, data: CheckpointData,
                    state_layout: ParamLayout | None = None) -> None:
    """Write a checkpoint atomically (an interrupted save leaves the old file intact)."""
    try:
        write_atomic(Path(path), encode(layout, data, state_layout))
    except OSError as exc:
        raise CheckpointError(f"{path}: cannot write the checkpoint ({exc.strerror or exc})") from None


def read_header(path: Path, raw: bytes) -> dict[str, Any]:
    """The JSON header of a safetensors file (tensor table and ``__metadata__``)."""
    if len(raw) < 8:
        raise CheckpointError(f"{path}: too short to be a safetensors file")
    (size,) = struct.unpack("<Q", raw[:8])
    if size > len(raw) - 8:
        raise CheckpointError(f"{path}: not a safetensors file (header length {size} is past the end)")
    return _header_json(path, raw[8 : 8 + size])


def _header_json(path: Path, text: bytes) -> dict[str, Any]:
    try:
        header = json.loads(text)
    except RecursionError:
        raise CheckpointError(f"{path}: not a safetensors file (its header is nested too deeply)") from None
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise CheckpointError(f"{path}: not a safetensors file (its header is not JSON)") from None
    if not isinstance(header, dict):
        raise CheckpointError(f"{path}: not a safetensors file (its header is not a table)")
    return header


def read_tensors(path: Path) -> tuple[dict[str, NDArray[Any]], dict[str, Any]]:
    """All tensors of a safetensors file, and its header; errors name the file."""
    return _parse(path, _read_bytes(path))


def read_tensors_hashed(path: Path) -> tuple[dict[str, NDArray[Any]], dict[str, Any], str]:
    """:func:`read_tensors`, and the SHA-256 of the file's bytes."""
    raw = _read_bytes(path)
    tensors, header = _parse(path, raw)
    return tensors, header, hashlib.sha256(raw).hexdigest()


def is_checkpoint(path: Path) -> bool:
    """True when ``path`` is a regular file whose safetensors header has Stepper's metadata.

    Reads only the header (bounded); any problem reading it means False.
    """
    try:
        fd = open_regular(path, CHECKPOINT_LIMIT, CheckpointError)
    except CheckpointError:
        return False
    with open(fd, "rb", closefd=True) as handle:
        head = handle.read(8)
        if len(head) < 8:
            return False
        (size,) = struct.unpack("<Q", head)
        if size > MAX_HEADER:
            return False
        try:
            header = _header_json(path, handle.read(size))
        except CheckpointError:
            return False
    meta = header.get("__metadata__")
    return isinstance(meta, dict) and META_KEY in meta


def _read_bytes(path: Path) -> bytes:
    """The file's bytes, after checking that it is a regular file and that its header length is sane."""
    fd = open_regular(path, CHECKPOINT_LIMIT, CheckpointError)
    with open(fd, "rb", closefd=True) as handle:
        try:
            head = handle.read(8)
            if len(head) < 8:
                raise CheckpointError(f"{path}: too short to be a safetensors file")
            (size,) = struct.unpack("<Q", head)
            total = os.fstat(handle.fileno()).st_size
            if size > MAX_HEADER:
                raise CheckpointError(f"{path}: not a safetensors file Stepper reads (its header would be "
                                      f"{size:,} bytes; at most {MAX_HEADER:,} are read)")
            if size > total - 8:
                raise CheckpointError(f"{path}: not a safetensors file (header length {size} is past the end)")
            handle.seek(0)
            raw = handle.read(CHECKPOINT_LIMIT)  # one read of the whole file: no second copy
        except OSError as exc:
            raise CheckpointError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    record_read(path, raw)
    return raw


def _parse(path: Path, raw: bytes) -> tuple[dict[str, NDArray[Any]], dict[str, Any]]:
    from safetensors.numpy import load

    header = read_header(path, raw)
    _check_offsets(path, header, len(raw) - 8 - struct.unpack("<Q", raw[:8])[0])
    try:
        tensors = load(raw)
    except Exception as exc:  # the library raises its own error types for corrupt files
        raise CheckpointError(f"{path}: not a readable safetensors file ({exc})") from None
    return dict(tensors), header


_ITEM = {"F64": 8, "F32": 4, "F16": 2, "BF16": 2, "I64": 8, "I32": 4, "I16": 2, "I8": 1, "U64": 8,
         "U32": 4, "U16": 2, "U8": 1, "BOOL": 1}


def _check_offsets(path: Path, header: dict[str, Any], data_size: int) -> None:
    """Every tensor entry names a known dtype, a shape of whole numbers and offsets inside the data."""
    for name, entry in header.items():
        if name == "__metadata__":
            if not isinstance(entry, dict) or not all(isinstance(v, str) for v in entry.values()):
                raise CheckpointError(f"{path}: not a safetensors file (its metadata is not a table of strings)")
            continue
        where = f"{path}: tensor {name!r}"
        if not isinstance(entry, dict):
            raise CheckpointError(f"{where}: its header entry is not a table")
        dtype, shape, offsets = entry.get("dtype"), entry.get("shape"), entry.get("data_offsets")
        if dtype not in _ITEM:
            raise CheckpointError(f"{where}: unknown dtype {dtype!r}")
        if not (isinstance(shape, list) and len(shape) <= 8
                and all(isinstance(s, int) and not isinstance(s, bool) and 0 <= s < 2**40 for s in shape)):
            raise CheckpointError(f"{where}: its shape is not a list of whole numbers")
        if not (isinstance(offsets, list) and len(offsets) == 2
                and all(isinstance(o, int) and not isinstance(o, bool) for o in offsets)
                and 0 <= offsets[0] <= offsets[1] <= data_size):
            raise CheckpointError(f"{where}: its data offsets are not inside the file")
        if offsets[1] - offsets[0] != int(np.prod(shape, dtype=np.int64)) * _ITEM[dtype]:
            raise CheckpointError(f"{where}: its data size does not match its shape")


def read_meta(path: Path) -> dict[str, Any]:
    """The JSON metadata of a checkpoint, without checking its tensors against a model."""
    raw = _read_bytes(path)
    header = read_header(path, raw)
    _check_offsets(path, header, len(raw) - 8 - struct.unpack("<Q", raw[:8])[0])
    return _meta_of(path, header)


def _meta_of(path: Path, header: dict[str, Any]) -> dict[str, Any]:
    meta_text = (header.get("__metadata__") or {}).get(META_KEY)
    if meta_text is None:
        raise CheckpointError(f"{path}: not a Stepper checkpoint (no '{META_KEY}' metadata)")
    meta = loads_json(meta_text, CheckpointError, f"{path}: the '{META_KEY}' metadata")
    if not isinstance(meta, dict):
        raise CheckpointError(f"{path}: the metadata is not a JSON object")
    if meta.get("format") not in READABLE_FORMATS or isinstance(meta.get("format"), bool):
        raise CheckpointError(f"{path}: unsupported checkpoint format {meta.get('format')!r} "
                              f"(expected one of {', '.join(map(str, READABLE_FORMATS))})")
    return meta


def load_checkpoint(path: Path, layout: ParamLayout, state_layout: ParamLayout | None = None,
                    digest: bool = True) -> CheckpointData:
    """Read a checkpoint and check that it fits ``layout`` (names, shapes, dtype).

    With ``state_layout``, the layers' kept arrays (``state.*`` tensors) are read
    and checked too; otherwise they are ignored.

    The metadata is parsed (bounded JSON) but its fields are checked by
    :func:`stepper.formats.saved_state.read_state`. Without ``digest`` the
    file's SHA-256 is not computed (``sha256`` is empty): a third of the time
    of loading a long history, needed only when a journal records the load.
    """
    raw = _read_bytes(path)
    tensors, header = _parse(path, raw)
    meta = _meta_of(path, header)
    expected = {block.prefix: block for block in layout.blocks}
    weights = {k: v for k, v in tensors.items() if not k.startswith(STATE_PREFIXES)}
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
    if not np.all(np.isfinite(theta)):
        raise CheckpointError(f"{path}: a weight is not a finite number")
    rule_arrays = {key: _flat_group(path, tensors, layout, f"rule.{key}.")
                   for key in sorted({k.split(".")[1] for k in tensors if k.startswith("rule.")})}
    last_update = (_flat_group(path, tensors, layout, LAST_UPDATE)
                   if any(k.startswith(LAST_UPDATE) for k in tensors) else None)
    others = {k: v for k, v in tensors.items() if k.startswith(("history.", "batch."))}
    sha256 = hashlib.sha256(raw).hexdigest() if digest else ""
    state = np.empty(0) if state_layout is None else _kept_state(path, tensors, state_layout)
    return CheckpointData(theta, rule_arrays, meta, sha256, last_update, others, state)


def _kept_state(path: Path, tensors: dict[str, NDArray[Any]], state_layout: ParamLayout) -> Array:
    """The ``state.*`` tensors as one flat array ``(n_state,)``: finite, variances 0 or more."""
    state = _flat_group(path, tensors, state_layout, STATE)
    for block in state_layout.blocks:
        values = state[block.start : block.stop]
        if not np.all(np.isfinite(values)) or (block.key == "running_var" and np.any(values < 0.0)):
            raise CheckpointError(f"{path}: tensor {STATE}{block.prefix} holds a value that is not a finite "
                                  "number" + (" of 0 or more" if block.key == "running_var" else ""))
    return state


def _flat_group(path: Path, tensors: dict[str, NDArray[Any]], layout: ParamLayout, prefix: str) -> Array:
    """The tensors ``<prefix><L1.W>``, one per layer array, as one flat array ``(n_params,)``."""
    flat = np.empty(layout.size)
    for block in layout.blocks:
        tensor_name = f"{prefix}{block.prefix}"
        if tensor_name not in tensors:
            raise CheckpointError(f"{path}: does not fit the model: missing {tensor_name}")
        flat[block.start : block.stop] = _fit(path, tensor_name, tensors[tensor_name], block.shape)
    return flat


def _fit(path: Path, name: str, array: NDArray[Any], shape: tuple[int, ...]) -> Array:
    if array.dtype != np.float64:
        raise CheckpointError(f"{path}: tensor {name} is {array.dtype}, expected float64")
    if tuple(array.shape) != tuple(shape):
        raise CheckpointError(
            f"{path}: tensor {name} has shape {tuple(array.shape)}, the model needs {tuple(shape)}"
        )
    return np.ascontiguousarray(array).ravel()
