"""An ONNX graph as a Stepper network: the walk along its chain of nodes.

Stepper runs a chain: each node takes the output of the one before it (plus
weights from initializers) and feeds the next; the first takes the graph's
input, the last gives its output. A branch, a skip connection, a second input
or an operator without a handler is refused with one line naming the node, its
operator and what Stepper runs.

The graph's input is samples x features ``(N, F)``, or channels first with one
or two spatial axes, ``(N, C, L)`` or ``(N, C, H, W)``, which becomes the
network's input shape (each data row holds ``C * L`` or ``C * H * W`` columns in
C order); or whole numbers ``(N, k)`` or ``(N,)``, the category columns of an
embedding (a Gather first; or a float input that a Cast turns into whole numbers
for the Gather). The batch dimension may be symbolic; the others
must be fixed.

The operators' handlers live in the table :data:`OPS`
(:mod:`stepper.formats.onnx_chain`), one module per family:
:mod:`.onnx_dense` (Gemm, MatMul, Add, activations, Identity),
:mod:`.onnx_spatial` (Flatten, Conv, MaxPool, AveragePool, Reshape),
:mod:`.onnx_norms` (BatchNormalization, LayerNormalization, Dropout, Cast, Gather).
A new operator is one more entry::

    @handler("Op")
    def _op(node: Node, chain: Chain) -> None:
        chain.close()                       # finish any pending layer
        ...                                 # read node.attributes, chain.weight(...)
        chain.add_layer(layer, {"K": (values, source)})
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path


from stepper.core.layers import Layer
from stepper.formats import onnx_dense, onnx_spatial, onnx_norms  # noqa: F401  (they fill OPS, in this order)
from stepper.formats.onnx_chain import OPS, Array, Chain, dims_text, supported
from stepper.formats.onnx_read import MAX_TENSOR_ENTRIES, OnnxGraph, read_onnx
from stepper.formats.weight_sources import WeightOrigin

__all__ = ["OPS", "Imported", "import_onnx", "supported"]


@dataclass
class Imported:
    """A graph turned into layers.

    Attributes:
        n_inputs: features per sample of the graph's input.
        input_shape: how a row is shaped, channels first (``(n_inputs,)`` when flat).
        layers: the layers in order.
        values: per layer, its arrays in Stepper's arrangement (``"W"`` ``(n_in, n_out)``).
        state: the arrays layers keep besides their weights, by name (``"L2.running_mean"``).
        origin: the file and the tensor behind each array.
    """

    n_inputs: int
    input_shape: tuple[int, ...]
    layers: list[Layer]
    values: list[dict[str, Array]]
    origin: WeightOrigin
    state: dict[str, Array] = field(default_factory=dict)


def import_onnx(path: Path) -> Imported:
    """The network of the ONNX file at ``path``; ModelFileError naming the node if it cannot run."""
    graph = read_onnx(path)
    chain = Chain(graph, _input_shape(graph))
    current = graph.input.name
    consumed: set[str] = set()
    integer = graph.input.dtype.startswith("int")
    chain.indices = current if integer else None
    for node in graph.nodes:
        data = [name for name in node.inputs if name and not graph.is_initializer(name)]
        if data != [current]:
            raise chain.fail(node, _not_a_chain(data, current, consumed))
        fn = OPS.get(node.op)
        if fn is None:
            raise chain.fail(node, f"operator {node.op} is not supported (Stepper runs a chain of: {supported()})")
        if current == chain.indices and node.op != "Gather":
            if integer:
                raise chain.fail(node, f"takes the graph's {graph.input.dtype} input; Stepper reads whole-number "
                                       "inputs only as the category numbers of an embedding (a Gather first)")
            raise chain.fail(node, "takes the whole numbers of the Cast before it; Stepper reads them only as the "
                                   "category numbers of an embedding (a Gather right after the Cast)")
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
    if not any(layer.param_specs() for layer in chain.layers):
        raise graph.fail("the graph has no node with weights (Gemm, MatMul, Conv, a norm, Gather), so no weights "
                         "for Stepper to check")
    n_inputs = chain.layers[0].n_in
    total = sum(v.size for arrays in chain.values for v in arrays.values())
    if total > MAX_TENSOR_ENTRIES:
        raise graph.fail(f"the network has {total:,} weights; Stepper handles at most {MAX_TENSOR_ENTRIES:,}")
    dtype = "float64" if "float64" in chain.dtypes or graph.input.dtype == "float64" else "float32"
    origin = WeightOrigin("onnx", graph.path, dtype, dict(chain.sources), "onnx", graph.raw,
                          chain.input_transposed, dict(chain.state_sources), dict(chain.inserts))
    dims = graph.input.dims
    shaped = len(dims) > 2 and not integer
    input_shape = tuple(d for d in dims[1:] if d is not None) if shaped else (n_inputs,)
    return Imported(n_inputs, input_shape, chain.layers, chain.values, origin, dict(chain.state))


def _input_shape(graph: OnnxGraph) -> tuple[int, ...] | None:
    """One sample's shape of the graph's input (None: a flat width that is symbolic)."""
    dims = graph.input.dims
    name = graph.input.name
    if graph.input.dtype.startswith("int"):
        if len(dims) not in (1, 2):
            raise graph.fail(f"graph input {name!r} has {len(dims)} dimensions {dims_text(dims)}; Stepper reads "
                             "whole-number inputs as samples x category columns")
        return None
    if len(dims) not in (2, 3, 4):
        raise graph.fail(f"graph input {name!r} has {len(dims)} dimensions {dims_text(dims)}; Stepper runs graphs "
                         "whose input is samples x features, or channels first: (N, C, L) or (N, C, H, W)")
    if len(dims) == 2:
        return None if dims[1] is None else (dims[1],)
    if any(d is None for d in dims[1:]):
        raise graph.fail(f"graph input {name!r} has the shape {dims_text(dims)}; Stepper needs every dimension "
                         "but the samples fixed")
    shape = tuple(int(d) for d in dims[1:] if d is not None)
    if math.prod(shape) > MAX_TENSOR_ENTRIES:
        raise graph.fail(f"graph input {name!r} has {math.prod(shape):,} entries per sample")
    return shape


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
