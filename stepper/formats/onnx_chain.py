"""The walk along an ONNX graph's chain of nodes: the handler table and the state handlers share.

The handlers live in :data:`OPS`, keyed by ONNX operator name, one module per
family (:mod:`.onnx_dense`, :mod:`.onnx_spatial`, :mod:`.onnx_extra`;
:mod:`.onnx_import` puts them together and walks the graph). A handler gets
the node and the :class:`Chain` being built and either changes the chain or
raises through :meth:`Chain.fail`.

A layer that an activation may still follow (a Gemm or MatMul, a Conv) is
opened as a :class:`Pending` one: an Add may give a dense layer its bias, an
activation node gives it its activation, and the next node that makes a layer
(or the end of the graph) closes it. A layer with nothing to wait for is
appended at once with :meth:`Chain.add_layer`.

The chain follows the shape of one sample of the tensor between nodes as ONNX
sees it (``(channels, height, width)`` after a 2-D Conv, ``(features,)`` after
a Gemm): handlers check it against what their operator takes. Between Stepper's
layers the data is flat per sample in C order, which is the order of that shape.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation
from stepper.core.layers import Layer
from stepper.errors import ModelFileError
from stepper.formats.onnx_read import Node, OnnxGraph
from stepper.formats.weight_sources import TensorSource

Array = NDArray[np.float64]
Handler = Callable[[Node, "Chain"], None]
#: An array of a layer in Stepper's arrangement, and the file tensor it came from.
Sourced = tuple[Array, TensorSource]

#: Operator name -> handler. Listed in messages in this order.
OPS: dict[str, Handler] = {}
#: How messages describe what Stepper runs, beside the operator names.
NOTES: dict[str, str] = {}


def handler(op: str, note: str | None = None) -> Callable[[Handler], Handler]:
    """Register the decorated function as the handler of ONNX operator ``op`` (``note``: how messages list it)."""

    def register(fn: Handler) -> Handler:
        OPS[op] = fn
        if note is not None:
            NOTES[op] = note
        return fn

    return register


def supported() -> str:
    """The operators Stepper runs, for messages."""
    return ", ".join(NOTES.get(op, op) for op in OPS)


class Pending:
    """A layer read from its node whose activation may still follow (see the module docstring)."""

    node: Node
    activation: Activation | None

    #: How messages name the operators that open this kind of layer.
    opened_by = "Gemm or MatMul"

    def finish(self) -> tuple[Layer, dict[str, Sourced]]:
        """The finished layer and its arrays."""
        raise NotImplementedError


@dataclass
class Chain:
    """The state of the walk along the graph, shared by the handlers.

    Attributes:
        graph: the graph read from the file.
        shape: one sample's shape of the current tensor, as ONNX has it (None
            while a flat input's width is symbolic).
        layers, values, sources: the layers built so far, their arrays and each array's source.
        state, state_sources: arrays layers keep besides their weights (batch
            norm's running statistics, ``"L2.running_mean"``) and their sources.
        inserts: arrays with no tensor in the file (a LayerNormalization without
            ``B``), by name: the node index and input position an export fills.
        pending: a layer still open.
        first: True until a node has consumed the graph's input.
        indices: the tensor that holds category numbers for a Gather (the graph's
            integer input, or a Cast of its float input), if any.
        input_transposed: the graph takes its input features-by-samples.
        dtypes: float types of the initializers read.
    """

    graph: OnnxGraph
    shape: tuple[int, ...] | None
    layers: list[Layer] = field(default_factory=list)
    values: list[dict[str, Array]] = field(default_factory=list)
    sources: dict[str, TensorSource] = field(default_factory=dict)
    state: dict[str, Array] = field(default_factory=dict)
    state_sources: dict[str, TensorSource] = field(default_factory=dict)
    inserts: dict[str, tuple[int, int]] = field(default_factory=dict)
    pending: Pending | None = None
    first: bool = True
    indices: str | None = None
    input_transposed: bool = False
    dtypes: set[str] = field(default_factory=set)

    @property
    def width(self) -> int | None:
        """Features per sample of the current tensor (None while unknown)."""
        return None if self.shape is None else math.prod(self.shape)

    def fail(self, node: Node, message: str) -> ModelFileError:
        """An error naming the file and the node (raise it)."""
        return ModelFileError(f"{self.graph.path}: {node.label}: {message}")

    def weight(self, node: Node, position: int, what: str, constant: bool = False) -> tuple[Array, str]:
        """Input ``position`` of ``node``, which must be an initializer: its values and name.

        ``constant``: a Constant node's output will do (a setting, not a weight Stepper changes).
        """
        if position >= len(node.inputs) or not node.inputs[position]:
            raise self.fail(node, f"has no {what}")
        name = node.inputs[position]
        if not self.graph.is_initializer(name):
            raise self.fail(node, f"its {what} {name!r} is computed in the graph; Stepper reads weights only "
                                  "from initializers")
        if name in self.graph.constants and not constant:
            raise self.fail(node, f"its {what} {name!r} comes from a Constant node; Stepper reads weights only "
                                  "from initializers, which it can write back")
        values, dtype = self.graph.initializer(name, node)
        self.dtypes.add(dtype)
        return values, name

    def has_input(self, node: Node, position: int) -> bool:
        """True when ``node`` has its optional input ``position``."""
        return position < len(node.inputs) and bool(node.inputs[position])

    def close(self) -> None:
        """Finish the pending layer, if any, and append it."""
        p = self.pending
        if p is None:
            return
        self.pending = None
        layer, arrays = p.finish()
        self.add_layer(layer, arrays)

    def open(self, pending: Pending) -> None:
        """Close the layer before and start ``pending``."""
        self.close()
        self.pending = pending

    def add_layer(self, layer: Layer, arrays: dict[str, Sourced], state: dict[str, Sourced] | None = None) -> None:
        """Append a finished layer with its arrays (Stepper's arrangement) and their sources.

        ``state``: arrays the layer keeps besides its weights, with their sources.
        """
        self.close()
        number = len(self.layers) + 1
        self.layers.append(layer)
        self.values.append({key: values for key, (values, _) in arrays.items()})
        for key, (_, source) in arrays.items():
            self.sources[f"L{number}.{key}"] = source
        for key, (values, source) in (state or {}).items():
            self.state[f"L{number}.{key}"] = values
            self.state_sources[f"L{number}.{key}"] = source
        self.shape = tuple(getattr(layer, "out_shape", (layer.n_out,)))

    def known_shape(self, node: Node) -> tuple[int, ...]:
        """The current shape, for a node that keeps it (a dropout, an activation); the graph input's
        width while nothing has shaped it yet. Refused while that width is symbolic."""
        shape = self.shape if self.shape is not None else (self.graph.input.dims[1] or 0,)
        if not math.prod(shape):
            raise self.fail(node, "comes before the width of a sample is known; Stepper needs the graph input's "
                                  "width here")
        return tuple(shape)

    def need_flat(self, node: Node) -> None:
        """Refuse a tensor that is not samples x features (a Gemm or MatMul takes only those)."""
        if self.shape is not None and len(self.shape) != 1:
            raise self.fail(node, f"gets a tensor of shape {dims_text((None,) + self.shape)}; Stepper runs "
                                  f"{node.op} on samples x features (put a Flatten before it)")

    def need_shaped(self, node: Node, takes: str = "(N, C, L) or (N, C, H, W)") -> tuple[int, ...]:
        """The current shape, which must be channels and one or two spatial axes."""
        if self.shape is None or len(self.shape) not in (2, 3):
            got = "samples x features" if self.shape is None else dims_text((None,) + self.shape)
            raise self.fail(node, f"gets a tensor of shape {got}; Stepper runs {node.op} on {takes} "
                                  "(channels first, one or two spatial axes)")
        return self.shape


def dims_text(dims: tuple[int | None, ...]) -> str:
    """``(N, 1, 8, 8)``; a symbolic dimension shows as ``N`` first and ``?`` elsewhere."""
    return "(" + ", ".join(("N" if i == 0 else "?") if d is None else str(d) for i, d in enumerate(dims)) + ")"


def float_attribute(node: Node, chain: Chain, name: str, default: float) -> float:
    """A finite number attribute (ONNX stores floats as float32: pass defaults as ``float(np.float32(x))``)."""
    value = node.attributes.get(name, default)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        raise chain.fail(node, f"attribute {name} is {value!r}, not a finite number")
    return float(value)


def int_attribute(node: Node, chain: Chain, name: str, default: int, allowed: tuple[int, ...]) -> int:
    """A whole-number attribute that must be one of ``allowed``."""
    value = node.attributes.get(name, default)
    if isinstance(value, bool) or not isinstance(value, int) or value not in allowed:
        raise chain.fail(node, f"attribute {name} is {value!r} (Stepper runs {' or '.join(map(str, allowed))})")
    return int(value)


def ints_attribute(node: Node, chain: Chain, name: str, count: int, default: list[int] | None) -> list[int] | None:
    """A list of ``count`` whole numbers, or ``default`` when the node has none."""
    value = node.attributes.get(name)
    if value is None:
        return default
    if not isinstance(value, list) or len(value) != count or not all(
            isinstance(v, int) and not isinstance(v, bool) for v in value):
        raise chain.fail(node, f"attribute {name} is {value!r}, not a list of {count} whole numbers")
    return [int(v) for v in value]


def vector(node: Node, chain: Chain, values: Array, name: str, n_out: int, what: str) -> TensorSource:
    """Check a bias of ``n_out`` entries, stored ``(n_out,)`` or ``(1, n_out)``; its source."""
    if values.shape not in ((n_out,), (1, n_out)):
        raise chain.fail(node, f"{what} {name!r} has shape {values.shape}; Stepper reads a bias of shape "
                               f"({n_out},) or (1, {n_out}), one entry per unit")
    return TensorSource(name, tuple(values.shape), (0,))


def exact(node: Node, chain: Chain, values: Array, name: str, shape: tuple[int, ...], what: str) -> TensorSource:
    """Check that initializer ``name`` has exactly ``shape``; its source, arranged as Stepper's."""
    if values.shape != shape:
        raise chain.fail(node, f"{what} {name!r} has shape {tuple(values.shape)}; Stepper expects {shape} here")
    return TensorSource(name, shape, tuple(range(len(shape))))


def attributes_allowed(node: Node, chain: Chain, names: tuple[str, ...]) -> None:
    """Refuse an attribute the handler does not read, naming it and the ones it reads."""
    extra = sorted(set(node.attributes) - set(names))
    if extra:
        reads = ", ".join(names) if names else "none"
        raise chain.fail(node, f"attribute {extra[0]} is not supported (Stepper reads: {reads})")


def source_of(values: Any, name: str) -> TensorSource:
    """The source of an array kept as the file holds it."""
    return TensorSource(name, tuple(values.shape), tuple(range(values.ndim)))
