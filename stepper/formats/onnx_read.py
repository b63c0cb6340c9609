"""Reading an ONNX file into a plain description of its graph, checked at the edges.

ONNX (onnx.ai) is the open exchange format that frameworks export networks
to: a protobuf ``ModelProto`` holding a graph of nodes, its input and output,
and the weights as ``initializer`` tensors. This module only reads and checks;
:mod:`stepper.formats.onnx_import` turns the graph into a Stepper network.

Safety and limits:

- only a regular file is read, at most :data:`MAX_BYTES` of it, and the
  protobuf is parsed only by the ``onnx`` package's own message classes
  (:func:`onnx_messages`, loaded on first use so that starting Stepper never
  pays for them);
- a tensor's dimensions are checked before its data is touched, and a tensor
  larger than the network limit is refused;
- external data (a tensor whose values live in another file) is read only from
  a regular file inside the model's own folder, resolving links first: a
  location that is absolute, climbs out with ``..`` or links elsewhere is
  refused, as is an offset or length outside that file;
- every value read is checked to be a finite number of a float type.

Every message is one line that names the file, and the node or tensor.
"""

from __future__ import annotations

import importlib.util
import os
import stat
from dataclasses import dataclass, field
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.errors import ModelFileError

Array = NDArray[np.float64]

#: Largest ONNX file read (the network limit, 10 million float64 weights, is 80 MB).
MAX_BYTES = 256 * 1024 * 1024
#: Most entries one tensor may have (the model file's limit on parameters).
MAX_TENSOR_ENTRIES = 10_000_000
#: Oldest operator set read: the semantics of Softmax and others settled in opset 13.
MIN_OPSET = 13
#: Float element types by ONNX's code (TensorProto.FLOAT = 1, DOUBLE = 11).
FLOAT_TYPES = {1: "float32", 11: "float64"}
#: Whole-number element types read: a graph input of category numbers (an embedding's indices),
#: a Reshape's shape, a Dropout's training_mode (TensorProto.INT32 = 6, INT64 = 7, BOOL = 9).
INT_TYPES = {6: "int32", 7: "int64", 9: "bool"}
#: Most entries of a whole-number initializer (a shape, a flag): they are never weights.
MAX_INT_ENTRIES = 16


@dataclass(frozen=True)
class Node:
    """One node of the graph.

    Attributes:
        index: position in the graph (from 0).
        name: the node's name, possibly empty.
        op: its operator (``"Gemm"``).
        inputs, outputs: tensor names (an empty name is an omitted optional input).
        attributes: attribute name -> value (ints, floats, strings, lists of them).
    """

    index: int
    name: str
    op: str
    inputs: tuple[str, ...]
    outputs: tuple[str, ...]
    attributes: dict[str, Any]

    @property
    def label(self) -> str:
        """``node 'fc1/Gemm' (Gemm)``, or ``node 3 (Gemm)`` when it has no name."""
        return f"node {self.name!r} ({self.op})" if self.name else f"node {self.index} ({self.op})"


@dataclass(frozen=True)
class TensorInfo:
    """The graph's input or output: name, element type, and dimensions (int, or None when symbolic)."""

    name: str
    dtype: str
    dims: tuple[int | None, ...]


@dataclass
class OnnxGraph:
    """An ONNX file, read and checked.

    Attributes:
        path: the file.
        raw: its bytes.
        opset: the version of the default operator set.
        nodes: the nodes in the file's (topological) order.
        input: the one graph input that is not an initializer.
        output: the one graph output.
        initializer_names: names of the initializers, in file order.
        constants: outputs of ``Constant`` nodes, read like initializers (a
            Reshape's shape as exporters write it); the nodes themselves are
            not in ``nodes``, whose ``index`` counts them all the same.
    """

    path: Path
    raw: bytes = field(repr=False)
    opset: int
    nodes: list[Node]
    input: TensorInfo
    output: TensorInfo
    initializer_names: tuple[str, ...]
    _tensors: dict[str, Any] = field(repr=False, default_factory=dict)
    constants: frozenset[str] = frozenset()

    def fail(self, message: str) -> ModelFileError:
        """An error naming the file (raise it)."""
        return ModelFileError(f"{self.path}: {message}")

    def is_initializer(self, name: str) -> bool:
        return name in self._tensors

    def _typed(self, name: str, node: Node, types: dict[int, str], expected: str) -> tuple[Any, str, str, tuple[int, ...]]:
        """Initializer ``name``'s message, how errors name it, its type (one of ``types``) and dimensions."""
        tensor = self._tensors[name]
        where = f"{node.label}: initializer {name!r}"
        dtype = types.get(int(tensor.data_type))
        if dtype is None:
            raise self.fail(f"{where} is of ONNX element type {_type_name(tensor.data_type)}; {expected}")
        return tensor, where, dtype, tuple(int(d) for d in tensor.dims)

    def initializer(self, name: str, node: Node) -> tuple[Array, str]:
        """The initializer ``name`` as float64, and the file's float type; errors name ``node``."""
        tensor, where, dtype, dims = self._typed(name, node, FLOAT_TYPES, "Stepper reads float32 and float64 weights")
        _check_dims(self, where, dims)
        if tensor.data_location == 1:  # TensorProto.EXTERNAL
            values = _external(self, where, tensor, dtype, dims)
        else:
            values = _inline(self, where, tensor, dtype, dims)
        array = np.array(values, dtype=np.float64)
        if not np.all(np.isfinite(array)):
            raise self.fail(f"{where} holds a value that is not a finite number")
        return array, dtype

    def whole_numbers(self, name: str, node: Node) -> tuple[int, ...]:
        """The small int32, int64 or bool initializer ``name`` (a shape, a flag) as whole numbers."""
        tensor, where, dtype, dims = self._typed(name, node, INT_TYPES,
                                                 "Stepper expects whole numbers here (int64, int32 or bool)")
        count = 1
        for d in dims:
            count *= d
        if any(d < 0 for d in dims) or count > MAX_INT_ENTRIES:
            raise self.fail(f"{where} has shape {dims}; Stepper reads at most {MAX_INT_ENTRIES} whole numbers here")
        if tensor.data_location == 1:
            raise self.fail(f"{where} is stored as external data; Stepper reads a shape or a flag only inline")
        if tensor.raw_data:
            code = {"int32": "<i4", "int64": "<i8", "bool": "u1"}[dtype]
            if len(tensor.raw_data) != count * np.dtype(code).itemsize:
                raise self.fail(f"{where}: its data ({len(tensor.raw_data)} bytes) does not match its shape {dims}")
            return tuple(int(v) for v in np.frombuffer(tensor.raw_data, dtype=code))
        typed = tensor.int64_data if dtype == "int64" else tensor.int32_data
        if len(typed) != count:
            raise self.fail(f"{where}: its data ({len(typed)} values) does not match its shape {dims}")
        return tuple(int(v) for v in typed)


def read_onnx(path: Path) -> OnnxGraph:
    """Read and check the ONNX file at ``path``; ModelFileError with one line if it cannot be used."""
    path = Path(path)
    raw = _read_bytes(path)
    model = onnx_messages().ModelProto()
    try:
        model.ParseFromString(raw)
    except Exception as exc:  # protobuf's DecodeError, or a RecursionError for deep nesting
        detail = " ".join(str(exc).split()) or type(exc).__name__
        raise ModelFileError(f"{path}: not an ONNX model, or a truncated one (the protobuf does not parse: "
                             f"{detail})") from None
    if model.ir_version <= 0 or not model.HasField("graph"):
        raise ModelFileError(f"{path}: not an ONNX model (no IR version or no graph in it)")
    opsets = {entry.domain: int(entry.version) for entry in model.opset_import}
    opset = opsets.get("", opsets.get("ai.onnx"))
    if opset is None:
        raise ModelFileError(f"{path}: not a complete ONNX model (it declares no operator set; "
                             "is the file truncated?)")
    if opset < MIN_OPSET:
        raise ModelFileError(f"{path}: written with operator set {opset}; Stepper reads opset {MIN_OPSET} "
                             f"and newer (export again with opset_version={MIN_OPSET} or later)")
    graph = model.graph
    if len(graph.sparse_initializer):
        raise ModelFileError(f"{path}: holds sparse initializers, which Stepper does not read")
    tensors = {t.name: t for t in graph.initializer}
    if len(tensors) != len(graph.initializer):
        raise ModelFileError(f"{path}: two initializers share a name")
    both = [info.name for info in graph.input if info.name in tensors]
    if both:
        raise ModelFileError(
            f"{path}: initializer {both[0]!r} is also a graph input, so whoever runs the graph may replace "
            "it; Stepper reads weights only from initializers that are not inputs (export again with "
            "keep_initializers_as_inputs=False)")
    inputs = [_info(path, "input", info) for info in graph.input]
    outputs = [_info(path, "output", info) for info in graph.output]
    if len(inputs) != 1:
        names = ", ".join(repr(i.name) for i in inputs) or "none"
        raise ModelFileError(f"{path}: the graph has {len(inputs)} data inputs ({names}); Stepper runs a graph "
                             "with exactly one input, the samples")
    if len(outputs) != 1:
        names = ", ".join(repr(o.name) for o in outputs) or "none"
        raise ModelFileError(f"{path}: the graph has {len(outputs)} outputs ({names}); Stepper runs a graph "
                             "with exactly one output")
    constants: dict[str, Any] = {}
    for i, proto in enumerate(graph.node):
        if proto.op_type == "Constant" and proto.domain in ("", "ai.onnx"):
            constants[proto.output[0] if proto.output else ""] = _constant(path, i, proto)
    clash = sorted((set(constants) & set(tensors)) | ({""} & set(constants)))
    if clash:
        raise ModelFileError(f"{path}: a Constant node's output {clash[0]!r} is not a new tensor name")
    nodes = [_node(path, i, proto) for i, proto in enumerate(graph.node) if proto.op_type != "Constant"]
    if not nodes:
        raise ModelFileError(f"{path}: the graph has no nodes")
    return OnnxGraph(path, raw, opset, nodes, inputs[0], outputs[0], tuple(tensors), tensors | constants,
                     frozenset(constants))


_MESSAGES: ModuleType | None = None


def onnx_messages() -> ModuleType:
    """The ``onnx`` package's generated protobuf module (``onnx/onnx_ml_pb2.py``): ModelProto and the rest.

    Loaded from the package's folder without running the package's
    ``__init__``, which imports every helper and ``ml_dtypes`` and took 2 to 3
    seconds on a busy 2-core machine (``python -X importtime -c "import onnx"``);
    the generated module alone takes under 0.1 s. The message classes are the
    same ones ``import onnx`` gives (protobuf keeps one class per message type),
    so a later ``import onnx`` (export) works with them. If the file is not where
    this version of onnx keeps it, the package is imported the ordinary way.
    """
    global _MESSAGES
    if _MESSAGES is None:
        spec = importlib.util.find_spec("onnx")
        folders = list(spec.submodule_search_locations or []) if spec is not None else []
        found = [Path(folder) / "onnx_ml_pb2.py" for folder in folders if (Path(folder) / "onnx_ml_pb2.py").is_file()]
        module_spec = importlib.util.spec_from_file_location("onnx.onnx_ml_pb2", found[0]) if found else None
        if module_spec is None or module_spec.loader is None:
            import onnx

            _MESSAGES = onnx.onnx_ml_pb2
        else:
            module = importlib.util.module_from_spec(module_spec)
            module_spec.loader.exec_module(module)
            _MESSAGES = module
    return _MESSAGES


def _read_bytes(path: Path) -> bytes:
    try:
        info = os.stat(path)
    except FileNotFoundError:
        raise ModelFileError(f"{path}: no such ONNX file") from None
    except (OSError, ValueError) as exc:
        raise ModelFileError(f"{path}: cannot be read ({getattr(exc, 'strerror', None) or exc})") from None
    if stat.S_ISDIR(info.st_mode):
        raise ModelFileError(f"{path}: is a folder, not an ONNX file")
    if not stat.S_ISREG(info.st_mode):
        raise ModelFileError(f"{path}: is not a regular file (Stepper reads ONNX only from regular files)")
    try:
        with open(path, "rb") as handle:
            raw = handle.read(MAX_BYTES + 1)
    except OSError as exc:
        raise ModelFileError(f"{path}: cannot be read ({exc.strerror})") from None
    if len(raw) > MAX_BYTES:
        raise ModelFileError(f"{path}: larger than {MAX_BYTES // 2**20} MiB, the most Stepper reads "
                             "(it is for small networks)")
    if not raw:
        raise ModelFileError(f"{path}: the file is empty")
    return raw


def _info(path: Path, what: str, info: Any) -> TensorInfo:
    """The graph's input or output; an input may also hold whole numbers (an embedding's category numbers)."""
    kind = info.type.WhichOneof("value")
    if kind != "tensor_type":
        raise ModelFileError(f"{path}: graph {what} {info.name!r} is not a tensor (it is a {kind or 'value of no type'})")
    ttype = info.type.tensor_type
    dtype = FLOAT_TYPES.get(int(ttype.elem_type))
    if dtype is None and what == "input" and int(ttype.elem_type) in (6, 7):
        dtype = INT_TYPES[int(ttype.elem_type)]
    if dtype is None:
        raise ModelFileError(f"{path}: graph {what} {info.name!r} is of element type "
                             f"{_type_name(ttype.elem_type)}; Stepper runs float32 and float64 graphs")
    dims: list[int | None] = []
    for dim in ttype.shape.dim:
        if dim.HasField("dim_value"):
            value = int(dim.dim_value)
            if not 0 < value <= MAX_TENSOR_ENTRIES:
                raise ModelFileError(f"{path}: graph {what} {info.name!r} has a dimension of {value}")
            dims.append(value)
        else:
            dims.append(None)
    return TensorInfo(info.name, dtype, tuple(dims))


def _node(path: Path, index: int, proto: Any) -> Node:
    label = f"node {proto.name!r} ({proto.op_type})" if proto.name else f"node {index} ({proto.op_type})"
    if proto.domain not in ("", "ai.onnx"):
        raise ModelFileError(f"{path}: {label} is from the operator domain {proto.domain!r}; Stepper runs "
                             "only the standard ONNX operators")
    attributes: dict[str, Any] = {}
    for attribute in proto.attribute:
        if attribute.ref_attr_name:
            raise ModelFileError(f"{path}: {label}: attribute {attribute.name!r} refers to a function's "
                                 "attribute, which Stepper does not resolve")
        attributes[attribute.name] = _attribute_value(attribute)
    return Node(index, proto.name, proto.op_type, tuple(proto.input), tuple(proto.output), attributes)


def _constant(path: Path, index: int, proto: Any) -> Any:
    """The tensor a ``Constant`` node gives (its ``value``, or a number or list of them), as a TensorProto."""
    label = f"node {proto.name!r} (Constant)" if proto.name else f"node {index} (Constant)"
    messages = onnx_messages()
    given = {attribute.name: attribute for attribute in proto.attribute}
    if len(given) != 1 or len(proto.output) != 1:
        raise ModelFileError(f"{path}: {label}: Stepper reads a Constant with one attribute and one output")
    name, attribute = next(iter(given.items()))
    if name == "value":
        tensor = messages.TensorProto()
        tensor.CopyFrom(attribute.t)
    elif name in ("value_int", "value_ints", "value_float", "value_floats"):
        tensor = messages.TensorProto()
        values = {"value_int": [attribute.i], "value_ints": list(attribute.ints), "value_float": [attribute.f],
                  "value_floats": list(attribute.floats)}[name]
        if name.endswith("s"):
            tensor.dims.append(len(values))
        if "int" in name:
            tensor.data_type = messages.TensorProto.INT64
            tensor.int64_data.extend(values)
        else:
            tensor.data_type = messages.TensorProto.FLOAT
            tensor.float_data.extend(values)
    else:
        raise ModelFileError(f"{path}: {label}: attribute {name} is not read (Stepper reads value, value_int, "
                             "value_ints, value_float, value_floats)")
    tensor.name = proto.output[0]
    return tensor


def _check_dims(graph: OnnxGraph, where: str, dims: tuple[int, ...]) -> None:
    if any(d < 0 for d in dims):
        raise graph.fail(f"{where} has a negative dimension {dims}")
    total = 1
    for d in dims:
        total *= d
    if total > MAX_TENSOR_ENTRIES:
        raise graph.fail(f"{where} has {total:,} entries; Stepper reads at most {MAX_TENSOR_ENTRIES:,}")


def _external(graph: OnnxGraph, where: str, tensor: Any, dtype: str, dims: tuple[int, ...]) -> Any:
    """Values of a tensor stored in a file beside the model; never a file outside the model's folder."""
    entries = {entry.key: entry.value for entry in tensor.external_data}
    location = entries.get("location", "")
    folder = Path(os.path.realpath(graph.path.parent))
    if not location or Path(location).is_absolute() or "\0" in location:
        raise graph.fail(f"{where}: external data location {location!r} is not a file name inside the "
                         "model's folder; Stepper follows external data only within that folder")
    target = Path(os.path.realpath(folder / location))
    if not target.is_relative_to(folder):
        raise graph.fail(f"{where}: external data location {location!r} leads outside the model's folder; "
                         "Stepper follows external data only within that folder")
    width = 4 if dtype == "float32" else 8
    count = 1
    for d in dims:
        count *= d
    try:
        offset = int(entries.get("offset", "0"))
        length = int(entries.get("length", str(count * width)))
    except ValueError:
        raise graph.fail(f"{where}: external data offset or length is not a whole number") from None
    if offset < 0 or length != count * width:
        raise graph.fail(f"{where}: external data of {length} bytes at offset {offset} does not fit its "
                         f"shape {dims} ({count * width} bytes of {dtype})")
    try:
        info = os.stat(target)
        if not stat.S_ISREG(info.st_mode):
            raise graph.fail(f"{where}: external data {location!r} is not a regular file")
        if offset + length > info.st_size:
            raise graph.fail(f"{where}: external data {location!r} ends before offset {offset} + {length} bytes")
        with open(target, "rb") as handle:
            handle.seek(offset)
            data = handle.read(length)
    except FileNotFoundError:
        raise graph.fail(f"{where}: external data file {location!r} is missing") from None
    except OSError as exc:
        raise graph.fail(f"{where}: external data {location!r} cannot be read ({exc.strerror})") from None
    return np.frombuffer(data, dtype="<f4" if dtype == "float32" else "<f8").reshape(dims)


def _type_name(code: int) -> str:
    try:
        return str(onnx_messages().TensorProto.DataType.Name(int(code)))
    except ValueError:
        return f"code {code}"


#: AttributeProto.type codes (onnx.proto): FLOAT, INT, STRING, FLOATS, INTS, STRINGS.
_ATTRIBUTE_FIELDS = {1: "f", 2: "i", 3: "s", 6: "floats", 7: "ints", 8: "strings"}


def _attribute_value(attribute: Any) -> Any:
    """A number, a string, or a list of them; other kinds (tensors, graphs) as a description."""
    field = _ATTRIBUTE_FIELDS.get(int(attribute.type))
    if field is None:
        return f"<attribute of type {int(attribute.type)}>"  # no handler reads these
    value = getattr(attribute, field)
    if field in ("floats", "ints", "strings"):
        value = list(value)
    if field == "s":
        return value.decode("utf-8", "replace")
    if field == "strings":
        return [v.decode("utf-8", "replace") for v in value]
    return value


def _inline(graph: OnnxGraph, where: str, tensor: Any, dtype: str, dims: tuple[int, ...]) -> Any:
    """Values stored in the file: ``raw_data`` (little-endian), or the typed ``float_data``/``double_data``."""
    count = 1
    for d in dims:
        count *= d
    if tensor.raw_data:
        width = 4 if dtype == "float32" else 8
        if len(tensor.raw_data) != count * width:
            raise graph.fail(f"{where}: its data ({len(tensor.raw_data)} bytes) does not match its shape {dims}")
        return np.frombuffer(tensor.raw_data, dtype="<f4" if dtype == "float32" else "<f8").reshape(dims)
    typed = tensor.float_data if dtype == "float32" else tensor.double_data
    if len(typed) != count:
        raise graph.fail(f"{where}: its data ({len(typed)} values) does not match its shape {dims}")
    return np.array(typed, dtype=np.float32 if dtype == "float32" else np.float64).reshape(dims)
