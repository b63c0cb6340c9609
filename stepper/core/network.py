"""A network: an ordered stack of layers, a loss, and one flat parameter vector.

All parameters of a network live in one float64 vector ``theta`` of shape
``(n_params,)``. :class:`ParamLayout` says which slice of it belongs to which
layer's which array, and gives every entry a stable, readable name:

- ``L2.W[3,0]``: layer 2 (counted from 1), weight from input 3 to unit 0;
- ``L2.b[0]``: layer 2, bias of unit 0;
- custom layers use their own array keys, e.g. ``L1.scale[4]``.

A flat vector keeps the optimizer, the frozen mask, undo and checkpoints
simple; per-layer arrays are reshaped views into it, never copies.

The cost may carry an L2 term, ``(l2 / 2) * sum(w^2)`` over the weights (not the
biases), whose slope is ``l2 * w`` (Goodfellow, Bengio & Courville, *Deep
Learning*, 2016, section 7.1.1, eqs. 7.2-7.3; leaving biases out is the practice
described there). :meth:`Network.cost` and :meth:`Network.backward` include it;
:meth:`Network.output_cost` is the data term alone, and whoever evaluates
perturbed copies through it adds :meth:`Network.penalty_at` (the numeric slopes
do, so the check compares slopes of the same cost).
"""

from __future__ import annotations

import copy
import math
import re
from dataclasses import dataclass, field
from functools import cached_property
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import ActivationLayer, Builtin, Dense, DenseCache, Dropout, Layer, Mode, ParamSpec, Params
from stepper.core.losses import FUSED, LOSSES, FusedLoss, Loss

if TYPE_CHECKING:
    from stepper.core.names import NameIndex, WeightNames

Array = NDArray[np.float64]


@dataclass(frozen=True)
class Block:
    """One parameter array inside the flat vector.

    Attributes:
        layer: 0-based layer index.
        key: array key inside the layer (``"W"``, ``"b"``, ...).
        kind: ``"weight"`` or ``"bias"`` (``"state"`` for a layer's kept arrays).
        shape: the array's shape.
        start: offset of its first entry in ``theta``.
        fans: ``(fan_in, fan_out)`` for the initialisation schemes, or None.
        fill: a constant starting value, or None.
    """

    layer: int
    key: str
    kind: str
    shape: tuple[int, ...]
    start: int
    fans: tuple[int, int] | None = None
    fill: float | None = None

    @cached_property
    def size(self) -> int:
        return math.prod(self.shape)

    @property
    def stop(self) -> int:
        return self.start + self.size

    @property
    def prefix(self) -> str:
        """``"L2.W"``: the name of the array without indices."""
        return f"L{self.layer + 1}.{self.key}"


_NAME = re.compile(r"^L(\d+)\.(\w+)\[([\d,\s]+)\]$")


def _state_specs(layer: Layer) -> tuple[ParamSpec, ...]:
    return layer.state_specs() if isinstance(layer, Builtin) else ()


class ParamLayout:
    """Where each layer's arrays sit in the flat parameter vector.

    With ``state=True``, the layout of the arrays layers keep besides their
    weights instead (a batch norm's running statistics, ``L2.running_mean``).
    """

    def __init__(self, layers: Sequence[Layer], state: bool = False) -> None:
        blocks: list[Block] = []
        start = 0
        for index, layer in enumerate(layers):
            for spec in (_state_specs(layer) if state else layer.param_specs()):
                block = Block(index, spec.key, spec.kind, tuple(spec.shape), start, spec.fans, spec.fill)
                blocks.append(block)
                start = block.stop
        self.blocks: tuple[Block, ...] = tuple(blocks)
        self.size: int = start

    def block_of(self, flat_index: int) -> Block:
        """The block holding entry ``flat_index``."""
        for block in self.blocks:
            if block.start <= flat_index < block.stop:
                return block
        raise IndexError(flat_index)

    def find_block(self, layer: int, key: str) -> Block:
        for block in self.blocks:
            if block.layer == layer and block.key == key:
                return block
        raise KeyError(f"L{layer + 1}.{key}")

    @cached_property
    def names(self) -> WeightNames:
        """Readable name of every entry, in flat order, ``(n_params,)``: a sequence that builds a
        name from its array and index when asked (:mod:`stepper.core.names`), never all at once."""
        from stepper.core.names import WeightNames

        return WeightNames(self)

    @cached_property
    def index_of(self) -> NameIndex:
        """Flat index of each name (a mapping that reads the name, not a table of them all)."""
        from stepper.core.names import NameIndex

        return NameIndex(self)

    @cached_property
    def layer_index(self) -> NDArray[np.int64]:
        """0-based layer of every entry, shape ``(n_params,)``."""
        out = np.empty(self.size, dtype=np.int64)
        for block in self.blocks:
            out[block.start : block.stop] = block.layer
        return out

    @cached_property
    def is_bias(self) -> NDArray[np.bool_]:
        """True where the entry is a bias, shape ``(n_params,)``."""
        out = np.zeros(self.size, dtype=bool)
        for block in self.blocks:
            out[block.start : block.stop] = block.kind == "bias"
        return out

    def indices(self, flat_index: int) -> tuple[int, ...]:
        """Position of an entry inside its array, e.g. ``(3, 0)`` for ``L2.W[3,0]``."""
        block = self.block_of(flat_index)
        return tuple(int(i) for i in np.unravel_index(flat_index - block.start, block.shape))

    def lookup(self, name: str) -> int:
        """Flat index of ``name``; tolerant of spaces inside the brackets."""
        if name in self.index_of:
            return self.index_of[name]
        match = _NAME.match(name.strip())
        if match:
            canonical = f"L{match[1]}.{match[2]}[{','.join(p.strip() for p in match[3].split(','))}]"
            if canonical in self.index_of:
                return self.index_of[canonical]
        raise KeyError(name)

    def views(self, theta: Array) -> list[Params]:
        """Per layer, a dict of reshaped views into ``theta``."""
        out: list[Params] = []
        for block in self.blocks:
            while len(out) <= block.layer:
                out.append({})
            out[block.layer][block.key] = theta[block.start : block.stop].reshape(block.shape)
        return out


@dataclass
class Network:
    """An ordered stack of layers ending in a loss.

    Attributes:
        n_inputs: width of the input ``X``, ``(n_samples, n_inputs)``.
        layers: the layers in order; layer ``i`` feeds layer ``i + 1``.
        loss: key into :data:`stepper.core.losses.LOSSES`.
        l2: strength of the L2 term in the cost (0: none); see the module docstring.
        input_shape: how each input row is read by shaped layers (channels
            first, e.g. ``(1, 8, 8)``); ``(n_inputs,)`` when flat.
        mode: how the network runs (training at step 0 unless made by :meth:`at`).
        start_state: the kept arrays at the start, ``(n_state,)`` (running
            statistics read from a file); None: each array's fill (means 0, variances 1).
        layout: where each parameter sits in ``theta``.
        state_layout: where each kept array (running statistics) sits in a state vector.
    """

    n_inputs: int
    layers: list[Layer]
    loss: str
    l2: float = 0.0
    input_shape: tuple[int, ...] | None = field(default=None, kw_only=True)
    mode: Mode = field(default_factory=Mode, kw_only=True)
    start_state: Array | None = field(default=None, kw_only=True, repr=False)
    layout: ParamLayout = field(init=False)
    state_layout: ParamLayout = field(init=False)

    def __post_init__(self) -> None:
        self.layout = ParamLayout(self.layers)
        self.state_layout = ParamLayout(self.layers, state=True)
        if self.loss not in LOSSES:
            raise KeyError(self.loss)
        if self.input_shape is None:
            self.input_shape = (self.n_inputs,)
        if math.prod(self.input_shape) != self.n_inputs:
            raise ValueError(f"input shape {self.input_shape} does not hold {self.n_inputs} inputs")
        width = self.n_inputs
        for index, layer in enumerate(self.layers):
            if layer.n_in != width:
                raise ValueError(f"layer {index + 1} takes {layer.n_in} inputs but receives {width}")
            width = layer.n_out
        if self.start_state is not None and self.start_state.shape != (self.state_layout.size,):
            raise ValueError(f"start state of shape {self.start_state.shape} for {self.state_layout.size} kept values")

    @property
    def n_params(self) -> int:
        return self.layout.size

    @property
    def n_outputs(self) -> int:
        return self.layers[-1].n_out

    @property
    def loss_fn(self) -> Loss:
        return LOSSES[self.loss]

    @property
    def fused(self) -> FusedLoss | None:
        """The logit form of the loss when the output layer's activation pairs with it."""
        last = self.layers[-1]
        if isinstance(last, (Dense, ActivationLayer)):
            return FUSED.get((last.activation.name, self.loss))
        return None

    def views(self, theta: Array) -> list[Params]:
        views = self.layout.views(theta)
        while len(views) < len(self.layers):
            views.append({})
        return views

    # -- modes and kept state ----------------------------------------------------------------

    @property
    def has_state(self) -> bool:
        """True when some layer keeps arrays besides its weights (batch norm's running statistics)."""
        return self.state_layout.size > 0

    @property
    def varies_by_step(self) -> bool:
        """True when the training cost depends on the step count (dropout masks)."""
        return any(isinstance(layer, Dropout) and layer.rate > 0 for layer in self.layers)

    def initial_state(self) -> Array:
        """The kept arrays at the start, ``(n_state,)``: :attr:`start_state`, or running means 0 and variances 1."""
        if self.start_state is not None:
            return self.start_state.copy()
        state = np.zeros(self.state_layout.size)
        for block in self.state_layout.blocks:
            state[block.start : block.stop] = block.fill or 0.0
        return state

    def state_views(self, state: Array) -> list[Params]:
        views = self.state_layout.views(state)
        while len(views) < len(self.layers):
            views.append({})
        return views

    def at(self, training: bool = True, step: int = 0, state: Array | None = None) -> "Network":
        """This network as it runs in training (at update ``step``) or in evaluation, with kept arrays ``state``.

        The copy shares the layout; only layers that depend on the mode change
        (dropout masks, batch norm's statistics). ``state`` defaults to
        :meth:`initial_state`. A network with no such layer runs the same in
        every mode: it is returned itself.
        """
        if not (self.varies_by_step or self.has_state):
            return self
        mode = Mode(training, step)
        views = self.state_views(self.initial_state() if state is None else state)
        twin = copy.copy(self)
        twin.mode = mode
        twin.layers = [layer.bind(mode, views[i]) if isinstance(layer, Builtin) else layer
                       for i, layer in enumerate(self.layers)]
        return twin

    def next_state(self, theta: Array, X: Array, state: Array) -> Array:
        """The kept arrays after one training step on ``X`` ``(n, n_inputs)`` at ``theta``; ``(n_state,)``.

        Runs the forward pass in training mode (the batch statistics of the
        step) and lets each layer update what it keeps.
        """
        if not self.has_state:
            return state
        net = self.at(True, self.mode.step, state)
        trace = net.forward(theta, X)
        out = state.copy()
        new_views = self.state_views(out)
        old_views = self.state_views(state)
        for index, layer in enumerate(net.layers):
            if isinstance(layer, Builtin) and old_views[index]:
                for key, value in layer.next_state(trace[index][1], old_views[index]).items():
                    new_views[index][key][...] = value
        return out

    # -- forward ---------------------------------------------------------------------------

    def forward(self, theta: Array, X: Array, start: int = 0) -> list[tuple[Array, Any]]:
        """Run layers ``start..end`` on ``X`` (the input of layer ``start``).

        Returns, for each layer run, its output ``(n, n_out)`` and its cache.
        """
        params = self.views(theta)
        out: list[tuple[Array, Any]] = []
        A = X
        for index in range(start, len(self.layers)):
            A, cache = self.layers[index].forward(params[index], A)
            out.append((A, cache))
        return out

    def predict(self, theta: Array, X: Array) -> Array:
        """Network output for ``X``: ``(n_samples, n_inputs) -> (n_samples, n_outputs)``."""
        return self.forward(theta, X)[-1][0]

    def output_cost(self, A: Array, cache: Any, Y: Array) -> Array:
        """Cost from the last layer's output ``A`` (``(..., n, m)``) and cache; shape ``(...)``."""
        fused = self.fused
        if fused is not None and isinstance(cache, DenseCache):
            return fused.value(cache.Z, Y)
        return self.loss_fn.value(A, Y)

    def cost(self, theta: Array, X: Array, Y: Array) -> float:
        """Cost of the whole set ``X`` ``(n, n_inputs)`` against targets ``Y`` ``(n, n_outputs)``.

        Includes the L2 term (:meth:`penalty`).
        """
        A, cache = self.forward(theta, X)[-1]
        return float(self.output_cost(A, cache, Y)) + self.penalty(theta)

    # -- the L2 term -------------------------------------------------------------------------

    @property
    def penalized(self) -> NDArray[np.bool_]:
        """True for the entries the L2 term covers (weights, not biases), ``(n_params,)``."""
        return ~self.layout.is_bias

    def penalty(self, theta: Array) -> float:
        """The L2 term ``(l2 / 2) * sum(w^2)`` over the weights of ``theta`` ``(n_params,)``."""
        if self.l2 == 0.0:
            return 0.0
        w = theta[self.penalized]
        return 0.5 * self.l2 * float(np.dot(w, w))

    def penalty_slopes(self, theta: Array) -> Array:
        """Slope of the L2 term, ``l2 * w`` on weights and 0 on biases, ``(n_params,)``."""
        if self.l2 == 0.0:
            return np.zeros(theta.shape)
        return np.where(self.penalized, self.l2 * theta, 0.0)

    def penalty_at(self, theta: Array, base: float, idx: NDArray[np.int64], offsets: Array | float) -> Array:
        """The L2 term with ``theta[idx[k]]`` moved by ``offsets[k]`` (one at a time), ``(k,)``.

        ``base`` is :meth:`penalty` at ``theta``; only the moved entry's part changes.
        """
        shift = np.broadcast_to(np.asarray(offsets, dtype=np.float64), idx.shape)
        if self.l2 == 0.0:
            return np.zeros(idx.shape)
        w = theta[idx]
        change = 0.5 * self.l2 * np.where(self.penalized[idx], (w + shift) ** 2 - w * w, 0.0)
        return base + change

    # -- backward --------------------------------------------------------------------------

    def cost_and_slopes(self, theta: Array, X: Array, Y: Array) -> tuple[float, Array]:
        """Cost and its slope w.r.t. every parameter, by backpropagation.

        Returns ``(cost, slopes)`` where ``slopes`` has shape ``(n_params,)``.
        """
        trace = self.forward(theta, X)
        cost, grads, _ = self.backward(theta, trace, Y)
        return cost, grads

    def backward(
        self, theta: Array, trace: list[tuple[Array, Any]], Y: Array
    ) -> tuple[float, Array, list[Array]]:
        """Backpropagate through a forward ``trace`` of the whole network.

        Returns the cost and the flat slopes ``(n_params,)``, both with the L2
        term, and, per layer, the
        slope of the cost w.r.t. that layer's output (``(n, n_out)``), which the
        insight views use as each unit's error signal.
        """
        params = self.views(theta)
        grads = np.zeros(self.n_params)
        gviews = self.views(grads)
        A, cache = trace[-1]
        cost = float(self.output_cost(A, cache, Y)) + self.penalty(theta)
        output_slopes: list[Array] = [np.empty(0)] * len(self.layers)
        last = self.layers[-1]
        fused = self.fused
        if fused is not None and isinstance(last, Dense) and isinstance(cache, DenseCache):
            dZ = fused.grad_z(cache.Z, Y)
            # The slope w.r.t. the output A is not needed by backprop here; report
            # the plain loss's one so the breakdown views can still show it.
            output_slopes[-1] = self.loss_fn.grad(A, Y)
            layer_grads, dA = last.backward_from_z(params[-1], cache, dZ, len(self.layers) > 1)
        elif fused is not None and isinstance(last, ActivationLayer) and isinstance(cache, DenseCache):
            output_slopes[-1] = self.loss_fn.grad(A, Y)
            layer_grads, dA = last.backward_from_z(fused.grad_z(cache.Z, Y))
        else:
            dOut = self.loss_fn.grad(A, Y)
            output_slopes[-1] = dOut
            layer_grads, dA = self._layer_backward(len(self.layers) - 1, params, cache, dOut)
        self._store(gviews[-1], layer_grads)
        for index in range(len(self.layers) - 2, -1, -1):
            output_slopes[index] = dA
            layer_grads, dA = self._layer_backward(index, params, trace[index][1], dA)
            self._store(gviews[index], layer_grads)
        if self.l2 != 0.0:
            grads += self.penalty_slopes(theta)
        return cost, grads, output_slopes

    def _layer_backward(self, index: int, params: list[Params], cache: Any, dOut: Array) -> tuple[Params, Array]:
        """One layer's backward; a built-in first layer skips its unused input slopes ``dX``."""
        layer = self.layers[index]
        if isinstance(layer, Builtin):
            return layer.backward(params[index], cache, dOut, need_dx=index > 0)
        return layer.backward(params[index], cache, dOut)

    @staticmethod
    def _store(target: Params, source: Params) -> None:
        for key, view in target.items():
            view[...] = source[key]
