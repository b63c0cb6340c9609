"""Property-based tests of the model-file and CSV readers (Hypothesis).

Property: whatever the text of a model file or a CSV file, loading it gives a
Setup or raises a StepperError (one readable message); any other exception is
a crash the user would see as a traceback.
"""

from __future__ import annotations

import csv
import datetime
import io
import json
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis.control import currently_in_test_context
from hypothesis import strategies as st

from stepper.errors import StepperError
from stepper.formats.dataset import read_columns
from stepper.formats.model_file import Setup, load_setup

SETTINGS = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])

VALID_DATA = "a,b,y\n0.5,1,2\n-1,0.25,0\n3,2,1\n"

VALID_MODEL = """\
name = "fuzz"
loss = "mean_squared_error"

[data]
file = "data.csv"
inputs = ["a", "b"]
targets = ["y"]
standardize = true
validation_fraction = 0.3
seed = 1

[init]
scheme = "uniform"
seed = 3
range = 0.4

[[layers]]
units = 3
activation = "relu"
weights = [[0.1, -0.2, 0.3], [0.4, 0.5, -0.6]]
biases = [0.0, 0.1, 0.2]

[[layers]]
units = 1
activation = "identity"
bias = false
"""

# Pieces that make random text look like TOML, and values of every TOML type.
TOML_PIECES = [
    "[", "]", "[[", "]]", "{", "}", "=", " = ", ",", ".", '"', "'", '"""', "\n", " ", "#", "\\",
    "loss", "data", "init", "layers", "name", "file", "inputs", "targets", "units", "activation",
    "bias", "biases", "weights", "scheme", "seed", "range", "standardize", "validation_fraction",
    "type", "class", "options", '"data.csv"', '"relu"', '"softmax"', '"mean_squared_error"',
    '"categorical_cross_entropy"', '"glorot_uniform"', '"custom"', "true", "false", "nan", "inf", "-inf",
    "0", "1", "-1", "2", "0.5", "1e308", "1e400", "-0.0", "9223372036854775807", "-9223372036854775808",
    "1979-05-27", "07:32:00", "1979-05-27T07:32:00Z", '["a", "b"]', '["y"]', "[[1, 2], [3, 4]]", "[]",
    "{}", "\u00e9", "\u0000", "\t", "\r\n",
]

VALUES = st.one_of(
    st.integers(min_value=-(2**63), max_value=2**63 - 1).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(
        lambda x: "nan" if x != x else ("inf" if x == float("inf") else ("-inf" if x == -float("inf") else repr(x)))),
    st.booleans().map(lambda b: "true" if b else "false"),
    st.text(max_size=12).map(lambda s: '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'),
    st.sampled_from(['["a", "b"]', '["y"]', "[]", "[[0.1]]", "[[1, 2, 3], [4, 5, 6]]", "[1, 2, 3]",
                     "{ x = 1 }", '"relu"', '"tanh"', '"softmax"', '"sigmoid"', '"leaky_relu"',
                     '"binary_cross_entropy"', '"half_squared_error"', '"he_normal"', '"data.csv"',
                     '"missing.csv"', '"."', "1979-05-27"]),
)


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("fuzz")


def load(folder: Path, model: str | bytes, data: str | bytes = VALID_DATA) -> None:
    """Write the two files and load them; only a Setup or a StepperError may come out."""
    model_path = folder / "model.toml"
    if isinstance(model, bytes):
        model_path.write_bytes(model)
    else:
        model_path.write_bytes(model.encode("utf-8", "surrogatepass"))
    data_path = folder / "data.csv"
    if isinstance(data, bytes):
        data_path.write_bytes(data)
    else:
        data_path.write_bytes(data.encode("utf-8", "surrogatepass"))
    try:
        setup = load_setup(model_path)
    except StepperError as exc:
        assert str(exc) and "\n" not in str(exc)
        note_stage(stage(str(exc)))
        return
    note_stage("loaded")
    assert isinstance(setup, Setup)
    assert setup.theta0.shape == (setup.network.n_params,)


def note_stage(name: str) -> None:
    if currently_in_test_context():
        event(name)


def stage(message: str) -> str:
    """Where loading stopped, read from the message: for the statistics of how deep examples reach
    (``pytest --hypothesis-show-statistics tests/test_fuzz_readers.py``)."""
    if ": not valid TOML" in message or ": not UTF-8 text" in message:
        return "stopped in the TOML parser"
    if "data.csv: line 1:" in message or "the file is empty" in message or "cannot be read as CSV" in message:
        return "stopped at the CSV header"
    return "reached Stepper's own validation"


def test_the_valid_file_loads(folder: Path) -> None:
    load(folder, VALID_MODEL)
    setup = load_setup(folder / "model.toml")
    assert setup.network.n_params == 2 * 3 + 3 + 3 * 1


@SETTINGS
@given(st.lists(st.sampled_from(TOML_PIECES), max_size=60))
def test_toml_like_text(folder: Path, pieces: list[str]) -> None:
    load(folder, "".join(pieces))


@SETTINGS
@given(st.text(max_size=300))
def test_any_text(folder: Path, text: str) -> None:
    load(folder, text)


@SETTINGS
@given(st.binary(max_size=200))
def test_any_bytes(folder: Path, raw: bytes) -> None:
    load(folder, raw)


def mutate(text: str, edits: list[tuple[int, int, int, str]]) -> str:
    """Apply edits (kind, position, length, payload) to ``text``."""
    for kind, position, length, payload in edits:
        at = position % (len(text) + 1)
        if kind == 0:  # delete a span
            text = text[:at] + text[at + length:]
        elif kind == 1:  # insert a piece
            text = text[:at] + payload + text[at:]
        elif kind == 2:  # replace a span
            text = text[:at] + payload + text[at + length:]
        else:  # replace the value of the line holding `at`
            start = text.rfind("\n", 0, at) + 1
            end = text.find("\n", at)
            end = len(text) if end < 0 else end
            line = text[start:end]
            if " = " in line:
                key = line.split(" = ", 1)[0]
                text = text[:start] + f"{key} = {payload}" + text[end:]
    return text


EDITS = st.lists(
    st.tuples(st.integers(0, 3), st.integers(0, 10_000), st.integers(0, 40),
              st.one_of(VALUES, st.sampled_from(TOML_PIECES))),
    min_size=1, max_size=4,
)


@SETTINGS
@given(EDITS)
def test_mutations_of_a_valid_model_file(folder: Path, edits: list[tuple[int, int, int, str]]) -> None:
    load(folder, mutate(VALID_MODEL, edits))


VALUE_LINES = [i for i, line in enumerate(VALID_MODEL.splitlines()) if " = " in line]


@SETTINGS
@given(st.lists(st.tuples(st.sampled_from(VALUE_LINES), VALUES), min_size=1, max_size=3))
def test_values_swapped_in_a_valid_model_file(folder: Path, swaps: list[tuple[int, str]]) -> None:
    # Keep the file valid TOML more often, so the checks after parsing are reached.
    lines = VALID_MODEL.splitlines()
    for index, value in swaps:
        lines[index] = lines[index].split(" = ", 1)[0] + " = " + value
    load(folder, "\n".join(lines) + "\n")


CSV_ALPHABET = st.sampled_from(list("ab y,.-+e0123456789\"\n\r\t;") + ["nan", "inf", "1e999", "\u00a0", "\x00",
                                                                       "\ufeff", "_", "x"])


@SETTINGS
@given(st.lists(CSV_ALPHABET, max_size=120))
def test_random_csv_through_the_model_file(folder: Path, pieces: list[str]) -> None:
    load(folder, VALID_MODEL, "".join(pieces))


@SETTINGS
@given(st.text(max_size=200), st.lists(st.sampled_from(["a", "b", "y", "", " a", "x"]), min_size=1, max_size=3))
def test_random_csv_read_directly(folder: Path, text: str, wanted: list[str]) -> None:
    path = folder / "direct.csv"
    path.write_bytes(text.encode("utf-8", "surrogatepass"))
    try:
        table = read_columns(path, wanted)
    except StepperError as exc:
        assert str(exc) and "\n" not in str(exc)
        return
    assert table.values.shape[1] == len(wanted)


@SETTINGS
@given(st.lists(st.lists(st.one_of(st.sampled_from(["1", "-2.5", "nan", "", " 3 ", "1e5", "x", '"4"']),
                                   st.floats(allow_nan=False).map(repr)), min_size=0, max_size=4),
                min_size=0, max_size=6))
def test_random_csv_rows(folder: Path, rows: list[list[str]]) -> None:
    text = "a,b,y\n" + "\n".join(",".join(row) for row in rows)
    load(folder, VALID_MODEL, text)


# -- valid TOML and valid CSV headers with random values: examples that reach Stepper's checks ----
#
# Random text mostly stops in the standard library's TOML parser, and random CSV text at the
# header. These properties write files that are valid TOML (and CSV files whose header holds the
# named columns), with random values of every TOML type in the places a model file names, so
# every example gets past the parser and the header and reaches Stepper's own checks.

def toml_value(value: object) -> str:
    """``value`` (str, bool, int, float, date, list or dict) as a TOML value."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if value != value:
            return "nan"
        if value in (float("inf"), float("-inf")):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        # A TOML basic string: JSON's escapes are TOML's, except that DEL must be escaped too.
        return json.dumps(value, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{toml_value(str(k))} = {toml_value(v)}" for k, v in value.items()) + " }"
    if isinstance(value, (datetime.date, datetime.time)):
        return value.isoformat()
    raise TypeError(type(value))


def toml_document(doc: dict[str, Any]) -> str:
    """A model-file document (top-level values, [data], [init], [[layers]]) as TOML text."""
    lines = [f"{toml_value(k)} = {toml_value(v)}" for k, v in doc.items() if k not in ("data", "init", "layers")]
    for table in ("data", "init"):
        if isinstance(doc.get(table), dict):
            lines.append(f"[{table}]")
            lines += [f"{toml_value(k)} = {toml_value(v)}" for k, v in doc[table].items()]
    for layer in doc.get("layers", []):
        lines.append("[[layers]]")
        lines += [f"{toml_value(k)} = {toml_value(v)}" for k, v in layer.items()]
    return "\n".join(lines) + "\n"


SCALARS = st.one_of(
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.integers(min_value=-3, max_value=12),
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=-1.5, max_value=1.5),
    st.booleans(),
    st.text(max_size=10),
    st.sampled_from(["relu", "tanh", "softmax", "sigmoid", "identity", "leaky_relu", "he_normal", "uniform",
                     "glorot_normal", "binary_cross_entropy", "categorical_cross_entropy", "data.csv",
                     "missing.csv", ".", "a", "b", "y", "custom"]),
    st.dates(),
)
TOML_VALUES = st.recursive(SCALARS, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.sampled_from(["x", "units", "file", "a"]), inner, max_size=2)),
    max_leaves=8)

#: Where a model file has values: (table, key); layer keys apply to a random layer.
PLACES = [(None, k) for k in ("name", "loss", "colour")] + [("data", k) for k in (
    "file", "inputs", "targets", "standardize", "validation_fraction", "seed", "sead")] + [
    ("init", k) for k in ("scheme", "seed", "range", "names", "file")] + [
    ("layers", k) for k in ("units", "activation", "bias", "weights", "biases", "type", "options", "width")]


@st.composite
def model_documents(draw: st.DrawFn) -> dict[str, Any]:
    """The valid model's document with a few values replaced, removed or added, and 1 to 3 layers."""
    doc: dict[str, Any] = tomllib.loads(VALID_MODEL)
    n_layers = draw(st.integers(1, 3))
    while len(doc["layers"]) < n_layers:
        doc["layers"].insert(0, {"units": draw(st.integers(1, 4)), "activation": "tanh"})
    doc["layers"] = doc["layers"][-n_layers:]
    for _ in range(draw(st.integers(1, 4))):
        table, key = draw(st.sampled_from(PLACES))
        target = doc if table is None else doc.get(table)
        if table == "layers":
            target = doc["layers"][draw(st.integers(0, len(doc["layers"]) - 1))]
        if not isinstance(target, dict):
            continue
        if draw(st.integers(0, 5)) == 0:
            target.pop(key, None)
        else:
            target[key] = draw(TOML_VALUES)
    return doc


@SETTINGS
@given(model_documents())
def test_valid_toml_with_random_values(folder: Path, doc: dict[str, Any]) -> None:
    text = toml_document(doc)
    assert toml_document(tomllib.loads(text)) == text   # valid TOML, read back as written
    load(folder, text)
    # By construction no example may stop in the TOML parser.
    try:
        load_setup(folder / "model.toml")
    except StepperError as exc:
        assert stage(str(exc)) != "stopped in the TOML parser", str(exc)
        assert str(exc).startswith(str(folder)), str(exc)   # the message names the file


CELLS = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr), st.integers().map(str),
                  st.sampled_from(["", " 1 ", "1e999", "-0", "nan", "x", "1,5", "0x10", "\u00a0"]),
                  st.text(max_size=5))


def as_read(name: str) -> str:
    """A header name as the reader sees it: without surrounding white space, nor a byte-order mark in front.

    A file may start with a byte-order mark (U+FEFF), which the reader drops, so a first name of U+FEFF
    and "0" is read as "0" and could repeat another. The header test draws names in this form, so that
    a, b, y and the extra names stay different as read, wherever a name lands.
    """
    while name and (name[0] == "\ufeff" or name[0].isspace()):
        name = name[1:]
    return name.strip()


@pytest.mark.parametrize("drawn", ["\ufeffa", " \ufeff b ", "\u00a0\ufeffq\t", "\ufeff\ufeffz", "r\ufeff"])
def test_a_header_name_as_drawn_reads_back_unchanged_first_or_last(tmp_path: Path, drawn: str) -> None:
    # The reader drops one byte-order mark at the start of the file, then the white space around each
    # name. A drawn "\ufeffa" (after strip) was read as "a" when it came first and repeated the
    # column a: names in as_read's form read back as they are, wherever they stand.
    name = as_read(drawn)
    assert as_read(name) == name
    for header in (f"{name},y", f"y,{name}"):
        path = tmp_path / "data.csv"
        path.write_text(f"{header}\r\n1,2\r\n", encoding="utf-8")
        assert name in read_columns(path, ["y"]).header


COLUMN_NAMES = st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
                       min_size=1, max_size=6).map(as_read).filter(lambda c: c and c not in ("a", "b", "y"))


@SETTINGS
@given(st.lists(COLUMN_NAMES, max_size=3, unique=True), st.permutations([0, 1, 2, 3, 4, 5]),
       st.lists(st.lists(CELLS, min_size=0, max_size=7), max_size=8))
def test_valid_csv_header_with_random_cells(folder: Path, extra: list[str], order: list[int],
                                            rows: list[list[str]]) -> None:
    # The header always holds a, b and y once each (written by the csv module, so cells with
    # commas, quotes or line breaks are quoted as RFC 4180 asks); the rows are random.
    header = [name for name in [*["a", "b", "y"], *extra]]
    header = [header[i] for i in order if i < len(header)]
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\r\n")   # RFC 4180 line breaks: a CR in a cell gets quoted
    writer.writerow(header)
    writer.writerows(rows)
    load(folder, VALID_MODEL, buffer.getvalue())
    try:
        load_setup(folder / "model.toml")
    except StepperError as exc:
        assert stage(str(exc)) != "stopped at the CSV header", str(exc)
