"""ONNX operators over channels and positions: Flatten, Conv, MaxPool, AveragePool, Reshape to flat.

The tensor between nodes is ``(N, C, L)`` or ``(N, C, H, W)`` here, channels
first, as ONNX defines these operators (ONNX operator documentation, Conv,
MaxPool, AveragePool). What Stepper runs of each:

- ``Conv``: any ``kernel_shape`` and ``strides``; ``pads`` given explicitly (the
  same or different before and after), or ``auto_pad`` ``VALID``, ``SAME_UPPER``
  or ``SAME_LOWER``; ``group = 1`` and ``dilations`` of 1; an optional bias
  ``B``. An activation node right after it becomes the layer's activation.
- ``MaxPool``, ``AveragePool``: ``kernel_shape`` and ``strides`` (default 1, as
  ONNX has it), no padding (``pads`` of 0, or an ``auto_pad`` that adds none),
  ``ceil_mode`` only where it changes nothing, ``dilations`` of 1. Without
  padding ``count_include_pad`` has nothing to count, so both of its values
  give Stepper's average over the window's cells.
- ``Flatten`` (``axis = 1``) and ``Reshape`` to samples x features (a shape
  initializer ``[0, -1]``, ``[-1, F]``, ``[0, F]`` or ``[B, -1]`` with ``B`` the
  graph input's fixed batch size): a Stepper ``flatten`` layer where the data was
  shaped, nothing where it already was flat.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from stepper.core.activations import ACTIVATIONS, Activation
from stepper.core.layers import Conv, Flatten, Grid, Layer, Pool, same_padding
from stepper.formats.onnx_chain import (
    Array, Chain, Pending, Sourced, attributes_allowed, dims_text, exact, handler, int_attribute, ints_attribute,
)
from stepper.formats.onnx_read import Node
from stepper.formats.weight_sources import TensorSource

#: ``auto_pad`` values Stepper reads (NOTSET: the ``pads`` attribute decides).
AUTO_PADS = ("NOTSET", "VALID", "SAME_UPPER", "SAME_LOWER")


@dataclass
class ConvPending(Pending):
    """A convolution whose activation may still follow."""

    node: Node
    in_shape: tuple[int, ...]
    grid: Grid
    K: Array
    K_source: TensorSource
    b: Array | None = None
    b_source: TensorSource | None = None
    activation: Activation | None = None

    opened_by = "Conv"

    def finish(self) -> tuple[Layer, dict[str, Sourced]]:
        activation = self.activation or ACTIVATIONS["identity"]
        layer = Conv(self.in_shape, self.K.shape[0], self.grid, activation, self.b is not None)
        arrays = {"K": (self.K, self.K_source)}
        if self.b is not None and self.b_source is not None:
            arrays["b"] = (self.b, self.b_source)
        return layer, arrays


def window_grid(node: Node, chain: Chain, shape: tuple[int, ...], kernel: list[int]) -> Grid:
    """The window positions a Conv or pooling node's ``strides``, ``pads``, ``auto_pad`` and ``dilations`` give."""
    dims = len(shape) - 1
    size = shape[1:]
    dilations = ints_attribute(node, chain, "dilations", dims, [1] * dims)
    if dilations != [1] * dims:
        raise chain.fail(node, f"attribute dilations is {dilations} (Stepper runs windows without gaps: "
                               f"dilations of {[1] * dims})")
    strides = ints_attribute(node, chain, "strides", dims, [1] * dims) or []
    if any(s < 1 for s in strides):
        raise chain.fail(node, f"attribute strides is {strides}, not positive")
    if any(k < 1 for k in kernel):
        raise chain.fail(node, f"kernel_shape {kernel} is not positive")
    auto = node.attributes.get("auto_pad", "NOTSET")
    if auto not in AUTO_PADS:
        raise chain.fail(node, f"attribute auto_pad is {auto!r} (Stepper runs {', '.join(AUTO_PADS)})")
    if auto == "NOTSET":
        pads = ints_attribute(node, chain, "pads", 2 * dims, [0] * (2 * dims)) or []
        if any(p < 0 for p in pads):
            raise chain.fail(node, f"attribute pads is {pads}; Stepper adds zeros, never crops (pads of 0 or more)")
        pad = tuple((pads[i], pads[i + dims]) for i in range(dims))
    elif auto == "VALID":
        pad = tuple((0, 0) for _ in range(dims))
    else:
        same = [same_padding(n, k, s) for n, k, s in zip(size, kernel, strides)]
        pad = tuple(p if auto == "SAME_UPPER" else (p[1], p[0]) for p in same)
    grid = Grid(tuple(size), tuple(kernel), tuple(strides), pad)
    if min(grid.out) < 1:
        raise chain.fail(node, f"a {'x'.join(map(str, kernel))} window does not fit the input's "
                               f"{'x'.join(map(str, size))} positions")
    return grid


@handler("Flatten")
def _flatten(node: Node, chain: Chain) -> None:
    """``axis = 1``: everything but the samples in one row; a flatten layer where Stepper's data was shaped."""
    chain.close()
    rank = 2 if chain.shape is None else len(chain.shape) + 1
    int_attribute(node, chain, "axis", 1, (1, 1 - rank) if rank > 2 else (1, -1))
    _to_flat(chain)


def _to_flat(chain: Chain) -> None:
    """The current tensor as samples x features, with a flatten layer where Stepper's rows were shaped."""
    if chain.shape is None:
        return
    last = chain.layers[-1] if chain.layers else None
    shape = getattr(last, "out_shape", None)
    if shape is not None and len(shape) > 1:
        chain.add_layer(Flatten(tuple(shape)), {})
    chain.shape = (math.prod(chain.shape),)


@handler("Conv")
def _conv(node: Node, chain: Chain) -> None:
    """A 1-D or 2-D convolution (cross-correlation, as ONNX defines Conv) with an optional bias."""
    attributes_allowed(node, chain, ("auto_pad", "dilations", "group", "kernel_shape", "pads", "strides"))
    chain.close()
    shape = chain.need_shaped(node)
    dims = len(shape) - 1
    group = node.attributes.get("group", 1)
    if group != 1:
        raise chain.fail(node, f"attribute group is {group!r} (Stepper runs group = 1: every output channel "
                               "sees every input channel)")
    K, name = chain.weight(node, 1, "W (kernel)")
    if K.ndim != dims + 2 or K.shape[1] != shape[0]:
        raise chain.fail(node, f"W {name!r} has shape {tuple(K.shape)}; for an input of {shape[0]} channels "
                               f"Stepper expects (out channels, {shape[0]}, {', '.join(['k'] * dims)})")
    kernel = ints_attribute(node, chain, "kernel_shape", dims, list(K.shape[2:])) or []
    if tuple(kernel) != K.shape[2:]:
        raise chain.fail(node, f"attribute kernel_shape is {kernel} but W {name!r} has windows of "
                               f"{list(K.shape[2:])}")
    grid = window_grid(node, chain, shape, kernel)
    pending = ConvPending(node, shape, grid, K.copy(), exact(node, chain, K, name, tuple(K.shape), "W"))
    if chain.has_input(node, 2):
        b, b_name = chain.weight(node, 2, "B (bias)")
        pending.b_source = exact(node, chain, b, b_name, (K.shape[0],), "B")
        pending.b = b.copy()
    chain.open(pending)
    chain.shape = (K.shape[0],) + grid.out


def _pool(how: str) -> None:
    op = "MaxPool" if how == "max" else "AveragePool"
    reads = ("auto_pad", "ceil_mode", "dilations", "kernel_shape", "pads", "strides") + (
        ("storage_order",) if how == "max" else ("count_include_pad",))

    @handler(op)
    def pool(node: Node, chain: Chain) -> None:
        attributes_allowed(node, chain, reads)
        chain.close()
        shape = chain.need_shaped(node)
        dims = len(shape) - 1
        kernel = ints_attribute(node, chain, "kernel_shape", dims, None)
        if kernel is None:
            raise chain.fail(node, "has no kernel_shape")
        grid = window_grid(node, chain, shape, kernel)
        if any(a or b for a, b in grid.pad):
            raise chain.fail(node, f"pads the input ({_pads_text(grid)}); Stepper pools without padding "
                                   "(pads of 0, or auto_pad VALID)")
        if node.attributes.get("ceil_mode", 0) not in (0, 1):
            raise chain.fail(node, f"attribute ceil_mode is {node.attributes['ceil_mode']!r} (Stepper runs 0)")
        if node.attributes.get("ceil_mode", 0) == 1 and any(
                (n - k) % s for n, k, s in zip(grid.size, grid.window, grid.stride)):
            raise chain.fail(node, "attribute ceil_mode is 1 and the last window would run past the input; "
                                   "Stepper pools whole windows only (ceil_mode = 0)")
        for name in ("storage_order", "count_include_pad"):
            if name in reads:
                # storage_order orders only the indices output, which Stepper does not read;
                # count_include_pad has no padding to count here.
                int_attribute(node, chain, name, 0, (0, 1))
        chain.add_layer(Pool(shape, grid, how), {})


def _pads_text(grid: Grid) -> str:
    return "pads " + str([a for a, _ in grid.pad] + [b for _, b in grid.pad])


_pool("max")
_pool("avg")


@handler("Reshape", "Reshape (to samples x features)")
def _reshape(node: Node, chain: Chain) -> None:
    """A reshape that keeps the samples and puts everything else in one row: the same as Flatten."""
    chain.close()
    attributes_allowed(node, chain, ("allowzero",))
    allow_zero = int_attribute(node, chain, "allowzero", 0, (0, 1))
    if not chain.has_input(node, 1) or not chain.graph.is_initializer(node.inputs[1]):
        raise chain.fail(node, "its shape is computed in the graph; Stepper reads a Reshape whose shape is an "
                               "initializer")
    shape = chain.graph.whole_numbers(node.inputs[1], node)
    width = chain.width
    batch = chain.graph.input.dims[0] if not chain.input_transposed else None
    first_ok = {-1, batch} | ({0} if not allow_zero else set())
    flat = width is not None and len(shape) == 2 and shape[0] in first_ok and (
        shape[1] == width or (shape[1] == -1 and shape[0] != -1))
    if not flat:
        now = "samples x ?" if chain.shape is None else dims_text((None,) + chain.shape)
        raise chain.fail(node, f"reshapes {now} to {list(shape)}; Stepper runs a Reshape only to samples x "
                               f"features, with a shape of [0, -1] or [-1, {width or 'features'}]")
    _to_flat(chain)
