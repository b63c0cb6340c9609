"""ONNX operators of normalization, dropout and embedding: BatchNormalization, LayerNormalization,
Dropout, Cast and Gather.

- ``BatchNormalization`` of an inference graph (``training_mode = 0``, one
  output): ``scale`` and ``B`` become batch norm's ``scale`` and ``shift``;
  ``input_mean`` and ``input_var`` become its running statistics, which the
  validation cost uses from the start and each training step moves towards its
  batch's (``momentum``, the same convention as ONNX's); the training cost and
  its slopes use the statistics of the batch (see :mod:`stepper.core.layers.norm`).
  An export writes the running statistics as they are then.
- ``LayerNormalization`` (opset 17) over every entry of a sample: ``axis = -1``
  on samples x features, or ``axis = 1`` on shaped data; ``Scale`` and ``B`` of
  the sample's shape (a missing ``B`` starts at 0, and an export adds it).
- ``Dropout``: its ``ratio`` (an initializer; 0.5 when absent) is the rate of
  Stepper's dropout while training; an inference graph passes its input on, as
  Stepper's validation cost does. ``training_mode`` may be absent or false.
- ``Gather`` on the graph's integer input: the embedding table is the
  initializer ``data`` ``(categories, size)``; each input column is one
  category column (``(N, k)`` input: columns 1 to k of the data, in order), and
  the vectors come out column by column, ``(N, k, size)`` as ONNX has it and
  ``k * size`` flat entries in the same order in Stepper. A float input may
  reach the Gather through a ``Cast`` to int64 or int32 (the data's columns
  must hold whole numbers all the same).
"""

from __future__ import annotations

import numpy as np

from stepper.core.layers import BatchNorm, Dropout, Embedding, LayerNorm
from stepper.core.layers.norm import MOMENTUM
from stepper.formats.onnx_chain import (
    Chain, Sourced, attributes_allowed, dims_text, exact, float_attribute, handler, int_attribute, source_of,
)
from stepper.formats.onnx_read import Node
from stepper.formats.weight_sources import TensorSource

#: ONNX's default epsilon of both norms, 1e-5, as the float32 attribute it is stored as.
ONNX_EPSILON = float(np.float32(1e-5))


def _epsilon(node: Node, chain: Chain) -> float:
    epsilon = float_attribute(node, chain, "epsilon", ONNX_EPSILON)
    if epsilon <= 0.0:
        raise chain.fail(node, f"attribute epsilon is {epsilon!r}; Stepper needs a positive epsilon (it keeps "
                               "the division finite)")
    return epsilon


@handler("BatchNormalization")
def _batch_norm(node: Node, chain: Chain) -> None:
    """Inference-mode batch normalization per channel (dimension 1)."""
    attributes_allowed(node, chain, ("epsilon", "momentum", "training_mode"))
    chain.close()
    if node.attributes.get("training_mode", 0) != 0:
        raise chain.fail(node, f"attribute training_mode is {node.attributes['training_mode']!r}: a graph "
                               "exported for training; Stepper reads inference graphs (training_mode = 0)")
    scale, scale_name = chain.weight(node, 1, "scale")
    if chain.shape is None:
        chain.shape = (scale.size,)
    shape = chain.shape
    channels = (shape[0],)
    arrays = {"scale": (scale, exact(node, chain, scale, scale_name, channels, "scale"))}
    state: dict[str, Sourced] = {}
    for position, key, what in ((2, "shift", "B"), (3, "running_mean", "input_mean"),
                                (4, "running_var", "input_var")):
        values, name = chain.weight(node, position, what)
        source = exact(node, chain, values, name, channels, what)
        (arrays if key == "shift" else state)[key] = (values, source)
    if np.any(state["running_var"][0] < 0.0):
        raise chain.fail(node, f"input_var {node.inputs[4]!r} holds a negative variance")
    epsilon = _epsilon(node, chain)
    momentum = float_attribute(node, chain, "momentum", MOMENTUM)
    if not 0.0 <= momentum < 1.0:
        raise chain.fail(node, f"attribute momentum is {momentum!r}; Stepper keeps a share from 0 up to 1 of "
                               "the running statistics at each step")
    chain.add_layer(BatchNorm(shape, momentum, epsilon), arrays, state)


@handler("LayerNormalization")
def _layer_norm(node: Node, chain: Chain) -> None:
    """Layer normalization over every entry of each sample."""
    attributes_allowed(node, chain, ("axis", "epsilon", "stash_type"))
    chain.close()
    if chain.graph.opset < 17:
        raise chain.fail(node, f"LayerNormalization is an operator of opset 17 and newer, but the graph declares "
                               f"opset {chain.graph.opset}")
    scale, scale_name = chain.weight(node, 1, "Scale")
    if chain.shape is None:
        chain.shape = (scale.size,)
    shape = chain.shape
    rank = len(shape) + 1
    axis = node.attributes.get("axis", -1)
    if isinstance(axis, bool) or not isinstance(axis, int) or axis not in (1, 1 - rank):
        raise chain.fail(node, f"attribute axis is {axis!r}: normalizes over part of each sample of "
                               f"{dims_text((None,) + shape)}; Stepper's layer norm takes every entry of a "
                               f"sample (axis = {'-1' if rank == 2 else 1})")
    int_attribute(node, chain, "stash_type", 1, (1,))
    arrays = {"scale": (scale, exact(node, chain, scale, scale_name, shape, "Scale"))}
    number = len(chain.layers) + 1
    if chain.has_input(node, 2):
        shift, shift_name = chain.weight(node, 2, "B")
        arrays["shift"] = (shift, exact(node, chain, shift, shift_name, shape, "B"))
    else:
        name = _free_name(chain, f"{node.name or node.outputs[0]}.B")
        arrays["shift"] = (np.zeros(shape), TensorSource(name, shape, tuple(range(len(shape)))))
        chain.inserts[f"L{number}.shift"] = (node.index, 2)
    chain.add_layer(LayerNorm(shape, _epsilon(node, chain)), arrays)


def _free_name(chain: Chain, wanted: str) -> str:
    """``wanted``, or with a number added, so that no initializer or other added array has it."""
    taken = set(chain.graph.initializer_names) | {s.tensor for s in chain.sources.values()}
    name, count = wanted, 1
    while name in taken:
        count += 1
        name = f"{wanted}{count}"
    return name


@handler("Dropout")
def _dropout(node: Node, chain: Chain) -> None:
    """Dropout at ``ratio`` while training; nothing in evaluation (an inference graph's reading)."""
    attributes_allowed(node, chain, ("seed",))
    chain.close()
    rate = 0.5  # ONNX's default ratio (ONNX operator documentation, Dropout)
    if chain.has_input(node, 1):
        ratio, _ = chain.weight(node, 1, "ratio", constant=True)
        if ratio.size != 1 or not 0.0 <= float(ratio.ravel()[0]) < 1.0:
            raise chain.fail(node, f"ratio {node.inputs[1]!r} is {ratio.ravel().tolist()}; Stepper drops a "
                                   "share from 0 up to 1 (one number)")
        rate = float(ratio.ravel()[0])
    if chain.has_input(node, 2):
        name = node.inputs[2]
        if not chain.graph.is_initializer(name) or any(chain.graph.whole_numbers(name, node)):
            raise chain.fail(node, f"its training_mode {name!r} may be true; Stepper reads inference graphs "
                                   "(training_mode absent or false)")
    seed = node.attributes.get("seed", len(chain.layers))
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise chain.fail(node, f"attribute seed is {seed!r}, not a whole number of 0 or more")
    chain.add_layer(Dropout(chain.known_shape(node), rate, seed), {})


#: ONNX's element type codes of the whole numbers a Cast may give a Gather (TensorProto.INT32, INT64).
WHOLE_TYPES = (6, 7)


@handler("Cast", "Cast (to whole numbers, for a Gather)")
def _cast(node: Node, chain: Chain) -> None:
    """A float input turned into category numbers for the Gather that follows (as Keras exports an embedding)."""
    attributes_allowed(node, chain, ("saturate", "to"))
    if not chain.first or chain.indices is not None or node.attributes.get("to") not in WHOLE_TYPES:
        raise chain.fail(node, "Stepper reads Cast only on the graph's float input, to int64 or int32 category "
                               "numbers for the Gather right after it")
    chain.indices = node.outputs[0] if node.outputs else None


@handler("Gather", "Gather (an embedding of the integer input)")
def _gather(node: Node, chain: Chain) -> None:
    """Rows of an initializer table picked by the graph's integer input: an embedding."""
    attributes_allowed(node, chain, ("axis",))
    graph = chain.graph
    if chain.layers or chain.indices is None or node.inputs[1:2] != (chain.indices,):
        raise chain.fail(node, "Stepper reads Gather only as an embedding: the first node, its indices the "
                               "graph's integer input (or a Cast of it) and its data an initializer table")
    int_attribute(node, chain, "axis", 0, (0,))
    table, name = chain.weight(node, 0, "data (the embedding table)")
    if table.ndim != 2:
        raise chain.fail(node, f"data {name!r} has shape {tuple(table.shape)}; Stepper reads an embedding "
                               "table of shape (categories, size)")
    columns = 1 if len(graph.input.dims) == 1 else graph.input.dims[1]
    if columns is None or len(graph.input.dims) > 2:
        raise chain.fail(node, f"its indices {dims_text(graph.input.dims)} are not samples x category columns "
                               "of a fixed count")
    categories, size = table.shape
    layer = Embedding((columns,), tuple(range(columns)), categories, size)
    chain.add_layer(layer, {"E": (table, source_of(table, name))})
    chain.shape = (size,) if len(graph.input.dims) == 1 else (columns, size)
