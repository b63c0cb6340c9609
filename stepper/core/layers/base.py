"""What every layer meets, and what the built-in layers share.

Shapes. Between layers, data is always flat per sample: a layer maps ``X`` of
shape ``(n_samples, n_in)`` to ``(n_samples, n_out)``. A built-in layer that
works on shaped data (a convolution, a pooling) reads each row as an array of
its ``in_shape``, channels first (``(channels, length)`` or ``(channels,
height, width)``), in C order; ``n_in`` is the product of ``in_shape``. Built-in
layers also accept extra leading axes, ``(k, n_samples, n_in)``, which the
numeric slopes and the cost slices use to push many perturbed copies of a
network through a layer in one numpy call.

A custom layer (``stepper.formats.custom_layer``) meets only :class:`Layer`.
The built-in layers derive from :class:`Builtin`, whose defaults the layers
override where they can do better: the outputs of many perturbed copies at
once (:meth:`Builtin.perturbed`), whether a perturbed run crossed a kink
(:meth:`Builtin.crossed`), the arrays a layer keeps besides its weights
(:meth:`Builtin.state_specs`, a batch norm's running statistics) and how a layer
runs in training or in evaluation (:meth:`Builtin.bind`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import Activation

Array = NDArray[np.float64]
Params = dict[str, Array]
Flags = NDArray[np.bool_]


@dataclass(frozen=True)
class ParamSpec:
    """One named parameter array of a layer.

    Attributes:
        key: short name inside the layer, e.g. ``"W"``, ``"K"`` or ``"b"``.
        shape: array shape.
        kind: ``"weight"`` or ``"bias"``.
        fans: ``(fan_in, fan_out)`` for the initialisation schemes, or None when
            the array is not drawn by a scheme.
        fill: a constant starting value (a norm's scale starts at 1), or None.
    """

    key: str
    shape: tuple[int, ...]
    kind: str = "weight"
    fans: tuple[int, int] | None = None
    fill: float | None = None


@dataclass(frozen=True)
class Mode:
    """How a forward pass runs.

    Attributes:
        training: True for the training cost and its slopes (dropout masks on,
            batch norm on the batch's statistics); False for the validation cost
            (no dropout, batch norm on its running statistics).
        step: the update count; a dropout mask is drawn once per step.
    """

    training: bool = True
    step: int = 0


class Layer(Protocol):
    """What the network needs from a layer.

    ``forward`` returns the output and an opaque cache; ``backward`` takes that
    cache and the slope of the cost w.r.t. the output, and returns the slopes
    w.r.t. each parameter (same shapes as the parameters) and w.r.t. the input.
    """

    @property
    def n_in(self) -> int: ...

    @property
    def n_out(self) -> int: ...

    @property
    def label(self) -> str: ...

    def param_specs(self) -> tuple[ParamSpec, ...]: ...

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]: ...

    def backward(self, params: Params, cache: Any, dOut: Array) -> tuple[Params, Array]: ...


def shape_text(shape: tuple[int, ...]) -> str:
    """``1x8x8`` for ``(1, 8, 8)``."""
    return "x".join(str(s) for s in shape)


class Builtin:
    """Defaults shared by the built-in layers (see the module docstring).

    Subclasses are frozen dataclasses holding the layer's settings; they define
    ``type_name``, ``in_shape``, ``out_shape``, ``n_in``, ``n_out``,
    ``param_specs``, ``forward`` and ``backward``.
    """

    #: The ``type`` key in model files.
    type_name: str = ""
    #: True when the layer's output can have corners (ReLU kinks, max-pool ties).
    has_kinks: bool = False
    #: True when the samples of one batch affect each other's outputs (batch statistics).
    couples_samples: bool = False

    if TYPE_CHECKING:  # provided by each layer, as dataclass fields or properties

        @property
        def in_shape(self) -> tuple[int, ...]: ...

        @property
        def out_shape(self) -> tuple[int, ...]: ...

        @property
        def n_in(self) -> int: ...

        @property
        def n_out(self) -> int: ...

    @property
    def label(self) -> str:
        return f"{self.type_name} {shape_text(self.in_shape)}->{shape_text(self.out_shape)}"

    @property
    def kind(self) -> str:
        """A short name for narrow screens, e.g. ``conv2d 8x8x8``."""
        return f"{self.type_name} {shape_text(self.out_shape)}"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return ()

    def state_specs(self) -> tuple[ParamSpec, ...]:
        """Arrays the layer keeps besides its weights (never stepped); none by default."""
        return ()

    def next_state(self, cache: Any, state: Params) -> Params:
        """The kept arrays after a training step whose forward pass left ``cache``."""
        return state

    def bind(self, mode: Mode, state: Params) -> "Builtin":
        """This layer as it runs in ``mode`` with its kept arrays ``state``; itself by default."""
        return self

    def scratch(self) -> int:
        """Floats per sample of the largest array the forward pass makes (sizes chunks of copies)."""
        return max(self.n_in, self.n_out)

    def why_no_breakdown(self) -> str:
        """One sentence: why this layer's parameters have no unit-by-unit slope breakdown."""
        return ("its slope is not one unit's error signal x activation slope x input summed over "
                "samples, which is what the breakdown shows for dense layers")

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]:
        raise NotImplementedError

    def backward(self, params: Params, cache: Any, dOut: Array, need_dx: bool = True) -> tuple[Params, Array]:
        raise NotImplementedError

    # -- one channel per copy (stepper.core.stacked's channel path) ------------------------

    def moved_channels(
        self, params: Params, X: Array, cache: Any, key: str, local: NDArray[np.int64], delta: Array
    ) -> tuple[NDArray[np.int64], Array, Flags] | None:
        """Like :meth:`perturbed`, for a layer whose moved entry changes one channel of its output.

        Returns, per copy ``j``, the channel ``channels[j]`` that moved, that channel
        of the output ``(k, n, width)`` (``width`` entries per channel, in the row's
        C order) and whether the move crossed a kink; None when a move changes more.
        """
        return None

    def channel_width(self, width: int) -> int | None:
        """Entries per channel of the output when each channel of the input holds ``width``
        entries and each channel of the output depends on the same channel of the input
        alone; None when it does not (the layer mixes channels) or the widths do not fit."""
        return None

    def channel_forward(self, params: Params, A: Array, channels: NDArray[np.int64], base: Any) -> tuple[Array, Flags]:
        """Channel ``channels[j]`` of copy ``j``'s output from that channel of its input ``A``
        ``(k, n, width)``, and per copy whether it crossed a kink against ``base``, the cache
        of the unmoved run. Only called where :meth:`channel_width` is not None."""
        raise NotImplementedError

    def crossed(self, base: Any, moved: Any, k: int) -> Flags:
        """Per copy ``(k,)``: did a run of ``k`` stacked copies (cache ``moved``) cross a kink?

        ``base`` is the cache of the run at the unmoved parameters. A run of one
        copy without a leading axis counts as ``k = 1``. No kinks by default.
        """
        return np.zeros(k, dtype=bool)

    def perturbed(
        self, params: Params, X: Array, cache: Any, key: str, local: NDArray[np.int64], delta: Array
    ) -> tuple[Array, Flags]:
        """Outputs ``(k, n, n_out)`` with entry ``local[j]`` of array ``key`` moved by ``delta[j]``.

        ``X`` ``(n, n_in)`` is the layer's input and ``cache`` its forward pass at
        the unmoved parameters. Also returns, per copy, whether it crossed a kink.
        This default runs the layer once per copy; layers override it where one
        stacked computation does the same.
        """
        k = local.size
        out = np.empty((k, X.shape[0], self.n_out))
        kinked = np.zeros(k, dtype=bool)
        for j in range(k):
            moved = dict(params)
            moved[key] = params[key].copy()
            moved[key].flat[local[j]] += delta[j]
            out[j], copy_cache = self.forward(moved, X)
            kinked[j] = bool(self.crossed(cache, copy_cache, 1)[0])
        return out, kinked


class Activated(Builtin):
    """A built-in layer ending in an elementwise activation of its pre-activations (its cache's ``Z``).

    Its kinks are those of the activation: a copy crossed one where some entry of
    ``Z`` changed sign (ReLU-like activations have their corner at 0).
    """

    if TYPE_CHECKING:

        @property
        def activation(self) -> Activation: ...

    @property
    def has_kinks(self) -> bool:  # type: ignore[override]
        return self.activation.kink

    def crossed(self, base: Any, moved: Any, k: int) -> Flags:
        if not self.activation.kink:
            return np.zeros(k, dtype=bool)
        return differs(base.Z > 0.0, moved.Z > 0.0, k)


class Shaped(Builtin):
    """A built-in layer whose widths follow from its ``in_shape`` and ``out_shape``."""

    @property
    def n_in(self) -> int:
        return math.prod(self.in_shape)

    @property
    def n_out(self) -> int:
        return math.prod(self.out_shape)


def differs(base: NDArray[Any], moved: NDArray[Any], k: int) -> Flags:
    """Per copy ``(k,)``: does ``moved`` (``(k, *base.shape)``, or ``base.shape`` for one copy) differ anywhere?"""
    if moved.ndim == base.ndim:
        return np.array([bool(np.any(moved != base))])
    return np.any((moved != base).reshape(k, -1), axis=1)


def is_builtin(layer: object) -> bool:
    """True for Stepper's own layers, False for a user's custom layer."""
    return isinstance(layer, Builtin)


def update_channels(base: Array, channels: NDArray[np.int64], change: Array) -> Array:
    """Copies of ``base`` ``(n, C, P)`` with ``change[j]`` ``(n, P)`` added to channel ``channels[j]``.

    Returns ``(k, n, C, P)``: the pre-activations of ``k`` perturbed copies of a
    layer where each perturbation moves one channel (one unit of a dense layer,
    one output channel of a convolution, one feature of a norm).
    """
    k = channels.size
    out = np.broadcast_to(base, (k,) + base.shape).copy()
    out[np.arange(k), :, channels, :] += change
    return out
