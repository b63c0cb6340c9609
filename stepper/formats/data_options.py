"""The ``[data]`` table of a model file: which CSV, which columns, which rows validate.

Keys (see also :mod:`stepper.formats.model_file`)::

    [data]
    file = "data.csv"                 # relative to the model file
    inputs = ["a", "b"]               # or "*": every column that is not a target
    targets = ["y"]                   # or one column of class numbers 0..k-1 for a
                                      # softmax output of k units (one-hot inside)
    standardize = true                # optional: inputs scaled by the training rows
    validation_fraction = 0.2         # optional: a seeded random share held out
    seed = 7                          #   (seeds that share)
    validation_file = "val.csv"       # optional: the user's own validation rows
    validation_column = "holdout"     # optional: 1 marks a validation row, 0 a training row
    input_shape = [1, 8, 8]           # optional: how convolutions read each row (channels first)

At most one of ``validation_fraction``, ``validation_file`` and
``validation_column`` is given. :func:`fit_data` then fits the data to the
network: widths must match, and a single target column in front of a softmax
output of ``k`` units is read as class numbers.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stepper.core.network import Network
from stepper.errors import DataFileError
from stepper.formats.dataset import Dataset, Table, build_dataset, read_columns

Array = NDArray[np.float64]

DATA_KEYS = {"file", "inputs", "targets", "standardize", "validation_fraction", "seed",
             "validation_file", "validation_column", "input_shape"}


def load_data(model_path: Path, keys: Any, categories: tuple[list[str] | None, int] | None = None) -> Dataset:
    """The dataset that ``[data]`` describes; ``keys`` is its ``toml_keys.Keys``.

    ``categories``: an embedding's category columns (None: every input column,
    as for an ONNX graph's Gather) and category count, if the first layer is
    one; those columns must hold category numbers, and are never standardized.
    """
    csv_path = _file(model_path, keys, "file")
    targets = keys.names("targets")
    column = keys.get("validation_column", str, None)
    if column is not None and column in targets:
        keys.fail("validation_column", f"'{column}' is also a target")
    if keys.get("inputs", object, None) == "*":
        header = read_columns(csv_path, targets, label=str(csv_path)).header
        skip = set(targets) | ({column} if column else set())
        inputs = [name for name in header if name not in skip]
        if not inputs:
            keys.fail("inputs", f"\"*\" finds no column in {csv_path} besides the targets")
    else:
        inputs = keys.names("inputs")
    overlap = sorted(set(inputs) & set(targets))
    if overlap:
        keys.fail("targets", f"column(s) {', '.join(overlap)} are also inputs")
    if column is not None and column in inputs:
        keys.fail("validation_column", f"'{column}' is also an input")
    standardize = keys.get("standardize", bool, False)
    fraction = keys.get("validation_fraction", float, 0.0)
    if not 0.0 <= fraction < 1.0:
        keys.fail("validation_fraction", f"{fraction} is outside [0, 1)")
    seed = keys.seed("seed")
    given = [key for key in ("validation_fraction", "validation_file", "validation_column") if keys.has(key)]
    if len(given) > 1:
        keys.fail(given[1], f"give only one of {', '.join(given)}: each one chooses the validation rows")
    wanted = inputs + targets
    table = read_columns(csv_path, wanted + ([column] if column else []), label=str(csv_path))
    holdout = None
    source = str(csv_path)
    if column is not None:
        marks = table.values[:, -1]
        if not np.all((marks == 0.0) | (marks == 1.0)):
            bad = marks[(marks != 0.0) & (marks != 1.0)][0]
            keys.fail("validation_column", f"column '{column}' of {csv_path} holds {bad:g}; it must hold "
                                           "1 for a validation row and 0 for a training row")
        holdout = marks == 1.0
        if holdout.all():
            keys.fail("validation_column", f"column '{column}' marks every row for validation, leaving none to train on")
        table = Table(table.header, table.values[:, :-1], tuple(wanted))
    elif keys.has("validation_file"):
        val_path = _file(model_path, keys, "validation_file")
        if val_path.resolve() == csv_path.resolve():
            keys.fail("validation_file", "is the training file itself")
        val = read_columns(val_path, wanted, label=str(val_path))
        holdout = np.concatenate([np.zeros(len(table.values), bool), np.ones(len(val.values), bool)])
        table = Table(table.header, np.concatenate([table.values, val.values]), tuple(wanted))
        source = f"{csv_path} (validation rows: {val_path})"
    raw: list[str] = []
    if categories is not None:
        raw = list(inputs) if categories[0] is None else [c for c in categories[0] if c in inputs]
        _check_categories(table, raw, categories[1], source)
    return build_dataset(table, inputs, targets, standardize, fraction, seed, source, holdout, raw)


def _check_categories(table: Table, columns: list[str], count: int, label: str) -> None:
    """Every cell of ``columns`` is a whole number from 0 to ``count - 1``; else a DataFileError naming it."""
    for name in columns:
        values = table.values[:, table.columns.index(name)]
        bad = np.flatnonzero((values != np.round(values)) | (values < 0) | (values >= count))
        if bad.size:
            row = int(bad[0])
            raise DataFileError(f"{label}: line {row + 2}, column '{name}': {values[row]:g} is not a category "
                                f"number of the embedding in layers[0] (expected a whole number from 0 to "
                                f"{count - 1})")


def _file(model_path: Path, keys: Any, key: str) -> Path:
    name = keys.get(key, str)
    if not name.strip() or "\0" in name:
        keys.fail(key, f"{name!r} is not a file name")
    return Path(name) if Path(name).is_absolute() else model_path.parent / name


def fit_data(top: Any, network: Network, data: Dataset) -> Dataset:
    """``data`` checked against the network's widths; class numbers made one-hot for a softmax output.

    ``top`` is the model file's top-level ``toml_keys.Keys``, whose errors name the file.
    """
    graph = top.has("network")
    if len(data.input_names) != network.n_inputs:
        # Only a graph fixes its input width; [[layers]] take the width of the data.
        top.fail("data.inputs", f"names {len(data.input_names)} column(s) "
                                f"({_listed(data.input_names)}) but the network's input takes "
                                f"{network.n_inputs} features; name the input columns "
                                "(inputs = [...] in a model file, --inputs on the command line)")
    n_out, n_targets = network.n_outputs, len(data.target_names)
    if n_out == n_targets:
        return data
    last = network.layers[-1]
    activation = getattr(last, "activation", None)
    if n_targets == 1 and n_out > 1 and activation is not None and activation.name == "softmax":
        return _one_hot(top, data, n_out)
    where = "network" if graph else f"layers[{len(network.layers) - 1}].units"
    what = f"the graph gives {n_out} outputs" if graph else f"the last layer has {n_out} units"
    hint = ""
    if n_targets == 1 and n_out > 1:
        hint = (f"; if '{data.target_names[0]}' holds class numbers, end with a softmax layer of {n_out} units "
                "and Stepper builds the one-hot targets from them")
    top.fail(where, f"{what} but [data].targets names {n_targets} column(s); they must match{hint}")
    raise AssertionError


def _one_hot(top: Any, data: Dataset, n_classes: int) -> Dataset:
    """Targets ``(n, 1)`` of class numbers as one-hot rows ``(n, n_classes)``."""
    name = data.target_names[0]
    labels = np.concatenate([data.Y[:, 0], data.Y_val[:, 0]])
    bad = labels[(labels != np.round(labels)) | (labels < 0) | (labels >= n_classes)]
    if bad.size:
        top.fail("data.targets", f"'{name}' is read as class numbers for the {n_classes} softmax outputs, "
                                 f"so every value must be a whole number from 0 to {n_classes - 1}; "
                                 f"it holds {bad[0]:g}")
    eye = np.eye(n_classes)
    return dataclasses.replace(
        data,
        Y=eye[data.Y[:, 0].astype(np.int64)],
        Y_val=eye[data.Y_val[:, 0].astype(np.int64)].reshape(-1, n_classes),
        target_names=tuple(f"{name}={k}" for k in range(n_classes)),
    )


def _listed(names: tuple[str, ...]) -> str:
    return ", ".join(names) if len(names) <= 6 else ", ".join(names[:5]) + f", ... {len(names) - 5} more"
