"""Model-file keys of the built-in layers beyond dense: every mistake gets one line and exit code 2.

Each case changes one line of a valid model file and runs ``stepper check``
through ``cli.main``; the command must print exactly ``stepper: <message>`` on
stderr, naming the file and the key (``layers[2].size``) or the CSV line and
column, and exit with 2 (bad input), never a traceback.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from stepper import cli
from stepper.core.layers import BatchNorm, Conv, Dropout, Embedding, Flatten, LayerNorm, Pool
from stepper.formats.model_file import load_setup

WriteModel = Callable[..., Path]
PIXELS = [f"p{i}" for i in range(16)]


def image_data() -> str:
    rng = np.random.default_rng(0)
    rows = [",".join(PIXELS + ["a", "b"])]
    for _ in range(6):
        label = int(rng.integers(0, 2))
        rows.append(",".join(f"{v:.3f}" for v in rng.normal(size=16)) + f",{label},{1 - label}")
    return "\n".join(rows) + "\n"


IMAGE = f"""\
loss = "categorical_cross_entropy"

[data]
file = "data.csv"
inputs = {PIXELS!r}
targets = ["a", "b"]
input_shape = [1, 4, 4]

[init]
scheme = "he_uniform"
seed = 1

[[layers]]
type = "conv2d"
channels = 2
kernel = 3
padding = "same"
activation = "relu"

[[layers]]
type = "batch_norm"
momentum = 0.9

[[layers]]
type = "max_pool"
size = 2

[[layers]]
type = "flatten"

[[layers]]
type = "dropout"
rate = 0.2

[[layers]]
type = "layer_norm"
epsilon = 1e-5

[[layers]]
units = 2
activation = "softmax"
""".replace("'", '"')

SIGNAL = IMAGE.replace("input_shape = [1, 4, 4]", "input_shape = [2, 8]").replace(
    'type = "conv2d"', 'type = "conv1d"').replace('type = "max_pool"', 'type = "avg_pool"')

TABLE_DATA = "kind,size,y\n0,1.5,1\n2,0.5,0\n1,-1,1\n0,2,0\n"
TABLE = """\
loss = "mean_squared_error"

[data]
file = "data.csv"
inputs = ["kind", "size"]
targets = ["y"]
standardize = true

[init]
scheme = "glorot_uniform"
seed = 2

[[layers]]
type = "embedding"
columns = ["kind"]
categories = 3
size = 2

[[layers]]
units = 1
activation = "identity"
"""

IMAGE_MISTAKES = [
    ("channels = 2", "", "layers[0].channels (L1): missing"),
    ("channels = 2", "channels = 0", "layers[0].channels (L1): 0 is not a positive number of channels"),
    ("channels = 2", 'channels = "two"', "layers[0].channels (L1): expected an integer, got the string 'two'"),
    ("kernel = 3", "", "layers[0].kernel (L1): missing"),
    ("kernel = 3", "kernel = 0", "layers[0].kernel (L1): 0 is not positive"),
    ("kernel = 3", "kernel = [3]", "layers[0].kernel (L1): expected a whole number or a list of 2 whole numbers"),
    ("kernel = 3", "kernel = 2.5", "layers[0].kernel (L1): expected an integer, got a number"),
    ('kernel = 3\npadding = "same"', 'kernel = 5\npadding = "valid"',
     "layers[0].kernel (L1): a 5x5 window does not fit the input's 4x4 positions (4x4 with padding)"),
    ("kernel = 3", "kernel = 3\nstride = -1", "layers[0].stride (L1): -1 is not positive"),
    ('padding = "same"', 'padding = "full"',
     "layers[0].padding (L1): 'full' is not \"valid\", \"same\" or a number of zeros from 0 to the kernel size 3"),
    ('padding = "same"', "padding = 4",
     "layers[0].padding (L1): 4 is not \"valid\", \"same\" or a number of zeros from 0 to the kernel size 3"),
    ('activation = "relu"', 'activation = "softmax"',
     "layers[0].activation (L1): unknown 'softmax' (expected one of: identity, sigmoid, tanh, relu, leaky_relu, "
     "softplus)"),
    ('activation = "relu"', 'activation = "relu"\nbias = "yes"',
     "layers[0].bias (L1): expected true or false, got the string 'yes'"),
    ("channels = 2", "channels = 2\nunits = 3",
     "layers[0].units (L1): a conv2d layer does not take this key (it takes: activation, bias, channels, kernel, "
     "padding, stride, type)"),
    ("channels = 2", "channels = 2\nshape = 3",
     "layers[0].shape (L1): unknown key (a conv2d layer takes: activation, bias, channels, kernel, padding, stride, "
     "type)"),
    ("input_shape = [1, 4, 4]\n", "",
     "layers[0].type (L1): a conv2d layer takes rows of shape [channels, height, width], but its input (the data's "
     "rows) has shape 16 (set [data] input_shape, e.g. [1, 8, 8] for 8x8 images of one channel)"),
    ("input_shape = [1, 4, 4]", "input_shape = [1, 4, 5]",
     "data.input_shape: [1, 4, 5] holds 20 values per row, but [data].inputs names 16 column(s); the two must "
     "match"),
    ("input_shape = [1, 4, 4]", "input_shape = [1, 0, 16]",
     "data.input_shape: expected 1 to 3 positive whole numbers: [channels, length] for signals, [channels, "
     "height, width] for images"),
    ('type = "conv2d"', 'type = "conv1d"',
     "layers[0].type (L1): a conv1d layer takes rows of shape [channels, length], but its input (the data's rows) "
     "has shape 1x4x4 (set [data] input_shape, e.g. [1, 8, 8] for 8x8 images of one channel)"),
    ("momentum = 0.9", "momentum = 1.5",
     "layers[1].momentum (L2): 1.5 is outside [0, 1) (the share of the running statistics kept at each step)"),
    ("momentum = 0.9", 'momentum = "fast"', "layers[1].momentum (L2): expected a number, got the string 'fast'"),
    ("momentum = 0.9", "epsilon = 0",
     "layers[1].epsilon (L2): 0.0 must be a positive number (it keeps the division finite)"),
    ("momentum = 0.9", "rate = 0.1",
     "layers[1].rate (L2): a batch_norm layer does not take this key (it takes: epsilon, momentum, type)"),
    ("size = 2", "", "layers[2].size (L3): missing"),
    ("size = 2", "size = 5", "layers[2].size (L3): a 5x5 window does not fit the input's 4x4 positions (4x4 with "
                             "padding)"),
    ("size = 2", "size = 2\nstride = 0", "layers[2].stride (L3): 0 is not positive"),
    ("size = 2", "size = [2, 2, 2]", "layers[2].size (L3): expected a whole number or a list of 2 whole numbers"),
    ("size = 2", "size = 2\npadding = 1",
     "layers[2].padding (L3): a max_pool layer does not take this key (it takes: size, stride, type)"),
    ('type = "flatten"', 'type = "flatten"\nsize = 3',
     "layers[3].size (L4): a flatten layer does not take this key (it takes: type)"),
    ('[[layers]]\ntype = "flatten"\n', "",
     "layers[5] (L6): a dense layer takes flat rows, but its input (L5's output) has shape 2x2x2; put a layer "
     "with type = \"flatten\" before it"),
    ("rate = 0.2", "", "layers[4].rate (L5): missing"),
    ("rate = 0.2", "rate = 1.0", "layers[4].rate (L5): 1.0 is outside [0, 1) (the share of entries dropped)"),
    ("rate = 0.2", "rate = -0.1", "layers[4].rate (L5): -0.1 is outside [0, 1) (the share of entries dropped)"),
    ("rate = 0.2", 'rate = "half"', "layers[4].rate (L5): expected a number, got the string 'half'"),
    ("rate = 0.2", "rate = 0.2\nseed = -1", "layers[4].seed (L5): -1 is negative (a seed is a whole number, 0 or more)"),
    ("epsilon = 1e-5", "epsilon = -1.0",
     "layers[5].epsilon (L6): -1.0 must be a positive number (it keeps the division finite)"),
    ("epsilon = 1e-5", "epsilon = nan", "layers[5].epsilon (L6): nan must be a positive number (it keeps the division "
                                        "finite)"),
    ("epsilon = 1e-5", "momentum = 0.5",
     "layers[5].momentum (L6): a layer_norm layer does not take this key (it takes: epsilon, type)"),
    ("epsilon = 1e-5", 'epsilon = "small"', "layers[5].epsilon (L6): expected a number, got the string 'small'"),
    ('type = "conv2d"', 'type = "conv3d"',
     "layers[0].type (L1): unknown 'conv3d' (expected one of: dense, conv1d, conv2d, max_pool, avg_pool, flatten, "
     "dropout, layer_norm, batch_norm, embedding, activation, custom)"),
    ('type = "conv2d"', "type = 3", "layers[0].type (L1): expected a string, got an integer"),
    ("kernel = 3", "kernel = [3, 0]", "layers[0].kernel (L1): [3, 0] is not positive"),
    ('padding = "same"', "padding = [1, 2]",
     "layers[0].padding (L1): [1, 2] is not \"valid\", \"same\" or a number of zeros from 0 to the kernel size 3"),
    ("channels = 2", "channels = 2000000",
     "layers[0].channels (L1): the network would have 20,000,000 parameters up to this layer; Stepper handles at "
     "most 10,000,000"),
    ("rate = 0.2", "rate = inf", "layers[4].rate (L5): inf is outside [0, 1) (the share of entries dropped)"),
    ("rate = 0.2", "rate = 0.2\nseed = 1.5", "layers[4].seed (L5): expected an integer, got a number"),
]


def check_error(write_model: WriteModel, capsys: pytest.CaptureFixture[str], text: str, data: str) -> str:
    path = write_model(text, data)
    code = cli.main(["check", str(path)])
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.endswith("\n") and err.count("\n") == 1, err
    return err.replace(str(path.parent / "data.csv"), "data.csv").replace(str(path), "model.toml")


def test_the_base_files_are_valid(write_model: WriteModel) -> None:
    setup = load_setup(write_model(IMAGE, image_data()))
    kinds = [type(layer) for layer in setup.network.layers]
    assert kinds[:6] == [Conv, BatchNorm, Pool, Flatten, Dropout, LayerNorm]
    assert setup.network.input_shape == (1, 4, 4)
    signal = load_setup(write_model(SIGNAL, image_data()))
    assert signal.network.layers[0].label == "conv1d 2x8->2x8 relu"
    assert signal.network.layers[2].label == "avg_pool 2x8->2x4"
    table = load_setup(write_model(TABLE, TABLE_DATA))
    assert isinstance(table.network.layers[0], Embedding)
    # The category column is not standardized; the other one is.
    np.testing.assert_array_equal(table.data.X[:, 0], [0, 2, 1, 0])
    assert abs(table.data.X[:, 1].mean()) < 1e-12


SIGNAL_MISTAKES = [
    ("kernel = 3", "kernel = [3, 3]", "layers[0].kernel (L1): expected a whole number or a list of 1 whole numbers"),
    ("input_shape = [2, 8]", "input_shape = [16]",
     "layers[0].type (L1): a conv1d layer takes rows of shape [channels, length], but its input (the data's rows) has "
     "shape 16 (set [data] input_shape, e.g. [1, 8, 8] for 8x8 images of one channel)"),
    ("size = 2", "size = 9", "layers[2].size (L3): a 9 window does not fit the input's 8 positions (8 with padding)"),
    ("size = 2", 'size = 2\nstride = "2"', "layers[2].stride (L3): expected an integer, got the string '2'"),
]

TABLE_MISTAKES = [
    ('columns = ["kind"]', "", "layers[0].columns (L1): missing"),
    ('columns = ["kind"]', 'columns = ["colour"]',
     "layers[0].columns (L1): 'colour' is not one of [data].inputs (kind, size)"),
    ('columns = ["kind"]', 'columns = ["kind", "kind"]', "layers[0].columns (L1): column(s) 'kind' named more than once"),
    ('columns = ["kind"]', "columns = []", "layers[0].columns (L1): expected a non-empty list of column names"),
    ("categories = 3", "categories = 0", "layers[0].categories (L1): 0 is not a positive whole number"),
    ("categories = 3", "categories = 2000000",
     "layers[0].categories (L1): 2,000,000 is more than the 1,000,000 Stepper handles"),
    ("size = 2", "", "layers[0].size (L1): missing"),
    ("size = 2", "size = 2.5", "layers[0].size (L1): expected an integer, got a number"),
    ("size = 2", "size = 0", "layers[0].size (L1): 0 is not a positive whole number"),
    ('columns = ["kind"]', 'columns = "kind"', "layers[0].columns (L1): expected a list, got the string 'kind'"),
    ("categories = 3", "categories = true", "layers[0].categories (L1): expected an integer, got a boolean"),
    ("size = 2", "size = 2\nunits = 4",
     "layers[0].units (L1): an embedding layer does not take this key (it takes: categories, columns, size, type)"),
]

ALL = ([(IMAGE, "image", *m) for m in IMAGE_MISTAKES] + [(SIGNAL, "image", *m) for m in SIGNAL_MISTAKES]
       + [(TABLE, "table", *m) for m in TABLE_MISTAKES])


@pytest.mark.parametrize("base,data,old,new,expected", ALL, ids=[f"{d}-{e.split(':')[0]}-{i}"
                                                                 for i, (_, d, _, _, e) in enumerate(ALL)])
def test_every_mistake_is_one_line_and_exit_2(write_model: WriteModel, capsys: pytest.CaptureFixture[str],
                                              base: str, data: str, old: str, new: str, expected: str) -> None:
    assert old in base
    rows = image_data() if data == "image" else TABLE_DATA
    assert check_error(write_model, capsys, base.replace(old, new, 1), rows) == f"stepper: model.toml: {expected}\n"


def test_an_embedding_must_come_first(write_model: WriteModel, capsys: pytest.CaptureFixture[str]) -> None:
    text = TABLE.replace('[[layers]]\ntype = "embedding"', '[[layers]]\nunits = 2\nactivation = "tanh"\n\n'
                         '[[layers]]\ntype = "embedding"')
    assert check_error(write_model, capsys, text, TABLE_DATA) == (
        "stepper: model.toml: layers[1].type (L2): an embedding reads category columns of the data, so it must be "
        "the first layer\n")


@pytest.mark.parametrize("cell,shown", [("3", "3"), ("1.5", "1.5"), ("-1", "-1")])
def test_a_category_cell_out_of_range_is_named(write_model: WriteModel, capsys: pytest.CaptureFixture[str],
                                               cell: str, shown: str) -> None:
    data = TABLE_DATA.replace("\n1,-1,1\n", f"\n{cell},-1,1\n")
    assert check_error(write_model, capsys, TABLE, data) == (
        f"stepper: data.csv: line 4, column 'kind': {shown} is not a category number of the embedding in "
        "layers[0] (expected a whole number from 0 to 2)\n")
