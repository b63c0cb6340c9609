"""Model files: one TOML file describes a whole debugging setup.

Schema (every key is checked; unknown keys are refused so typos surface)::

    name = "pricing net"                  # optional label
    loss = "mean_squared_error"           # see stepper.core.losses.LOSSES

    [data]                                # all keys: stepper.formats.data_options
    file = "houses.csv"                   # relative to the model file
    inputs = ["area", "age"]              # column names, or "*": all but the targets
    targets = ["price"]
    standardize = true                    # optional, default false
    validation_fraction = 0.2             # optional, default 0
    seed = 7                              # optional, seeds the validation split
    input_shape = [1, 8, 8]               # optional: each row's inputs as [channels, (height,) width],
                                          # channels first; the product must equal len(inputs)

    [init]
    scheme = "glorot_uniform"             # uniform | glorot_uniform | glorot_normal
                                          # | he_normal | he_uniform
    seed = 1
    range = 0.5                           # only for scheme = "uniform"

    [[layers]]                            # first layer after the inputs
    units = 8
    activation = "tanh"                   # see stepper.core.activations.ACTIVATIONS
    bias = true                           # optional, default true
    weights = [[...], ...]                # optional inline values, n_in rows x units
    biases = [...]                        # optional inline values, units entries

    [[layers]]                            # other built-in layers: conv1d, conv2d, max_pool,
    type = "conv2d"                       # avg_pool, flatten, dropout, layer_norm, batch_norm,
    channels = 8                          # embedding, activation; their keys are in
    kernel = 3                            # stepper.formats.layer_keys
    padding = "same"
    activation = "relu"

    [[layers]]                            # a custom layer: RUNS the named Python file
    type = "custom"                       # (stepper.formats.custom_layer)
    file = "gate.py"                      # relative to the model file
    class = "GatedUnits"
    units = 3                             # optional when the class sets n_out
    options = { gate_shift = 1.0 }        # optional, passed to the class

    [training]                            # optional: how steps are made besides rate and rule
    l2 = 1e-4                             # L2 term (l2/2) sum w^2 over the weights, in the cost
    weight_decay = 0.01                   # decoupled weight decay per step (AdamW with adam)
    clip_norm = 1.0                       # clip the slopes to this global norm
    [training.schedule]                   # the rate schedule (stepper.core.schedules)
    kind = "cosine"                       # constant | step | exponential | cosine
    steps = 1000                          # cosine: steps, warmup, floor, restart
    warmup = 50                           # step, exponential: every, factor

Instead of ``[[layers]]`` and ``[init]``, ``network = "net.onnx"`` (relative
to the model file) takes the layers and their weights from an ONNX graph
(:mod:`stepper.formats.onnx_import`).

Inline ``weights``/``biases`` override the scheme for that layer. A layer
with inline values needs no ``[init]`` at all. Custom layers draw their own
starting values (seeded by ``[init].seed``, or 0 without ``[init]``).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.activations import ACTIVATIONS
from stepper.core.descent import Descent
from stepper.core.init import SCHEMES, fill_constants, initial_params
from stepper.core.layers import ActivationLayer, Dense, Layer, is_builtin
from stepper.core.losses import LOSSES
from stepper.core.network import Network
from stepper.core.schedules import CONSTANT, ScheduleError
from stepper.core.schedules import from_dict as schedule_from_dict
from stepper.errors import ModelFileError
from stepper.formats.data_options import DATA_KEYS, fit_data, load_data
from stepper.formats.dataset import Dataset
from stepper.formats.reading import MODEL_FILE_LIMIT, collect_reads, read_limited
from stepper.formats.toml_keys import Keys
from stepper.formats.layer_keys import TYPES, build_layer, category_columns, check_keys, need_flat
from stepper.formats.weight_sources import WeightOrigin

if TYPE_CHECKING:
    from stepper.formats.weights_import import TorchLinear, TorchState

Array = NDArray[np.float64]

TOP_KEYS = {"name", "loss", "data", "init", "layers", "network", "training"}
TRAINING_KEYS = {"l2", "weight_decay", "clip_norm", "schedule"}
INIT_KEYS = {"scheme", "seed", "range", "file", "names", "layout"}

#: Most parameters a model file may describe. Stepper lists, checks and steps
#: every weight, which is only practical for small networks; the limit turns a
#: typo such as ``units = 30000000`` into a message instead of gigabytes of memory.
MAX_PARAMETERS = 10_000_000


@dataclass(frozen=True)
class Setup:
    """Everything a model file describes, loaded and checked.

    Attributes:
        path: the model file.
        name: a label for screens and reports.
        network: the network.
        theta0: initial parameters, ``(n_params,)``.
        data: training and validation data.
        digest: SHA-256 of the model file's bytes (checkpoints record it), and of
            the ONNX file's after them when the model file names one.
        origin: the file the weights came from and the tensor behind each array
            (an ONNX graph, or a framework's weights file), or None.
        document: the model document when it was built from command-line
            options rather than read from a model file (a journal records it,
            so a replay can build it again), else None.
        descent: decay, clipping and schedule from ``[training]`` (the L2 term is ``network.l2``).
        inputs: every other file read to build the setup, as ``(path, sha256)``:
            the data, custom layers' code, a weights file, an ONNX graph
            (collected by :func:`stepper.formats.reading.collect_reads`).
    """

    path: Path
    name: str
    network: Network
    theta0: Array
    data: Dataset
    digest: str
    origin: WeightOrigin | None = None
    document: dict[str, Any] | None = None
    descent: Descent = Descent()
    inputs: tuple[tuple[Path, str], ...] = ()

    def input_files(self) -> list[tuple[str, Path]]:
        """Every file this setup was read from, with its role, the model file first."""
        return [("the model file", self.path)] + [("a file the model file reads", p) for p, _ in self.inputs]


def load_setup(path: str | Path) -> Setup:
    """Read and check a model file, its data and its initial weights."""
    path = Path(path)
    label = str(path)
    if path.suffix.lower() == ".onnx":
        raise ModelFileError(
            f"{label}: an ONNX file holds the network but not its data: give --data, --targets and --loss "
            f"with it, or name it in a model file (network = \"{path.name}\")")
    raw = read_limited(path, MODEL_FILE_LIMIT, ModelFileError, label, "model file")
    try:
        # A byte-order mark is allowed (some editors write one); TOML itself has none.
        doc = tomllib.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise ModelFileError(f"{label}: not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise ModelFileError(f"{label}: not valid TOML ({exc})") from None
    except RecursionError:
        raise ModelFileError(f"{label}: not valid TOML (arrays or tables nested too deeply)") from None
    with collect_reads() as reads:
        setup = setup_from_doc(doc, path, raw)
    own = path.resolve()
    inputs = tuple(dict.fromkeys((p, sha) for p, sha in reads if p != own))
    return dataclasses.replace(setup, inputs=inputs)


def setup_from_doc(doc: Any, path: Path, raw: bytes, data: Dataset | None = None,
                   label: str | None = None) -> Setup:
    """A setup from a model file's document (the parsed TOML, or one built from options).

    Args:
        doc: the document; see the module docstring.
        path: the model file; relative file names in ``doc`` are relative to its folder.
        raw: the bytes the digest covers (the model file's, or the options that built ``doc``).
        data: the data, when it comes from arrays instead of ``[data]`` (which must then be absent).
        label: how messages name the document (default: ``path``).
    """
    label = label or str(path)
    top = Keys(label, "", doc, TOP_KEYS)
    name = top.get("name", str, path.parent.name or path.stem)
    loss = top.choice("loss", LOSSES)
    graph = None
    if top.has("network"):
        for key in ("layers", "init"):
            if top.has(key):
                top.fail(key, "not used together with network: the graph gives the layers and their weights")
        from stepper.formats.onnx_setup import graph_categories, graph_network

        graph = graph_network(top, path, loss)
    input_shape = None
    if data is None:
        data_keys = Keys(label, "data", top.get("data", dict), DATA_KEYS)
        first = top.table.get("layers")
        categories = category_columns(first[0] if isinstance(first, list) and first else None) if graph is None \
            else graph_categories(graph[0])
        data = load_data(path, data_keys, categories)
        input_shape = _input_shape(data_keys, len(data.input_names))
        if graph is not None and input_shape is not None and input_shape != graph[0].input_shape:
            data_keys.fail("input_shape", f"{list(input_shape)}, but the graph's input takes samples of shape "
                                          f"{list(graph[0].input_shape or ())}; leave input_shape out (the graph "
                                          "gives it)")
    elif top.has("data"):
        top.fail("data", "not used when the data come as arrays")
    origin: WeightOrigin | None
    if graph is not None:
        network, theta0, origin = graph
        digest = hashlib.sha256(raw + (graph[2].graph or b"")).hexdigest()
    else:
        network, theta0, origin = _described_network(label, top, path, data, loss, input_shape)
        digest = hashlib.sha256(raw).hexdigest()
    data = fit_data(top, network, data)
    network.l2, descent = _training(label, top)
    return Setup(path, name, network, theta0, data, digest, origin, descent=descent)


def _described_network(label: str, top: Keys, path: Path, data: Dataset, loss: str,
                       input_shape: tuple[int, ...] | None = None) -> tuple[Network, Array, WeightOrigin | None]:
    """The network that ``[[layers]]`` describe, and its starting values.

    ``input_shape`` is how ``[data].input_shape`` reads each row (flat when None).
    """
    layer_list = top.get("layers", list)
    if not layer_list:
        top.fail("layers", "expected at least one [[layers]] table")
    torch = _torch_state(label, top, len(layer_list))
    layers: list[Layer] = []
    inline: list[tuple[int, Keys]] = []
    shape = input_shape or (len(data.input_names),)
    n_params = 0
    for i, entry in enumerate(layer_list):
        keys = Keys(label, f"layers[{i}]", entry, set(entry) if isinstance(entry, dict) else set())
        kind = keys.choice("type", TYPES, "dense")
        if torch is None:
            layer = build_layer(keys, kind, i, shape, path, data.input_names)
        else:
            layer = _torch_dense(keys, kind, i, shape, torch.linears[i])
        n_params += sum(math.prod(spec.shape) for spec in layer.param_specs())
        if n_params > MAX_PARAMETERS:
            keys.fail(next((k for k in ("units", "channels", "categories") if keys.has(k)), ""),
                      f"the network would have {n_params:,} parameters up to this layer; "
                      f"Stepper handles at most {MAX_PARAMETERS:,}")
        layers.append(layer)
        if keys.has("weights") or keys.has("biases"):
            inline.append((i, keys))
        shape = layer.out_shape if is_builtin(layer) else (layer.n_out,)  # type: ignore[attr-defined]
    _check_output_pair(top, loss, layers)
    network = Network(len(data.input_names), layers, loss, input_shape=input_shape)
    theta0, origin = _initial_values(label, top, network, inline, torch)
    return network, theta0, origin


def _training(label: str, top: Keys) -> tuple[float, Descent]:
    """The L2 strength and the other settings of ``[training]`` (defaults without the table)."""
    if not top.has("training"):
        return 0.0, Descent()
    keys = Keys(label, "training", top.get("training", dict), TRAINING_KEYS)
    values = {}
    for key in ("l2", "weight_decay", "clip_norm"):
        value = keys.get(key, float, None)
        if value is not None and not (math.isfinite(value) and (value > 0 if key == "clip_norm" else value >= 0)):
            keys.fail(key, f"{value} must be a {'positive number' if key == 'clip_norm' else 'number, 0 or more'}")
        values[key] = value
    schedule = CONSTANT
    if keys.has("schedule"):
        try:
            schedule = schedule_from_dict(keys.get("schedule", dict))
        except ScheduleError as exc:
            keys.fail("schedule", str(exc))
    return values["l2"] or 0.0, Descent(values["weight_decay"] or 0.0, values["clip_norm"], schedule)
#: The output activation each cross-entropy is computed with, from the pre-activations.
CROSS_ENTROPY_OUTPUT = {"binary_cross_entropy": "sigmoid", "categorical_cross_entropy": "softmax"}


def _check_output_pair(top: Keys, loss: str, layers: list[Layer]) -> None:
    """A cross-entropy needs its own output activation (computed exactly from Z); any other is refused.

    Any other dense output would need its probabilities clipped away from 0 and
    1 before the logarithm, which silently flattens the cost and zeroes the
    slopes of confidently wrong rows.
    """
    wanted = CROSS_ENTROPY_OUTPUT.get(loss)
    last = layers[-1]
    if wanted is None or not isinstance(last, (Dense, ActivationLayer)) or last.activation.name == wanted:
        return
    if isinstance(last, ActivationLayer) and wanted == "softmax":
        top.fail("loss", f"{loss} needs a softmax output, but layers[{len(layers) - 1}] is an activation layer "
                         f"({last.activation.name}); softmax couples a row's units, so it belongs to a dense "
                         "output layer: end with a dense layer with activation = \"softmax\"")
    other = {v: k for k, v in CROSS_ENTROPY_OUTPUT.items()}.get(last.activation.name)
    hint = f", or keep {last.activation.name} with loss = \"{other}\"" if other else ""
    top.fail("loss", f"{loss} needs a {wanted} output layer, but layers[{len(layers) - 1}] uses "
                     f"{last.activation.name} (Stepper computes {loss} exactly from the {wanted} layer's "
                     f"inputs; with another output it would clip probabilities and report zero slopes "
                     f"for confidently wrong rows). Use activation = \"{wanted}\" there{hint}")


def declared_code(path: Path) -> list[Path]:
    """The Python files a model file's custom layers name, WITHOUT running any of them.

    For ``stepper replay``, which must say which code will run before it runs
    it. A model file that cannot be read gives an empty list (loading it will
    then say what is wrong).
    """
    try:
        doc = tomllib.loads(read_limited(path, MODEL_FILE_LIMIT, ModelFileError).decode("utf-8-sig"))
    except (ModelFileError, UnicodeDecodeError, tomllib.TOMLDecodeError, RecursionError):
        return []
    layers = doc.get("layers")
    out: list[Path] = []
    for entry in layers if isinstance(layers, list) else []:
        if isinstance(entry, dict) and entry.get("type") == "custom" and isinstance(entry.get("file"), str):
            name = entry["file"]
            out.append(Path(name) if Path(name).is_absolute() else path.parent / name)
    return out


def _torch_state(label: str, top: Keys, n_layers: int) -> TorchState | None:
    """The state_dict's Linear layers when ``[init] layout = "torch"``, one per ``[[layers]]`` table."""
    table = top.table.get("init")
    if not (isinstance(table, dict) and table.get("layout") == "torch"):
        return None
    from stepper.formats.weights_import import read_torch_layout

    init = Keys(label, "init", table, INIT_KEYS)
    torch = read_torch_layout(label, init)
    if len(torch.linears) != n_layers:
        names = ", ".join(linear.weight for linear in torch.linears)
        top.fail("layers", f"{n_layers} [[layers]] tables, but {torch.path} holds {len(torch.linears)} Linear "
                           f"layers ({names}); layout = \"torch\" maps them one to one, in order")
    return torch


def _torch_dense(keys: Keys, kind: str, index: int, shape: tuple[int, ...], linear: TorchLinear) -> Layer:
    """A dense layer whose units and bias come from a state_dict's Linear layer (``layout = "torch"``)."""
    if kind != "dense":
        keys.fail("type", "layout = \"torch\" maps Linear layers to dense layers only")
    check_keys(keys, kind)
    need_flat(keys, kind, shape, index)
    units, bias = _torch_shape(keys, shape[0], linear)
    if units < 1:
        keys.fail("units", f"{units} is not a positive number of units")
    activation = keys.choice("activation", ACTIVATIONS)
    return Dense(shape[0], units, ACTIVATIONS[activation], bias)


def _input_shape(keys: Keys, n_inputs: int) -> tuple[int, ...] | None:
    """``[data].input_shape`` checked against the number of input columns; None when not given."""
    if not keys.has("input_shape"):
        return None
    value = keys.get("input_shape", list)
    if not 1 <= len(value) <= 3 or not all(isinstance(v, int) and not isinstance(v, bool) and v >= 1
                                           for v in value):
        keys.fail("input_shape", "expected 1 to 3 positive whole numbers: [channels, length] for signals, "
                                 "[channels, height, width] for images")
    if math.prod(value) != n_inputs:
        keys.fail("input_shape", f"{value} holds {math.prod(value)} values per row, but [data].inputs names "
                                 f"{n_inputs} column(s); the two must match")
    return tuple(value)


def _torch_shape(keys: Keys, n_in: int, linear: TorchLinear) -> tuple[int, bool]:
    """Units and bias of a dense layer read from its Linear layer's tensors (checked against the keys)."""
    shape = f"tensor '{linear.weight}' has shape {tuple(linear.W.shape)} (PyTorch's Linear stores (out, in))"
    if linear.n_in != n_in:
        keys.fail("", f"{shape}: {linear.n_in} inputs, but the layer gets {n_in}")
    units = keys.get("units", int, linear.n_out)
    if units != linear.n_out:
        keys.fail("units", f"{units}, but {shape}: {linear.n_out} units")
    bias = keys.get("bias", bool, linear.b is not None)
    if bias != (linear.b is not None):
        keys.fail("bias", f"{str(bias).lower()}, but the state_dict "
                          + ("has no" if linear.b is None else "has a") + f" bias for {linear.weight!r}")
    return units, bias


def _initial_values(label: str, top: Keys, network: Network, inline: list[tuple[int, Keys]],
                    torch: TorchState | None = None) -> tuple[Array, WeightOrigin | None]:
    inline_layers = {i for i, _ in inline}
    # Custom layers draw their own starting values (stepper.formats.custom_layer).
    own_values = {i for i, layer in enumerate(network.layers) if not is_builtin(layer)}
    needs_scheme = any(
        block.layer not in inline_layers | own_values and block.fans is not None for block in network.layout.blocks
    )
    theta = np.zeros(network.n_params)
    seed = 0
    imported = False
    origin = None
    if top.has("init"):
        init = Keys(label, "init", top.get("init", dict), INIT_KEYS)
        if init.has("layout") and not init.has("file"):
            init.fail("layout", "only with [init].file: it says how that file names its tensors")
        if init.has("file"):
            from stepper.formats.weights_import import import_weights

            theta, origin = import_weights(label, init, network, torch)
            imported = True
        else:
            scheme = init.choice("scheme", SCHEMES)
            seed = init.seed("seed")
            spread = init.get("range", float, 0.5)
            if not (math.isfinite(spread) and spread > 0):
                init.fail("range", f"{spread} must be a positive number")
            theta = initial_params(network, scheme, seed, spread)
    elif needs_scheme:
        top.fail("init", "missing: give [init] scheme and seed, or inline weights for every layer")
    else:
        fill_constants(network, theta)
    if own_values and not imported:
        from stepper.formats.custom_layer import fill_initial_values

        fill_initial_values(network, theta, seed)
    for index, keys in inline:
        _apply_inline(keys, network, index, theta)
    return theta, origin


def _apply_inline(keys: Keys, network: Network, index: int, theta: Array) -> None:
    views = network.views(theta)[index]
    for key, array_key in (("weights", "W"), ("biases", "b")):
        if not keys.has(key):
            continue
        if array_key not in views:
            keys.fail(key, "this layer has bias = false, so it takes no biases")
        target = views[array_key]
        value = keys.get(key, list)
        rows = value if key == "weights" else [value]
        numbers = all(
            isinstance(row, list)
            and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in row)
            for row in rows
        )
        try:
            if not numbers:
                raise TypeError
            array = np.array(value, dtype=np.float64)
        except (TypeError, ValueError):
            keys.fail(key, "expected numbers (a list of rows for weights, a list for biases)")
            raise
        if array.shape != target.shape:
            want = "x".join(str(s) for s in target.shape)
            got = "x".join(str(s) for s in array.shape) or "a single number"
            keys.fail(key, f"shape {got} does not fit the layer, which needs {want} (inputs x units)"
                      if key == "weights" else f"has {got} entries, the layer needs {want}")
        if not np.all(np.isfinite(array)):
            keys.fail(key, "contains a value that is not a finite number")
        target[...] = array
