"""ONNX operators of dense layers: Gemm, MatMul and its Add, the activations, Identity.

Dense layers are built in two moves: Gemm or MatMul opens a pending layer (its
weights), and a following Add gives it its bias and an activation node its
activation; the next node that makes a layer, or the end of the graph, closes
it. The activations also finish a pending Conv (:mod:`.onnx_spatial`); one
with no such layer open (after a norm, a pooling, a dropout, a flatten or
another activation) becomes an activation layer of its own.

Weights keep the values the file holds. Gemm's ``B`` with ``transB = 1``
(PyTorch's ``(out, in)``) becomes Stepper's ``W`` ``(in, out)`` through the
recorded permutation (see :mod:`stepper.formats.weight_sources`), so each
weight is named both ways and an export writes the file's own arrangement.
Gemm's ``alpha`` and ``beta`` other than 1 make a
:class:`stepper.core.gemm.ScaledDense` layer, which keeps the weights as they
are and applies the constants.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from stepper.core.activations import ACTIVATIONS, Activation, leaky_relu
from stepper.core.gemm import ScaledDense
from stepper.core.layers import ActivationLayer, Dense, Layer
from stepper.formats.onnx_chain import (
    Array, Chain, Handler, Pending, Sourced, float_attribute, handler, int_attribute, vector,
)
from stepper.formats.onnx_read import Node
from stepper.formats.weight_sources import TensorSource


@dataclass
class DensePending(Pending):
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

    def finish(self) -> tuple[Layer, dict[str, Sourced]]:
        n_in, n_out = self.W.shape
        activation = self.activation or ACTIVATIONS["identity"]
        bias = self.b is not None
        layer: Layer
        if self.alpha == 1.0 and (self.beta == 1.0 or not bias):
            layer = Dense(n_in, n_out, activation, bias)
        else:
            layer = ScaledDense(n_in, n_out, activation, self.alpha, self.beta, bias)
        arrays = {"W": (self.W, self.W_source)}
        if self.b is not None and self.b_source is not None:
            arrays["b"] = (self.b, self.b_source)
        return layer, arrays


def open_dense(chain: Chain, node: Node, W: Array, source: TensorSource, **kwargs: float | bool) -> None:
    """Start a dense layer with weights ``W`` ``(n_in, n_out)`` read by ``node``."""
    chain.close()
    chain.need_flat(node)
    if chain.width is not None and W.shape[0] != chain.width:
        raise chain.fail(node, f"its weights take {W.shape[0]} inputs but the tensor it gets has "
                               f"{chain.width} features per sample")
    chain.open(DensePending(node, W, source, **kwargs))  # type: ignore[arg-type]
    chain.shape = (W.shape[1],)


@handler("Gemm")
def _gemm(node: Node, chain: Chain) -> None:
    """``Y = alpha * A' B' + beta * C``: A the data, B the weights, C the bias (optional)."""
    alpha = float_attribute(node, chain, "alpha", 1.0)
    beta = float_attribute(node, chain, "beta", 1.0)
    trans_a = int_attribute(node, chain, "transA", 0, (0, 1))
    trans_b = int_attribute(node, chain, "transB", 0, (0, 1))
    if chain.graph.is_initializer(node.inputs[0]):
        raise chain.fail(node, "Stepper reads Gemm with the data as A and the weights as B")
    if trans_a:
        if not chain.first:
            raise chain.fail(node, "transA = 1 is supported only on the graph's input (samples along the "
                                   "second axis); inside the chain the samples run along the first axis")
        dims = chain.graph.input.dims
        chain.input_transposed = True
        chain.shape = None if dims[0] is None else (dims[0],)
    B, name = chain.weight(node, 1, "B (weights)")
    if B.ndim != 2:
        raise chain.fail(node, f"B {name!r} has shape {B.shape}; Stepper reads a 2-D weight matrix")
    W = B.T if trans_b else B
    source = TensorSource(name, tuple(B.shape), (1, 0) if trans_b else (0, 1))
    open_dense(chain, node, np.ascontiguousarray(W), source, alpha=alpha, beta=beta)
    if chain.has_input(node, 2):
        C, c_name = chain.weight(node, 2, "C (bias)")
        pending = chain.pending
        assert isinstance(pending, DensePending)
        pending.b_source = vector(node, chain, C, c_name, W.shape[1], "C")
        pending.b = C.reshape(-1).copy()


@handler("MatMul", "MatMul (with an Add for the bias)")
def _matmul(node: Node, chain: Chain) -> None:
    """``Y = A B`` with A the data and B a 2-D initializer; an Add may follow with the bias."""
    if chain.graph.is_initializer(node.inputs[0]):
        raise chain.fail(node, "Stepper reads MatMul with the data first and the weights second")
    B, name = chain.weight(node, 1, "B (weights)")
    if B.ndim != 2:
        raise chain.fail(node, f"B {name!r} has shape {B.shape}; Stepper reads a 2-D weight matrix")
    open_dense(chain, node, B.copy(), TensorSource(name, tuple(B.shape), (0, 1)), from_matmul=True)


@handler("Add")
def _add(node: Node, chain: Chain) -> None:
    """The bias of the MatMul (or bias-less Gemm) just before."""
    p = chain.pending
    if not isinstance(p, DensePending) or p.b is not None or p.activation is not None:
        raise chain.fail(node, "Stepper reads Add only as the bias right after a MatMul (or a Gemm without C)")
    position = 1 if chain.graph.is_initializer(node.inputs[1]) else 0
    values, name = chain.weight(node, position, "bias")
    p.b_source = vector(node, chain, values, name, p.W.shape[1], "bias")
    p.b = values.reshape(-1).copy()
    p.beta = 1.0  # Gemm's beta scales only its own C


def _activation(make: Callable[[Node, Chain], Activation]) -> Handler:
    def apply(node: Node, chain: Chain) -> None:
        p = chain.pending
        activation = make(node, chain)
        if p is not None and p.activation is None:
            if activation.name == "softmax" and not isinstance(p, DensePending):
                raise chain.fail(node, f"follows a {p.opened_by}; Stepper runs Softmax only after a Gemm or "
                                       "MatMul (over the features of each sample)")
            p.activation = activation  # part of the dense layer or convolution just before
            return
        # After a norm, a pooling, a dropout, a flatten or another activation: a layer of its own.
        if activation.name == "softmax":
            raise chain.fail(node, "does not follow a Gemm or MatMul; Stepper runs Softmax only as the "
                                   "activation of a dense layer (over the features of each sample)")
        chain.close()
        chain.add_layer(ActivationLayer(chain.known_shape(node), activation), {})

    return apply


def _named(name: str) -> Callable[[Node, Chain], Activation]:
    return lambda node, chain: ACTIVATIONS[name]


def _leaky(node: Node, chain: Chain) -> Activation:
    # ONNX attributes are float32: the spec's default 0.01 is float32(0.01), as runtimes use it.
    return leaky_relu(float_attribute(node, chain, "alpha", float(np.float32(0.01))))


def _softmax(node: Node, chain: Chain) -> Activation:
    int_attribute(node, chain, "axis", -1, (-1, 1))
    return ACTIVATIONS["softmax"]


for _op, _make in (("Relu", _named("relu")), ("LeakyRelu", _leaky), ("Tanh", _named("tanh")),
                   ("Sigmoid", _named("sigmoid")), ("Softplus", _named("softplus")), ("Softmax", _softmax)):
    handler(_op, "Softmax (last axis)" if _op == "Softmax" else None)(_activation(_make))


@handler("Identity")
def _identity(node: Node, chain: Chain) -> None:
    """Passes its input on."""
