"""Custom layers: a Python class, named by the model file, that runs inside the network.

Loading a custom layer RUNS THE USER'S PYTHON CODE, with the user's rights:
only load model files you trust. Stepper loads such a file only when a model
file names it in a ``[[layers]]`` table with ``type = "custom"``; never from
a checkpoint, a weights file or a data file.

The model file::

    [[layers]]
    type = "custom"
    file = "gate.py"            # relative to the model file
    class = "GatedUnits"
    units = 3                   # optional when the class decides its width
    options = { gate_shift = 1.0 }   # optional, passed to the class as a dict

The class (the whole interface; README.md, "Custom layers", has an example)::

    class GatedUnits:
        bias_keys = ("b", "c")          # optional: which parameters are biases

        def __init__(self, n_in, units, options):   # units is None when not given
            self.n_out = ...                          # required: output width

        def init(self, rng):            # rng: numpy.random.Generator
            return {"W": ..., "b": ...} # initial values; the shapes fix the layout

        def forward(self, params, X):   # X (n, n_in) -> (out (n, n_out), cache)
            ...

        def backward(self, params, cache, dOut):
            ...                          # -> ({"W": dW, "b": db}, dX (n, n_in))

Every result is checked: output, slopes and ``dX`` must be float64 numpy
arrays of the right shapes, and ``backward`` must return a slope for every
parameter and nothing else. ``params``, ``X`` and ``dOut`` are handed over
read-only (they are views into Stepper's own arrays), so a layer must return
new arrays. Any failure, and any exception raised in the user's code, becomes
a :class:`stepper.errors.CustomLayerError` naming the model file, the layer
and the class, with the lines of the user's file from the traceback.
"""

from __future__ import annotations

import hashlib
import itertools
import os
import re
import sys
import traceback
from pathlib import Path
from types import ModuleType
from typing import Any, Callable, NoReturn

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import ParamSpec, Params
from stepper.core.network import Network
from stepper.errors import CustomLayerError
from stepper.formats import user_code
from stepper.formats.reading import CODE_FILE_LIMIT, read_limited
from stepper.formats.toml_keys import layer_label

Array = NDArray[np.float64]

#: The methods a custom layer class must define.
REQUIRED = ("init", "forward", "backward")
#: Keys of a plain dense layer that a custom layer does not take.
DENSE_ONLY = ("activation", "bias", "weights", "biases")

_KEY = re.compile(r"^[A-Za-z_]\w*$")
_counter = itertools.count()


class CustomLayer:
    """A user's layer class, wrapped so that it meets :class:`stepper.core.layers.Layer`.

    Attributes:
        n_in, n_out: input and output widths.
        where: ``model.toml: layers[1] (L2, gate.py:GatedUnits)``, the prefix of every message.
        path: the user's Python file.
        user: the user's layer object.
    """

    def __init__(self, where: str, path: Path, class_name: str, user: Any, n_in: int, n_out: int,
                 specs: tuple[ParamSpec, ...]) -> None:
        self.where = where
        self.path = path
        self.class_name = class_name
        self.user = user
        self.n_in = n_in
        self.n_out = n_out
        self._specs = specs

    @property
    def label(self) -> str:
        return f"custom {self.n_in}->{self.n_out} {self.path.name}:{self.class_name}"

    def param_specs(self) -> tuple[ParamSpec, ...]:
        return self._specs

    # -- calls into the user's code ------------------------------------------------------------

    def initial_values(self, rng: np.random.Generator) -> Params:
        """The user's ``init(rng)``, checked against the layout fixed when the layer was loaded."""
        values = self._call("init", self.user.init, rng)
        return _check_params(self, "init", values, self._specs, "")

    def forward(self, params: Params, X: Array) -> tuple[Array, Any]:
        """``X`` ``(n, n_in)`` to ``(out (n, n_out), cache)`` through the user's ``forward``."""
        result = self._call("forward", self.user.forward, _frozen(params), _readonly(X))
        out, cache = _pair(self, "forward", result, "(out, cache)")
        out = _check_array(self, "forward", "its output", out, (X.shape[0], self.n_out))
        return out, cache

    def backward(self, params: Params, cache: Any, dOut: Array) -> tuple[Params, Array]:
        """Slopes of the parameters and of the input through the user's ``backward``."""
        result = self._call("backward", self.user.backward, _frozen(params), cache, _readonly(dOut))
        grads, dX = _pair(self, "backward", result, "(slopes, dX)")
        grads = _check_params(self, "backward", grads, self._specs, "d")
        dX = _check_array(self, "backward", "dX", dX, (dOut.shape[0], self.n_in))
        return grads, dX

    def _call(self, what: str, fn: Callable[..., Any], *args: Any) -> Any:
        try:
            return user_code.call(fn, *args)
        except user_code.UserCodeFailure as failure:  # the user's code: any failure is reported, not a crash
            self.fail(_raised(what, failure, self.path))

    def fail(self, message: str) -> NoReturn:
        raise CustomLayerError(f"{self.where}: {message}")


def build_custom_layer(keys: Any, n_in: int, model_path: Path) -> CustomLayer:
    """Load the class a ``[[layers]]`` table names and wrap it.

    Args:
        keys: the layer's table (``stepper.formats.toml_keys.Keys``); its
            errors name the model file and the key.
        n_in: width of the layer's input.
        model_path: the model file; ``file`` is relative to its folder.
    """
    for key in DENSE_ONLY:
        if keys.has(key):
            keys.fail(key, "a custom layer does not take this key (it sets its own parameters "
                           "and activation in its class)")
    file_name = keys.get("file", str)
    class_name = keys.get("class", str)
    units = keys.get("units", int, None)
    if units is not None and units < 1:
        keys.fail("units", f"{units} is not a positive number of units")
    options = keys.get("options", dict, {})
    path = Path(file_name) if Path(file_name).is_absolute() else model_path.parent / file_name
    if path.suffix != ".py":
        keys.fail("file", f"'{file_name}' is not a Python file (expected a name ending in .py)")
    if not path.is_file():
        keys.fail("file", f"no such file '{file_name}' (looked for {path})")
    where = f"{keys.file}: {keys.where} ({layer_label(keys.where)}, {path.name}:{class_name})"

    module = _load_module(path, f"{keys.file}: {keys.where} ({layer_label(keys.where)}, {path.name})")
    cls: Any = getattr(module, class_name, None)
    if cls is None:
        defined = sorted(n for n, v in vars(module).items()
                         if isinstance(v, type) and v.__module__ == module.__name__)
        keys.fail("class", f"'{class_name}' is not defined in {path.name} "
                           f"(classes there: {', '.join(defined) or 'none'})")
    if not isinstance(cls, type):
        keys.fail("class", f"'{class_name}' in {path.name} is not a class")
    missing = [m for m in REQUIRED if not callable(getattr(cls, m, None))]
    if missing:
        keys.fail("class", f"{class_name} has no {', '.join(missing)} method "
                           "(a custom layer needs init, forward and backward; see README.md, Custom layers)")

    try:
        user = user_code.call(lambda: cls(n_in=n_in, units=units, options=dict(options)))
    except user_code.UserCodeFailure as failure:
        raise CustomLayerError(f"{where}: {_raised('creating the layer', failure, path)}") from None
    return wrap_user_layer(where, path, class_name, user, n_in, units)


def wrap_user_layer(where: str, path: Path, class_name: str, user: Any, n_in: int,
                    units: int | None) -> CustomLayer:
    """Wrap an instance of a user's layer class, checking ``n_out``, ``bias_keys`` and ``init``.

    ``where`` starts every message; ``path`` is the user's file (its lines are
    quoted from tracebacks); ``units``, when given, must equal ``n_out``.
    """
    for method in REQUIRED:
        if not callable(getattr(user, method, None)):
            raise CustomLayerError(f"{where}: {class_name} has no {method} method "
                                   "(a custom layer needs init, forward and backward; see README.md, Custom layers)")
    n_out = getattr(user, "n_out", None)
    if isinstance(n_out, bool) or not isinstance(n_out, (int, np.integer)) or n_out < 1:
        raise CustomLayerError(f"{where}: after __init__, n_out is {n_out!r}; "
                               "it must be the layer's output width, a positive integer")
    if units is not None and int(n_out) != units:
        raise CustomLayerError(f"{where}: the class set n_out = {n_out} but the model file says "
                               f"units = {units}")
    bias_keys = getattr(user, "bias_keys", ())
    if not isinstance(bias_keys, (tuple, list)) or not all(isinstance(k, str) for k in bias_keys):
        raise CustomLayerError(f"{where}: bias_keys must be a tuple of parameter names")

    layer = CustomLayer(where, path, class_name, user, n_in, int(n_out), ())
    first = layer._call("init", user.init, np.random.default_rng(0))
    if not isinstance(first, dict):
        layer.fail(f"init returned {_what(first)}, expected a dict of parameter name -> array")
    specs: list[ParamSpec] = []
    for key, value in first.items():
        if not isinstance(key, str) or not _KEY.match(key):
            layer.fail(f"init returned a parameter named {key!r}; names must be identifiers "
                       "(letters, digits, underscores)")
        if not isinstance(value, np.ndarray) or value.ndim == 0:
            layer.fail(f"init returned {_what(value)} for '{key}', expected a numpy array with at least "
                       "one axis (use shape (1,) for a single number)")
        specs.append(ParamSpec(key, tuple(int(s) for s in value.shape),
                               "bias" if key in bias_keys else "weight"))
    unknown = sorted(set(bias_keys) - set(first))
    if unknown:
        layer.fail(f"bias_keys names {', '.join(unknown)}, which init does not return")
    layer._specs = tuple(specs)
    _check_params(layer, "init", first, layer._specs, "")
    return layer


def fill_initial_values(network: Network, theta: Array, seed: int) -> None:
    """Write every custom layer's own initial values into ``theta`` ``(n_params,)``.

    Layer ``i`` gets ``numpy.random.default_rng([seed, i])``, so a seed fixes them.
    """
    views = network.views(theta)
    for index, layer in enumerate(network.layers):
        if isinstance(layer, CustomLayer):
            values = layer.initial_values(np.random.default_rng([seed, index]))
            for key, view in views[index].items():
                view[...] = values[key]


# -- helpers -----------------------------------------------------------------------------------


def _load_module(path: Path, where: str) -> ModuleType:
    """Run the user's file as a fresh module (a new one on every load).

    The source is compiled here rather than imported, so no bytecode cache is
    written next to the user's file, and nothing is added to the import path.
    """
    raw = read_limited(path, CODE_FILE_LIMIT, CustomLayerError, where)
    try:
        source = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise CustomLayerError(f"{where}: cannot be read (not UTF-8 text)") from None
    digest = hashlib.sha256(str(path.resolve()).encode()).hexdigest()[:12]
    module = ModuleType(f"_stepper_custom_{digest}_{next(_counter)}")
    module.__file__ = str(path)
    try:
        code = compile(source, str(path), "exec")
    except SyntaxError as exc:
        raise CustomLayerError(f"{where}: syntax error at line {exc.lineno}: {exc.msg}") from None
    # Registered while it runs and afterwards: dataclasses look their module up by name.
    sys.modules[module.__name__] = module
    try:
        user_code.call(exec, code, module.__dict__)
    except user_code.UserCodeFailure as failure:
        del sys.modules[module.__name__]
        raise CustomLayerError(f"{where}: {_raised('loading the file', failure, path)}") from None
    return module


def _raised(what: str, failure: user_code.UserCodeFailure, path: Path) -> str:
    """``forward raised ValueError: ... [gate.py line 12 in forward: X / s]``, one line.

    An exit, an interrupt and an abandoned call are said as such: each is the
    layer's failure, never the end of Stepper (an exit code 0 would pass a check).
    """
    exc = failure.error
    text = " ".join(str(exc).split())
    if isinstance(exc, SystemExit):
        message = f"{what} called exit ({type(exc).__name__} {exc.code!r}); a layer must return or raise"
    elif isinstance(exc, KeyboardInterrupt):
        message = f"{what} was interrupted (Ctrl-C) before it returned"
    elif isinstance(exc, user_code.Abandoned):
        message = f"{what} was abandoned: {failure.reason}"
    else:
        message = f"{what} raised {type(exc).__name__}" + (f": {text}" if text else "")
    if "read-only" in text:
        message += " (params, X and dOut are read-only: return new arrays)"
    own = os.path.realpath(path)
    frames = [f for f in traceback.extract_tb(exc.__traceback__) if os.path.realpath(f.filename) == own]
    if frames:
        where = " > ".join(
            f"{path.name} line {f.lineno} in {f.name}" + (f": {f.line.strip()}" if f.line else "")
            for f in frames
        )
        message += f" [{where}]"
    return message


def _pair(layer: CustomLayer, what: str, result: Any, shape: str) -> tuple[Any, Any]:
    if not isinstance(result, tuple) or len(result) != 2:
        layer.fail(f"{what} returned {_what(result)}, expected a pair {shape}")
    return result[0], result[1]


def _check_array(layer: CustomLayer, what: str, name: str, value: Any, shape: tuple[int, ...]) -> Array:
    if not isinstance(value, np.ndarray):
        layer.fail(f"{what} returned {_what(value)} as {name}, expected a numpy array of shape {shape}")
    if value.dtype != np.float64:
        layer.fail(f"{what} returned {name} of dtype {value.dtype}, expected float64 "
                   "(Stepper computes in float64; finite differences need its precision)")
    if value.shape != shape:
        layer.fail(f"{what} returned {name} of shape {value.shape}, expected {shape}")
    return value


def _check_params(layer: CustomLayer, what: str, values: Any, specs: tuple[ParamSpec, ...],
                  prefix: str) -> Params:
    if not isinstance(values, dict):
        layer.fail(f"{what} returned {_what(values)} for the parameters, expected a dict "
                   "of parameter name -> array")
    wanted = [s.key for s in specs]
    missing = [k for k in wanted if k not in values]
    if missing:
        layer.fail(f"{what} returned no {', '.join(prefix + k for k in missing)} "
                   f"(expected one array for each of: {', '.join(wanted)})")
    extra = [str(k) for k in values if k not in wanted]
    if extra:
        layer.fail(f"{what} returned {', '.join(prefix + k for k in extra)}, which "
                   f"{'init did not declare' if prefix else 'the layer did not declare at first'} "
                   f"(parameters: {', '.join(wanted)})")
    out: Params = {}
    for spec in specs:
        out[spec.key] = _check_array(layer, what, prefix + spec.key, values[spec.key], spec.shape)
    if not prefix:
        for key, array in out.items():
            if not np.all(np.isfinite(array)):
                layer.fail(f"init returned '{key}' with a value that is not a finite number")
    return out


def _what(value: Any) -> str:
    if isinstance(value, tuple):
        return f"a tuple of {len(value)}"
    if isinstance(value, np.ndarray):
        return f"an array of shape {value.shape}"
    if value is None:
        return "None"
    return f"a {type(value).__name__}"


def _readonly(array: Array) -> Array:
    view = array.view()
    view.flags.writeable = False
    return view


def _frozen(params: Params) -> Params:
    return {key: _readonly(value) for key, value in params.items()}
