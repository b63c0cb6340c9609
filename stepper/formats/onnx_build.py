"""A network that did not come from ONNX, written as a new ONNX chain of nodes.

One node (or two) per layer, each the ONNX operator that computes what the
layer computes in evaluation (the validation cost's forward pass), so that
onnxruntime gives the outputs Stepper's evaluation gives:

- dense: ``Gemm`` (``alpha``, ``beta`` for a scaled one) and its activation;
- conv1d, conv2d: ``Conv`` with ``kernel_shape``, ``strides`` and explicit
  ``pads``, and its activation;
- max_pool, avg_pool: ``MaxPool``, ``AveragePool`` (no padding);
- flatten: ``Flatten``; a shaped tensor that meets a dense layer is flattened too;
- activation: its operator (``Relu``, ``LeakyRelu`` with ``alpha``, ``Tanh``,
  ``Sigmoid``, ``Softplus``), which an import reads back as an activation layer
  because it follows no ``Gemm`` or ``Conv``; an identity one as ``Identity``;
- dropout: ``Dropout`` with its ``ratio`` (an inference graph passes the input on);
- layer_norm: ``LayerNormalization`` over every entry of a sample;
- batch_norm: ``BatchNormalization`` with the running statistics as ``input_mean``
  and ``input_var``, its ``epsilon`` and ``momentum``;
- embedding (first layer, every input column a category column): the graph's
  input becomes whole numbers ``(N, k)`` (int64), and ``Gather`` on the table,
  then ``Flatten``, gives Stepper's ``k * size`` entries per sample.

ONNX stores float attributes as float32: an ``epsilon`` of ``1e-5`` is written
as float32's nearest value, which moves the outputs by far less than float32's
precision.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from stepper.core.gemm import ScaledDense
from stepper.core.layers import ActivationLayer, BatchNorm, Conv, Dense, Dropout, Embedding, Flatten, LayerNorm, Layer, Params, Pool
from stepper.core.network import Network
from stepper.errors import UsageError
from stepper.formats.onnx_write import IR_VERSION, OPERATORS, OPSET, Array, np_dtype
from stepper.formats.weight_sources import TensorSource, WeightOrigin


@dataclass
class _Graph:
    """The nodes and initializers written so far, and the current tensor."""

    dtype: str
    nodes: list[Any] = field(default_factory=list)
    inits: list[Any] = field(default_factory=list)
    current: str = "input"
    rank: int = 2

    def tensor(self, name: str, values: Array) -> str:
        from onnx import numpy_helper

        self.inits.append(numpy_helper.from_array(np.array(values, dtype=np_dtype(self.dtype), order="C"), name))
        return name

    def node(self, op: str, inputs: list[str], name: str, rank: int | None = None, **attributes: Any) -> None:
        from onnx import helper

        out = f"{name}.out"
        self.nodes.append(helper.make_node(op, [self.current, *inputs], [out], name=name, **attributes))
        self.current = out
        if rank is not None:
            self.rank = rank

    def flat(self, name: str) -> None:
        """Flatten the current tensor to samples x features, if it is not."""
        if self.rank > 2:
            self.node("Flatten", [], name, rank=2, axis=1)


def built_graph(network: Network, theta: Array, state: Array, origin: WeightOrigin | None, dtype: str,
                name: str) -> bytes:
    """The ONNX file of ``network`` at weights ``theta`` and kept arrays ``state`` (see the module docstring)."""
    import onnx
    from onnx import helper

    code = onnx.TensorProto.FLOAT if dtype == "float32" else onnx.TensorProto.DOUBLE
    views = network.views(theta)
    kept = network.state_views(state)
    shape = tuple(network.input_shape or (network.n_inputs,))
    g = _Graph(dtype, rank=len(shape) + 1)
    in_code = code
    in_dims: list[str | int] = ["N", *shape]
    for index, layer in enumerate(network.layers):
        number = index + 1
        if isinstance(layer, Embedding):
            if index != 0 or layer.others or len(shape) != 1:
                raise UsageError(f"layer L{number} ({layer.label}): ONNX's Gather reads an integer input, so "
                                 "Stepper exports an embedding only as the first layer with every input column a "
                                 "category column; export its weights to a .safetensors file instead")
            in_code = onnx.TensorProto.INT64
            g.current = "input"
            g.nodes.append(helper.make_node("Gather", [g.tensor(f"L{number}.E", views[index]["E"]), "input"],
                                            [f"L{number}.out"], name=f"L{number}", axis=0))
            g.current, g.rank = f"L{number}.out", 3
            g.flat(f"L{number}.flatten")
        else:
            _layer(g, layer, number, views[index], kept[index], origin)
    g.node("Identity", [], "output")
    g.nodes[-1].output[0] = "output"  # node outputs are "<node>.out"; the last is the graph's output
    graph = helper.make_graph(
        g.nodes, name or "stepper",
        [helper.make_tensor_value_info("input", in_code, in_dims)],
        [helper.make_tensor_value_info("output", code, ["N", network.n_outputs])],
        g.inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="stepper")
    model.ir_version = IR_VERSION
    return bytes(model.SerializeToString())


def _layer(g: _Graph, layer: Layer, number: int, params: Params, kept: Params, origin: WeightOrigin | None) -> None:
    """The node(s) of one layer (not an embedding)."""
    label = f"L{number}"
    if isinstance(layer, (Dense, ScaledDense)):
        g.flat(f"{label}.flatten")
        _gemm(g, layer, number, params, origin)
    elif isinstance(layer, Conv):
        window = list(layer.grid.window)
        pads = [a for a, _ in layer.grid.pad] + [b for _, b in layer.grid.pad]
        inputs = [g.tensor(f"{label}.K", params["K"])] + ([g.tensor(f"{label}.b", params["b"])] if layer.bias else [])
        g.node("Conv", inputs, label, kernel_shape=window, strides=list(layer.grid.stride), pads=pads)
        _activation(g, layer, label)
    elif isinstance(layer, Pool):
        g.node("MaxPool" if layer.how == "max" else "AveragePool", [], label,
               kernel_shape=list(layer.grid.window), strides=list(layer.grid.stride))
    elif isinstance(layer, Flatten):
        g.flat(label)
    elif isinstance(layer, ActivationLayer):
        if layer.activation.name == "identity":
            g.node("Identity", [], label)
        else:
            _activation(g, layer, label)
    elif isinstance(layer, Dropout):
        g.node("Dropout", [g.tensor(f"{label}.ratio", np.array(layer.rate))], label)
    elif isinstance(layer, LayerNorm):
        inputs = [g.tensor(f"{label}.scale", params["scale"]), g.tensor(f"{label}.shift", params["shift"])]
        g.node("LayerNormalization", inputs, label, axis=1 if g.rank > 2 else -1, epsilon=layer.epsilon)
    elif isinstance(layer, BatchNorm):
        inputs = [g.tensor(f"{label}.{key}", values) for key, values in
                  (("scale", params["scale"]), ("shift", params["shift"]),
                   ("running_mean", kept["running_mean"]), ("running_var", kept["running_var"]))]
        g.node("BatchNormalization", inputs, label, epsilon=layer.epsilon, momentum=layer.momentum)
    else:
        raise UsageError(f"layer L{number} ({layer.label}) has no ONNX operator; export its weights to a "
                         ".safetensors file instead")


def _gemm(g: _Graph, layer: Dense | ScaledDense, number: int, params: Params, origin: WeightOrigin | None) -> None:
    W_source = _source(origin, f"L{number}.W", TensorSource(f"L{number}.W", (layer.n_in, layer.n_out), (0, 1)))
    W = W_source.to_file(params["W"])
    if W.shape not in ((layer.n_in, layer.n_out), (layer.n_out, layer.n_in)) or W_source.perm not in ((0, 1), (1, 0)):
        W_source = TensorSource(W_source.tensor, (layer.n_in, layer.n_out), (0, 1))
        W = W_source.to_file(params["W"])
    inputs = [g.tensor(W_source.tensor, W)]
    if layer.bias:
        b_source = _source(origin, f"L{number}.b", TensorSource(f"L{number}.b", (layer.n_out,), (0,)))
        inputs.append(g.tensor(b_source.tensor, b_source.to_file(params["b"])))
    attributes: dict[str, Any] = {"transB": int(W_source.perm == (1, 0))}
    if isinstance(layer, ScaledDense):
        attributes.update(alpha=layer.alpha, beta=layer.beta)
    g.node("Gemm", inputs, f"L{number}", **attributes)
    _activation(g, layer, f"L{number}")


def _activation(g: _Graph, layer: Dense | ScaledDense | Conv | ActivationLayer, label: str) -> None:
    act = layer.activation
    op = OPERATORS.get(act.name) or ("LeakyRelu" if act.name.startswith("leaky_relu") else None)
    if op is not None:
        extra: dict[str, Any] = dict(act.constants) if op == "LeakyRelu" else {}
        if op == "Softmax":
            extra["axis"] = -1
        g.node(op, [], f"{label}.{act.name.split('(')[0]}", **extra)
    elif act.name != "identity":
        raise UsageError(f"layer {label}'s activation {act.name} has no ONNX operator")


def _source(origin: WeightOrigin | None, prefix: str, default: TensorSource) -> TensorSource:
    if origin is None or prefix not in origin.tensors:
        return default
    return origin.tensors[prefix]
