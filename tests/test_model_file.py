"""Model files (TOML, https://toml.io/en/v1.0.0): loading, and a message for every mistake.

Every refusal is a ModelFileError or DataFileError whose one-line message names
the file and the key (``layers[0].units``) or the CSV line and column.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from stepper.core.activations import ACTIVATIONS
from stepper.core.init import initial_params
from stepper.core.layers import Dense
from stepper.errors import DataFileError, ModelFileError, StepperError
from stepper.formats.model_file import MAX_PARAMETERS, load_setup

WriteModel = Callable[..., Path]

DATA = "a,b,c,y\n1,2,3,0.5\n2,0,1,0.25\n-1,4,2,1.5\n0,0,0,0\n"

MODEL = """\
name = "test net"
loss = "mean_squared_error"

[data]
file = "data.csv"
inputs = ["a", "b", "c"]
targets = ["y"]

[init]
scheme = "glorot_uniform"
seed = 4

[[layers]]
units = 4
activation = "tanh"

[[layers]]
units = 1
activation = "identity"
"""


def load_error(write_model: WriteModel, text: str, data: str = DATA) -> str:
    path = write_model(text, data)
    with pytest.raises(StepperError) as info:
        load_setup(path)
    assert isinstance(info.value, (ModelFileError, DataFileError))
    message = str(info.value)
    assert "\n" not in message
    return message.replace(str(path), "model.toml").replace(str(path.parent / "data.csv"), "data.csv")


def test_loads_a_valid_file(write_model: WriteModel) -> None:
    path = write_model(MODEL, DATA)
    setup = load_setup(path)
    net = setup.network
    assert setup.name == "test net"
    assert net.loss == "mean_squared_error" and net.n_inputs == 3
    assert [(l.n_in, l.n_out) for l in net.layers] == [(3, 4), (4, 1)]
    assert isinstance(net.layers[0], Dense) and net.layers[0].activation is ACTIVATIONS["tanh"]
    assert net.n_params == 3 * 4 + 4 + 4 * 1 + 1
    np.testing.assert_array_equal(setup.theta0, initial_params(net, "glorot_uniform", 4))
    assert setup.data.X.shape == (4, 3) and setup.data.Y.shape == (4, 1)
    assert setup.data.input_names == ("a", "b", "c") and setup.data.target_names == ("y",)
    # SHA-256 (FIPS 180-4) of the file's bytes, as hashlib computes it.
    assert setup.digest == hashlib.sha256(path.read_bytes()).hexdigest()


def test_name_defaults_to_the_folder(write_model: WriteModel) -> None:
    setup = load_setup(write_model(MODEL.replace('name = "test net"\n', ""), DATA))
    assert setup.name == setup.path.parent.name


def test_inline_values_override_the_scheme(write_model: WriteModel) -> None:
    text = MODEL.replace('activation = "identity"\n',
                         'activation = "identity"\nweights = [[1], [2], [3], [4.5]]\nbiases = [-1]\n')
    setup = load_setup(write_model(text, DATA))
    views = setup.network.views(setup.theta0)
    np.testing.assert_array_equal(views[1]["W"], [[1.0], [2.0], [3.0], [4.5]])
    np.testing.assert_array_equal(views[1]["b"], [-1.0])
    drawn = initial_params(setup.network, "glorot_uniform", 4)
    np.testing.assert_array_equal(views[0]["W"], drawn[:12].reshape(3, 4))


def test_bias_false_and_no_init_with_every_layer_inline(write_model: WriteModel) -> None:
    text = """\
loss = "half_squared_error"
[data]
file = "data.csv"
inputs = ["a", "b", "c"]
targets = ["y"]
[[layers]]
units = 1
activation = "relu"
bias = false
weights = [[0.5], [-1], [2]]
"""
    setup = load_setup(write_model(text, DATA))
    assert setup.network.n_params == 3
    np.testing.assert_array_equal(setup.theta0, [0.5, -1.0, 2.0])


def test_absolute_data_path(write_model: WriteModel, tmp_path: Path) -> None:
    (tmp_path / "elsewhere").mkdir()
    csv = tmp_path / "elsewhere" / "d.csv"
    csv.write_text(DATA, encoding="utf-8")
    setup = load_setup(write_model(MODEL.replace('"data.csv"', f'"{csv.as_posix()}"')))
    assert setup.data.source == str(csv)


# -- mistakes in the file itself --------------------------------------------------------------


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(ModelFileError, match=r"^.*nothing\.toml: no such model file$"):
        load_setup(tmp_path / "nothing.toml")


def test_a_folder(tmp_path: Path) -> None:
    with pytest.raises(ModelFileError, match=r"is a folder, not a model file$"):
        load_setup(tmp_path)


def test_not_utf8(write_model: WriteModel, tmp_path: Path) -> None:
    path = tmp_path / "model.toml"
    path.write_bytes(b'name = "\xff"\n')
    with pytest.raises(ModelFileError, match=r"model\.toml: not UTF-8 text$"):
        load_setup(path)


@pytest.mark.parametrize("text,where", [
    ("loss = \n", "line 1, column 8"),
    ("[data\n", "line 1, column 6"),
    ("a = 1\na = 2\n", "line 2, column 6"),
])
def test_invalid_toml_names_line_and_column(write_model: WriteModel, text: str, where: str) -> None:
    message = load_error(write_model, text)
    assert message.startswith("model.toml: not valid TOML (")
    assert f"(at {where})" in message


def test_nesting_too_deep(write_model: WriteModel) -> None:
    message = load_error(write_model, "a = " + "[" * 3000 + "]" * 3000 + "\n" + MODEL)
    assert message == "model.toml: not valid TOML (arrays or tables nested too deeply)"


# (replace this, with that, expected message after "model.toml: ")
MISTAKES = [
    ('name = "test net"', 'name = "test net"\ncolour = "red"',
     "colour: unknown key (allowed: data, init, layers, loss, name, network, training)"),
    ('name = "test net"', "name = 7", "name: expected a string, got an integer"),
    ('loss = "mean_squared_error"\n', "", "loss: missing"),
    ('"mean_squared_error"', '"hinge"',
     "loss: unknown 'hinge' (expected one of: half_squared_error, mean_squared_error, "
     "binary_cross_entropy, categorical_cross_entropy)"),
    ('"mean_squared_error"', "2", "loss: expected a string, got an integer"),
    ('"mean_squared_error"', "1979-05-27", "loss: expected a string, got a date"),
    ('"mean_squared_error"', "1979-05-27T07:32:00Z", "loss: expected a string, got a date-time"),
    ('"mean_squared_error"', "07:32:00", "loss: expected a string, got a time of day"),
    ('activation = "tanh"', 'activation = "relu6"',
     "layers[0].activation (L1): unknown 'relu6' (expected one of: identity, sigmoid, tanh, relu, leaky_relu, "
     "softplus, softmax)"),
    ('activation = "tanh"', 'activation = "tanh"\nshape = "round"',
     "layers[0].shape (L1): unknown key (a dense layer takes: activation, bias, biases, type, units, weights)"),
    ("units = 4", 'units = "three"', "layers[0].units (L1): expected an integer, got the string 'three'"),
    ("units = 4", "units = 4.0", "layers[0].units (L1): expected an integer, got a number"),
    ("units = 4", "units = true", "layers[0].units (L1): expected an integer, got a boolean"),
    ("units = 4", "units = 0", "layers[0].units (L1): 0 is not a positive number of units"),
    ("units = 4", "", "layers[0].units (L1): missing"),
    ('activation = "tanh"', 'activation = "tanh"\nbias = "yes"',
     "layers[0].bias (L1): expected true or false, got the string 'yes'"),
    ('activation = "tanh"', 'activation = "tanh"\nclass = "Mine"',
     'layers[0].class (L1): only a layer with type = "custom" takes this key'),
    ('activation = "tanh"', 'activation = "tanh"\ntype = "conv"',
     "layers[0].type (L1): unknown 'conv' (expected one of: dense, conv1d, conv2d, max_pool, avg_pool, "
     "flatten, dropout, layer_norm, batch_norm, embedding, activation, custom)"),
    ("units = 1\n", "units = 2\n",
     "layers[1].units (L2): the last layer has 2 units but [data].targets names 1 column(s); they must match; "
     "if 'y' holds class numbers, end with a softmax layer of 2 units and Stepper builds the one-hot targets "
     "from them"),
    ('[data]\nfile = "data.csv"', '[data]\nfile = 3', "data.file: expected a string, got an integer"),
    ('file = "data.csv"', 'file = ""', "data.file: '' is not a file name"),
    ('inputs = ["a", "b", "c"]', "inputs = []", "data.inputs: expected a non-empty list of column names"),
    ('inputs = ["a", "b", "c"]', 'inputs = ["a", 2]', "data.inputs: expected a non-empty list of column names"),
    ('inputs = ["a", "b", "c"]', 'inputs = ["a", "b", "a"]', "data.inputs: column(s) 'a' named more than once"),
    ('targets = ["y"]', 'targets = ["y", "a"]', "data.targets: column(s) a are also inputs"),
    ('targets = ["y"]', 'targets = ["y"]\nvalidation_fraction = 1.0',
     "data.validation_fraction: 1.0 is outside [0, 1)"),
    ('targets = ["y"]', 'targets = ["y"]\nvalidation_fraction = nan',
     "data.validation_fraction: nan is outside [0, 1)"),
    ('targets = ["y"]', 'targets = ["y"]\nvalidation_fraction = 0.5\nseed = -2',
     "data.seed: -2 is negative (a seed is a whole number, 0 or more)"),
    ('targets = ["y"]', 'targets = ["y"]\nstandardize = 1', "data.standardize: expected true or false, got an integer"),
    ("[data]\n", "[data]\nrows = 3\n",
     "data.rows: unknown key (allowed: file, input_shape, inputs, seed, standardize, targets, "
     "validation_column, validation_file, validation_fraction)"),
    ('[init]\nscheme = "glorot_uniform"\nseed = 4\n', "", "init: missing: give [init] scheme and seed, or "
     "inline weights for every layer"),
    ('scheme = "glorot_uniform"', 'scheme = "zeros"',
     "init.scheme: unknown 'zeros' (expected one of: uniform, glorot_uniform, glorot_normal, he_normal, "
     "he_uniform)"),
    ("seed = 4", "seed = -1", "init.seed: -1 is negative (a seed is a whole number, 0 or more)"),
    ("seed = 4", "seed = 4\nrange = 0", "init.range: 0.0 must be a positive number"),
    ("seed = 4", "seed = 4\nrange = inf", "init.range: inf must be a positive number"),
    ("seed = 4", "seed = 4\nrange = nan", "init.range: nan must be a positive number"),
]


@pytest.mark.parametrize("old,new,expected", MISTAKES)
def test_mistake_is_named(write_model: WriteModel, old: str, new: str, expected: str) -> None:
    assert old in MODEL
    assert load_error(write_model, MODEL.replace(old, new, 1)) == f"model.toml: {expected}"


def test_structural_mistakes(write_model: WriteModel) -> None:
    head = MODEL.split("[[layers]]")[0]
    assert load_error(write_model, head) == "model.toml: layers: missing"
    assert load_error(write_model, "layers = []\n" + head) == (
        "model.toml: layers: expected at least one [[layers]] table")
    assert load_error(write_model, "layers = [3]\n" + head) == (
        "model.toml: layers[0] (L1): expected a table, got an integer")
    assert load_error(write_model, 'data = "x.csv"\n' + MODEL.replace("[data]", "[other]")).startswith(
        "model.toml: other: unknown key")


# -- inline values ------------------------------------------------------------------------------

INLINE_MISTAKES = [
    ("weights = [[1, 2, 3, 4], [1, 2, 3, 4]]",
     "layers[0].weights (L1): shape 2x4 does not fit the layer, which needs 3x4 (inputs x units)"),
    ("weights = [[1, 2, 3, 4], [1, 2, 3], [1, 2, 3, 4]]",
     "layers[0].weights (L1): expected numbers (a list of rows for weights, a list for biases)"),
    ("weights = [1, 2, 3, 4]",
     "layers[0].weights (L1): expected numbers (a list of rows for weights, a list for biases)"),
    ('weights = [["1", 2, 3, 4], [1, 2, 3, 4], [1, 2, 3, 4]]',
     "layers[0].weights (L1): expected numbers (a list of rows for weights, a list for biases)"),
    ("weights = [[true, 2, 3, 4], [1, 2, 3, 4], [1, 2, 3, 4]]",
     "layers[0].weights (L1): expected numbers (a list of rows for weights, a list for biases)"),
    ("weights = [[nan, 2, 3, 4], [1, 2, 3, 4], [1, 2, 3, 4]]",
     "layers[0].weights (L1): contains a value that is not a finite number"),
    ("weights = 3", "layers[0].weights (L1): expected a list, got an integer"),
    ("biases = [1, 2, 3]", "layers[0].biases (L1): has 3 entries, the layer needs 4"),
    ("biases = [[1, 2, 3, 4]]",
     "layers[0].biases (L1): expected numbers (a list of rows for weights, a list for biases)"),
    ("biases = [1, 2, 3, inf]", "layers[0].biases (L1): contains a value that is not a finite number"),
    ("bias = false\nbiases = [1, 2, 3, 4]", "layers[0].biases (L1): this layer has bias = false, so it takes no biases"),
]


@pytest.mark.parametrize("line,expected", INLINE_MISTAKES)
def test_inline_value_mistakes(write_model: WriteModel, line: str, expected: str) -> None:
    text = MODEL.replace('activation = "tanh"', f'activation = "tanh"\n{line}', 1)
    assert load_error(write_model, text) == f"model.toml: {expected}"


def test_too_many_parameters(write_model: WriteModel) -> None:
    text = MODEL.replace("units = 4", "units = 30000000")
    assert load_error(write_model, text) == (
        "model.toml: layers[0].units (L1): the network would have 120,000,000 parameters up to this layer; "
        f"Stepper handles at most {MAX_PARAMETERS:,}")


# -- mistakes in the data, found through the model file -------------------------------------------


def test_data_mistakes_name_the_csv_file(write_model: WriteModel) -> None:
    assert load_error(write_model, MODEL, "a,b,y\n1,2,3\n") == (
        "data.csv: line 1: no column named 'c' (the header has: a, b, y)")
    assert load_error(write_model, MODEL, "a,b,c,y\n1,2,x,3\n") == (
        "data.csv: line 2, column 'c': 'x' is not a finite number")
    assert load_error(write_model, MODEL, "") == (
        "data.csv: the file is empty (expected a header row, then data rows)")
    assert load_error(write_model, MODEL.replace("data.csv", "none.csv"), DATA).endswith(
        "none.csv: no such data file")
    assert load_error(write_model, MODEL.replace("data.csv", "x\\u0000.csv"), DATA) == (
        "model.toml: data.file: 'x\\x00.csv' is not a file name")
