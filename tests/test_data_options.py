"""The [data] conveniences: inputs = "*", class numbers for a softmax output, the user's own validation rows.

Reference for the one-hot targets: categorical cross-entropy with one-hot
targets is the mean over samples of ``-log p[true class]`` (its definition;
Goodfellow, Bengio & Courville, *Deep Learning*, 2016, section 6.2.2.3,
recalled from memory). The other checks compare against the data as written.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from stepper.errors import DataFileError, ModelFileError
from stepper.formats.model_file import load_setup

WriteModel = Callable[..., Path]

CSV = "a,b,kind,c,holdout\n" + "".join(
    f"{0.1 * i},{1.0 - 0.05 * i},{i % 3},{0.3 * (i % 4)},{int(i % 5 == 0)}\n" for i in range(20)
)

MODEL = """
loss = "categorical_cross_entropy"
[data]
file = "data.csv"
inputs = "*"
targets = ["kind"]
{extra}
[init]
scheme = "glorot_uniform"
seed = 1
[[layers]]
units = 4
activation = "tanh"
[[layers]]
units = 3
activation = "softmax"
"""


def test_star_takes_every_column_but_the_targets_and_the_split_column(write_model: WriteModel) -> None:
    setup = load_setup(write_model(MODEL.format(extra='validation_column = "holdout"'), CSV))
    assert setup.data.input_names == ("a", "b", "c")
    assert setup.network.n_inputs == 3


def test_class_numbers_become_one_hot_targets_for_softmax(write_model: WriteModel) -> None:
    setup = load_setup(write_model(MODEL.format(extra=""), CSV))
    classes = np.array([i % 3 for i in range(20)])
    assert setup.data.target_names == ("kind=0", "kind=1", "kind=2")
    assert np.array_equal(setup.data.Y, np.eye(3)[classes])
    P = setup.network.predict(setup.theta0, setup.data.X)
    expected = -np.mean(np.log(P[np.arange(20), classes]))  # -mean log p[true class]
    assert setup.network.cost(setup.theta0, setup.data.X, setup.data.Y) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("value", ["3", "1.5", "-1"])
def test_a_class_number_out_of_range_is_named(write_model: WriteModel, value: str) -> None:
    csv = CSV.replace("\n0.1,0.95,1,", f"\n0.1,0.95,{value},")
    with pytest.raises(ModelFileError) as info:
        load_setup(write_model(MODEL.format(extra=""), csv))
    assert info.value.message.endswith(
        "data.targets: 'kind' is read as class numbers for the 3 softmax outputs, so every value must be a "
        f"whole number from 0 to 2; it holds {float(value):g}")


def test_a_split_column_marks_the_validation_rows(write_model: WriteModel) -> None:
    setup = load_setup(write_model(MODEL.format(extra='validation_column = "holdout"'), CSV))
    held = [i for i in range(20) if i % 5 == 0]
    assert setup.data.n_val == len(held) and setup.data.n_train == 20 - len(held)
    assert np.allclose(setup.data.X_val[:, 0], [0.1 * i for i in held])


def test_a_validation_file_of_the_users_own(write_model: WriteModel, tmp_path: Path) -> None:
    val = "c,b,a,kind\n" + "".join(f"{0.5},{0.25 * i},{-0.1 * i},{i % 3}\n" for i in range(6))
    (tmp_path / "val.csv").write_text(val, encoding="utf-8")
    setup = load_setup(write_model(MODEL.format(extra='validation_file = "val.csv"').replace(
        'inputs = "*"', 'inputs = ["a", "b", "c"]'), CSV))
    assert (setup.data.n_train, setup.data.n_val) == (20, 6)
    # Columns are matched by name, not position.
    assert np.allclose(setup.data.X_val[:, 0], [-0.1 * i for i in range(6)])
    assert np.array_equal(setup.data.Y_val, np.eye(3)[[i % 3 for i in range(6)]])


def test_standardizing_uses_only_the_training_rows(write_model: WriteModel) -> None:
    setup = load_setup(write_model(MODEL.format(extra='validation_column = "holdout"\nstandardize = true'), CSV))
    train = [i for i in range(20) if i % 5 != 0]
    assert setup.data.mean[0] == pytest.approx(np.mean([0.1 * i for i in train]))


@pytest.mark.parametrize("extra, message", [
    ('validation_column = "holdout"\nvalidation_fraction = 0.2',
     "data.validation_column: give only one of validation_fraction, validation_column: each one chooses "
     "the validation rows"),
    ('validation_column = "kind"', "data.validation_column: 'kind' is also a target"),
    ('validation_column = "c"', "data.validation_column: column 'c' of {csv} holds 0.3; it must hold 1 for a "
                                "validation row and 0 for a training row"),
    ('validation_file = "data.csv"', "data.validation_file: is the training file itself"),
])
def test_data_option_mistakes_are_named(write_model: WriteModel, tmp_path: Path, extra: str, message: str) -> None:
    with pytest.raises(ModelFileError) as info:
        load_setup(write_model(MODEL.format(extra=extra), CSV))
    assert info.value.message == f"{tmp_path / 'model.toml'}: " + message.format(csv=tmp_path / "data.csv")


def test_a_validation_file_missing_a_column(write_model: WriteModel, tmp_path: Path) -> None:
    (tmp_path / "val.csv").write_text("a,b,kind\n1,2,0\n", encoding="utf-8")
    with pytest.raises(DataFileError, match=r"val.csv: line 1: no column named 'c'"):
        load_setup(write_model(MODEL.format(extra='validation_file = "val.csv"'), CSV))
