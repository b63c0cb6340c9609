"""An ONNX graph as a Stepper network: a table of operator handlers over a chain of nodes.

Stepper runs a chain: each node takes the output of the one before it (plus
weights from initializers) and feeds the next; the first takes the graph's
input, the last gives its output. A branch, a skip connection, a second input
or an operator without a handler is refused with one line naming the node, its
operator and what Stepper runs.

The handlers live in :data:`OPS`, keyed by ONNX operator name. A handler gets
the node and the :class:`Chain` being built and either changes the chain or
raises through :meth:`Chain.fail`. Dense layers are built in two moves: Gemm
or MatMul opens a pending layer (its weights), and a following Add gives it
its bias and an activation node its activation; the next weight node, or the
end of the graph, closes it. A new kind of layer is one more entry::

    @handler("Conv")
    def _conv(node: Node, chain: Chain) -> None:
        chain.close()                       # finish any pending dense layer
        ...                                 # read node.attributes, chain.weight(...)
        chain.add_layer(layer, {"K": (values, source)})

Weights keep the values the file holds. Gemm's ``B`` with ``transB = 1``
(PyTorch's ``(out, in)``) becomes Stepper's ``W`` ``(in, out)`` through the
recorded permutation (see :mod:`stepper.formats.weight_sources`), so each
weight is named both ways and an export writes the file's own arrangement.
Gemm's ``alpha`` and ``beta`` other than 1 make a
:class:`stepper.core.gemm.ScaledDense` layer, which keeps the weights as they
are and applies the constants.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import ACTIVATIONS, Activation, leaky_relu
from stepper.core.gemm import ScaledDense
from stepper.core.layers import Dense, Layer
from stepper.errors import ModelFileError
from stepper.formats.onnx_read import MAX_TENSOR_ENTRIES, Node, OnnxGraph, read_onnx
from stepper.formats.weight_sources import TensorSource, WeightOrigin

Array = NDArray[np.float64]
Handler = Callable[[Node, "Chain"], None]

#: Operator name -> handler. Listed in messages in this order.
OPS: dict[str, Handler] = {}
#: How messages describe what Stepper runs, beside the operator names.
NOTES = {"MatMul": "MatMul (with an Add for the bias)", "Softmax": "Softmax (last axis)"}


def handler(op: str) -> Callable[[Handler], Handler]:
    """Register the decorated function as the handler of ONNX operator ``op``."""

    def register(fn: Handler) -> Handler:
        OPS[op] = fn
        return fn

    return register


def supported() -> str:
    """The operators Stepper runs, for messages."""
    return ", ".join(NOTES.get(op, op) for op in OPS)


@dataclass
class Imported:
    """A graph turned into layers.

    Attributes:
        n_inputs: width of the graph's input (features per sample).
        layers: the layers in order.
        values: per layer, its arrays in Stepper's arrangement (``"W"`` ``(n_in, n_out)``).
        origin: the file and the tensor behind each array.
    """

    n_inputs: int
    layers: list[Layer]
    values: list[dict[str, Array]]
    origin: WeightOrigin


@dataclass
class _Pending:
    """A dense layer whose weights are read and whose bias and activation may still follow."""

    node: Node
    W: Array
    W_source: TensorSource
    alpha: float = 1.0
    beta: float = 1.0
    b: Array | None = None
    b_source: TensorSource | None = None
    activation: Activation | None = None
    from_matmul: bool = False


@dataclass
class Chain:
    """The state of the walk along the graph, shared by the handlers.

    Attributes:
        graph: the graph read from the file.
        width: features per sample of the current tensor (None until known).
        layers, values, sources: the layers built so far, their arrays and each array's source.
        pending: a dense layer still open.
        first: True until a node has consumed the graph's input.
        input_transposed: the graph takes its input features-by-samples.
        dtypes: float types of the initializers read.
    """

    graph: OnnxGraph
    width: int | None
    layers: list[Layer] = field(default_factory=list)
    values: list[dict[str, Array]] = field(default_factory=list)
    sources: dict[str, TensorSource] = field(default_factory=dict)
    pending: _Pending | None = None
    first: bool = True
    input_transposed: bool = False
    dtypes: set[str] = field(default_factory=set)

    def fail(self, node: Node, message: str) -> ModelFileError:
        """An error naming the file and the node (raise it)."""
        return ModelFileError(f"{self.graph.path}: {node.label}: {message}")

    def weight(self, node: Node, position: int, what: str) -> tuple[Array, str]:
        """Input ``position`` of ``node``, which must be an initializer: its values and name."""
        if position >= len(node.inputs) or not node.inputs[position]:
            raise self.fail(node, f"has no {what}")
        name = node.inputs[position]
        if not self.graph.is_initializer(name):
            raise self.fail(node, f"its {what} {name!r} is computed in the graph; Stepper reads weights only "
                                  "from initializers")
        values, dtype = self.graph.initializer(name, node)
        self.dtypes.add(dtype)
        return values, name

    def close(self) -> None:
        """Finish the pending dense layer, if any, and append it."""
        p = self.pending
        if p is None:
            return
        self.pending = None
        n_in, n_out = p.W.shape
        activation = p.activation or ACTIVATIONS["identity"]
        bias = p.b is not None
        layer: Layer
        if p.alpha == 1.0 and (p.beta == 1.0 or not bias):
            layer = Dense(n_in, n_out, activation, bias)
        else:
            layer = ScaledDense(n_in, n_out, activation, p.alpha, p.beta, bias)
        arrays = {"W": (p.W, p.W_source)}
        if p.b is not None and p.b_source is not None:
            arrays["b"] = (p.b, p.b_source)
        self.add_layer(layer, arrays)

    def add_layer(self, layer: Layer, arrays: dict[str, tuple[Array, TensorSource]]) -> None:
        """Append a finished layer with its arrays (Stepper's arrangement) and their sources."""
        number = len(self.layers) + 1
        self.layers.append(layer)
        self.values.append({key: values for key, (values, _) in arrays.items()})
        for key, (_, source) in arrays.items():
            self.sources[f"L{number}.{key}"] = source
        self.width = layer.n_out

    def open_dense(self, node: Node, W: Array, source: TensorSource, **kwargs: float | bool) -> None:
        """Start a dense layer with weights ``W`` ``(n_in, n_out)`` read by ``node``."""
        self.close()
        if self.width is not None and W.shape[0] != self.width:
            raise self.fail(node, f"its weights take {W.shape[0]} inputs but the tensor it gets has "
                                  f"{self.width} features per sample")
        self.pending = _Pending(node, W, source, **kwargs)  # type: ignore[arg-type]
        self.width = W.shape[1]


def import_onnx(path: Path) -> Imported:
    """The network of the ONNX file at ``path``; ModelFileError naming the node if it cannot run."""
    graph = read_onnx(path)
    dims = graph.input.dims
    if len(dims) != 2:
        raise graph.fail(f"graph input {graph.input.name!r} has {len(dims)} dimensions {_dims(dims)}; "
                         "Stepper runs graphs whose input is samples x features")
    chain = Chain(graph, dims[1])
    current = graph.input.name
    consumed: set[str] = set()
    for node in graph.nodes:
        data = [name for name in node.inputs if name and not graph.is_initializer(name)]
        if data != [current]:
            raise chain.fail(node, _not_a_chain(data, current, consumed))
        fn = OPS.get(node.op)
        if fn is None:
            raise chain.fail(node, f"operator {node.op} is not supported (Stepper runs a chain of: {supported()})")
        consumed.add(current)
        fn(node, chain)
        chain.first = False
        extra = [name for name in node.outputs[1:] if name]
        if not node.outputs or not node.outputs[0] or extra:
            raise chain.fail(node, "Stepper runs nodes with exactly one output")
        current = node.outputs[0]
    chain.close()
    if current != graph.output.name:
        raise graph.fail(f"the graph's output {graph.output.name!r} is not the last node's output "
                         f"{current!r}; Stepper runs a chain that ends in the output")
    if not chain.layers:
        raise graph.fail("the graph has no Gemm or MatMul node, so no weights for Stepper to check")
    n_inputs = chain.layers[0].n_in
    total = sum(v.size for arrays in chain.values for v in arrays.values())
    if total > MAX_TENSOR_ENTRIES:
        raise graph.fail(f"the network has {total:,} weights; Stepper handles at most {MAX_TENSOR_ENTRIES:,}")
    dtype = "float64" if "float64" in chain.dtypes or graph.input.dtype == "float64" else "float32"
    origin = WeightOrigin("onnx", graph.path, dtype, dict(chain.sources), "onnx", graph.raw,
                          chain.input_transposed)
    return Imported(n_inputs, chain.layers, chain.values, origin)


def _not_a_chain(data: list[str], current: str, consumed: set[str]) -> str:
    if not data:
        return "takes no computed tensor (only constants); Stepper runs a chain of nodes from the graph's input"
    if len(data) > 1:
        names = " and ".join(repr(d) for d in data)
        return (f"combines two computed tensors ({names}): a branch or skip connection; Stepper runs "
                "a chain where each node takes only the output of the node before it")
    if data[0] in consumed:
        return (f"takes {data[0]!r}, which another node already takes: a branch; Stepper runs a chain "
                "where each node takes only the output of the node before it")
    return (f"takes {data[0]!r} where Stepper expects {current!r} (the output of the node before it); "
            "Stepper runs the nodes in the file's order as one chain")


def _dims(dims: tuple[int | None, ...]) -> str:
    return "(" + ", ".join("?" if d is None else str(d) for d in dims) + ")"


def _vector(node: Node, chain: Chain, values: Array, name: str, n_out: int, what: str) -> TensorSource:
    """Check a bias of ``n_out`` entries, stored ``(n_out,)`` or ``(1, n_out)``; its source."""
    if values.shape not in ((n_out,), (1, n_out)):
        raise chain.fail(node, f"{what} {name!r} has shape {values.shape}; Stepper reads a bias of shape "
                               f"({n_out},) or (1, {n_out}), one entry per unit")
    return TensorSource(name, tuple(values.shape), (0,))


def _float_attribute(node: Node, chain: Chain, name: str, default: float) -> float:
    value = node.attributes.get(name, default)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        raise chain.fail(node, f"attribute {name} is {value!r}, not a finite number")
    return float(value)


def _int_attribute(node: Node, chain: Chain, name: str, default: int, allowed: tuple[int, ...]) -> int:
    value = node.attributes.get(name, default)
    if isinstance(value, bool) or not isinstance(value, int) or value not in allowed:
        raise chain.fail(node, f"attribute {name} is {value!r} (Stepper runs {' or '.join(map(str, allowed))})")
    return int(value)


# -- handlers ---------------------------------------------------------------------------------


@handler("Gemm")
def _gemm(node: Node, chain: Chain) -> None:
    """``Y = alpha * A' B' + beta * C``: A the data, B the weights, C the bias (optional)."""
    alpha = _float_attribute(node, chain, "alpha", 1.0)
    beta = _float_attribute(node, chain, "beta", 1.0)
    trans_a = _int_attribute(node, chain, "transA", 0, (0, 1))
    trans_b = _int_attribute(node, chain, "transB", 0, (0, 1))
    if chain.graph.is_initializer(node.inputs[0]):
        raise chain.fail(node, "Stepper reads Gemm with the data as A and the weights as B")
    if trans_a:
        if not chain.first:
            raise chain.fail(node, "transA = 1 is supported only on the graph's input (samples along the "
                                   "second axis); inside the chain the samples run along the first axis")
        dims = chain.graph.input.dims
        chain.input_transposed = True
        chain.width = dims[0]
    B, name = chain.weight(node, 1, "B (weights)")
    if B.ndim != 2:
        raise chain.fail(node, f"B {name!r} has shape {B.shape}; Stepper reads a 2-D weight matrix")
    W = B.T if trans_b else B
    source = TensorSource(name, tuple(B.shape), (1, 0) if trans_b else (0, 1))
    chain.open_dense(node, np.ascontiguousarray(W), source, alpha=alpha, beta=beta)
    if len(node.inputs) > 2 and node.inputs[2]:
        C, c_name = chain.weight(node, 2, "C (bias)")
        assert chain.pending is not None
        chain.pending.b_source = _vector(node, chain, C, c_name, W.shape[1], "C")
        chain.pending.b = C.reshape(-1).copy()


@handler("MatMul")
def _matmul(node: Node, chain: Chain) -> None:
    """``Y = A B`` with A the data and B a 2-D initializer; an Add may follow with the bias."""
    if chain.graph.is_initializer(node.inputs[0]):
        raise chain.fail(node, "Stepper reads MatMul with the data first and the weights second")
    B, name = chain.weight(node, 1, "B (weights)")
    if B.ndim != 2:
        raise chain.fail(node, f"B {name!r} has shape {B.shape}; Stepper reads a 2-D weight matrix")
    chain.open_dense(node, B.copy(), TensorSource(name, tuple(B.shape), (0, 1)), from_matmul=True)


@handler("Add")
def _add(node: Node, chain: Chain) -> None:
    """The bias of the MatMul (or bias-less Gemm) just before."""
    p = chain.pending
    if p is None or p.b is not None or p.activation is not None:
        raise chain.fail(node, "Stepper reads Add only as the bias right after a MatMul (or a Gemm without C)")
    position = 1 if chain.graph.is_initializer(node.inputs[1]) else 0
    values, name = chain.weight(node, position, "bias")
    p.b_source = _vector(node, chain, values, name, p.W.shape[1], "bias")
    p.b = values.reshape(-1).copy()
    p.beta = 1.0  # Gemm's beta scales only its own C


def _activation(make: Callable[[Node, Chain], Activation]) -> Handler:
    def apply(node: Node, chain: Chain) -> None:
        p = chain.pending
        if p is None:
            raise chain.fail(node, "Stepper runs an activation only right after a Gemm or MatMul (and its Add)")
        if p.activation is not None:
            raise chain.fail(node, f"follows {p.activation.name} with no Gemm or MatMul between; Stepper "
                                   "runs one activation after each Gemm or MatMul")
        p.activation = make(node, chain)

    return apply


def _named(name: str) -> Callable[[Node, Chain], Activation]:
    return lambda node, chain: ACTIVATIONS[name]


def _leaky(node: Node, chain: Chain) -> Activation:
    # ONNX attributes are float32: the spec's default 0.01 is float32(0.01), as runtimes use it.
    return leaky_relu(_float_attribute(node, chain, "alpha", float(np.float32(0.01))))


def _softmax(node: Node, chain: Chain) -> Activation:
    _int_attribute(node, chain, "axis", -1, (-1, 1))
    return ACTIVATIONS["softmax"]


for _op, _make in (("Relu", _named("relu")), ("LeakyRelu", _leaky), ("Tanh", _named("tanh")),
                   ("Sigmoid", _named("sigmoid")), ("Softplus", _named("softplus")), ("Softmax", _softmax)):
    handler(_op)(_activation(_make))


@handler("Identity")
def _identity(node: Node, chain: Chain) -> None:
    """Passes its input on."""


@handler("Flatten")
def _flatten(node: Node, chain: Chain) -> None:
    """``axis = 1`` on samples x features passes the input on."""
    _int_attribute(node, chain, "axis", 1, (1, -1))
