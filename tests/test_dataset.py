"""CSV datasets: reading numeric columns, and every way a file can be wrong.

Reference for what a CSV file is: RFC 4180, section 2 (quoted fields, doubled quotes
inside them, CRLF line ends); the rules used are quoted beside each check. Messages name
the file, the line (1-based, the header is line 1) and the column.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stepper.errors import DataFileError, StepperError
from stepper.formats.dataset import build_dataset, read_columns


def write(tmp_path: Path, text: str | bytes, name: str = "d.csv") -> Path:
    path = tmp_path / name
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def message(tmp_path: Path, text: str | bytes, wanted: list[str]) -> str:
    path = write(tmp_path, text)
    with pytest.raises(DataFileError) as info:
        read_columns(path, wanted, label="d.csv")
    return str(info.value)


def test_reads_the_requested_columns_in_order(tmp_path: Path) -> None:
    path = write(tmp_path, "a,b,c\n1,2,3\n4,5.5,-6e-1\n")
    table = read_columns(path, ["c", "a"])
    assert table.header == ("a", "b", "c")
    assert table.columns == ("c", "a")
    assert table.values.dtype == np.float64
    np.testing.assert_array_equal(table.values, [[3.0, 1.0], [-0.6, 4.0]])


def test_csv_conventions(tmp_path: Path) -> None:
    # RFC 4180: CRLF line ends and double-quoted fields; a UTF-8 byte order mark
    # (written by spreadsheet programs) and spaces around cells are tolerated;
    # blank lines, also trailing ones, are skipped.
    path = write(tmp_path, "\ufeff a ,\"b\"\r\n\"1.5\", 2 \r\n\r\n3,\"4\"\r\n\r\n,\r\n".encode("utf-8"))
    table = read_columns(path, ["a", "b"])
    np.testing.assert_array_equal(table.values, [[1.5, 2.0], [3.0, 4.0]])


def test_rfc_4180_quoted_fields(tmp_path: Path) -> None:
    # RFC 4180, section 2, rules 6 and 7: "Fields containing line breaks (CRLF), double
    # quotes, and commas should be enclosed in double-quotes", and "a double-quote
    # appearing inside a field must be escaped by preceding it with another double quote".
    text = '"size, in m","say ""hi""",y\r\n"1.5","2",3\r\n4,"5","6"\r\n'
    path = write(tmp_path, text.encode("utf-8"))
    table = read_columns(path, ["size, in m", 'say "hi"', "y"])
    assert table.header == ("size, in m", 'say "hi"', "y")
    np.testing.assert_array_equal(table.values, [[1.5, 2.0, 3.0], [4.0, 5.0, 6.0]])


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(DataFileError, match=r"^nope\.csv: no such data file$"):
        read_columns(tmp_path / "nope.csv", ["a"], label="nope.csv")


def test_empty_file(tmp_path: Path) -> None:
    assert message(tmp_path, "", ["a"]) == "d.csv: the file is empty (expected a header row, then data rows)"
    assert message(tmp_path, "\n\n", ["a"]) == (
        "d.csv: the file is empty (expected a header row, then data rows)")


def test_header_only(tmp_path: Path) -> None:
    assert message(tmp_path, "a,b\n", ["a"]) == "d.csv: no data rows after the header"


def test_missing_column_lists_the_header(tmp_path: Path) -> None:
    assert message(tmp_path, "a,b\n1,2\n", ["a", "zz", "yy"]) == (
        "d.csv: line 1: no column named 'zz', 'yy' (the header has: a, b)")


def test_duplicate_header(tmp_path: Path) -> None:
    assert message(tmp_path, "a,b,a\n1,2,3\n", ["b"]) == "d.csv: line 1: column 'a' appears twice in the header"


def test_row_of_the_wrong_length(tmp_path: Path) -> None:
    assert message(tmp_path, "a,b\n1,2\n3\n", ["a"]) == "d.csv: line 3: 1 cells, but the header has 2"


@pytest.mark.parametrize("cell", ["abc", "", "1,5", "nan", "NaN", "inf", "-Infinity", "1e999", "0x10"])
def test_cell_that_is_not_a_finite_number(tmp_path: Path, cell: str) -> None:
    text = f'a,b\n1,2\n3,"{cell}"\n'
    assert message(tmp_path, text, ["a", "b"]) == (
        f"d.csv: line 3, column 'b': {cell!r} is not a finite number")


def test_first_bad_cell_is_named(tmp_path: Path) -> None:
    assert message(tmp_path, "a,b,c\n1,2,3\n4,x,y\n5,6,z\n", ["c", "b"]) == (
        "d.csv: line 3, column 'c': 'y' is not a finite number")


def test_unused_columns_may_hold_text(tmp_path: Path) -> None:
    path = write(tmp_path, "name,x\nfirst,1\nsecond,2\n")
    np.testing.assert_array_equal(read_columns(path, ["x"]).values, [[1.0], [2.0]])


def test_not_utf8(tmp_path: Path) -> None:
    text = message(tmp_path, b"a,b\n1,\xff\xfe\n", ["a"])
    assert text.startswith("d.csv: cannot be read as CSV (")


def test_a_folder_is_not_a_csv_file(tmp_path: Path) -> None:
    with pytest.raises(DataFileError, match=r"is a folder, not a data file$"):
        read_columns(tmp_path, ["a"])


def test_a_name_with_a_nul_character(tmp_path: Path) -> None:
    with pytest.raises(StepperError, match=r"cannot be read"):
        read_columns(tmp_path / "a\0b.csv", ["a"])


# -- splitting and standardizing -------------------------------------------------------------


def table_of(tmp_path: Path, n: int) -> tuple[object, np.ndarray]:
    rng = np.random.default_rng(0)
    values = np.column_stack([rng.normal(5.0, 2.0, n), rng.normal(-1.0, 0.1, n), np.full(n, 7.0),
                              rng.normal(size=n)])
    lines = ["u,v,w,y"] + [",".join(repr(float(x)) for x in row) for row in values]
    path = write(tmp_path, "\n".join(lines) + "\n")
    return read_columns(path, ["u", "v", "w", "y"]), values


def test_no_split_no_scaling(tmp_path: Path) -> None:
    table, values = table_of(tmp_path, 10)
    data = build_dataset(table, ["u", "v", "w"], ["y"], False, 0.0, 0, "d.csv")  # type: ignore[arg-type]
    np.testing.assert_array_equal(data.X, values[:, :3])  # repr() round-trips a float exactly
    np.testing.assert_array_equal(data.Y, values[:, 3:])
    assert data.n_train == 10 and data.n_val == 0
    assert data.X_val.shape == (0, 3) and data.Y_val.shape == (0, 1)


def test_validation_split_is_seeded_and_disjoint(tmp_path: Path) -> None:
    table, values = table_of(tmp_path, 40)
    first = build_dataset(table, ["u", "v", "w"], ["y"], False, 0.25, 3, "d.csv")  # type: ignore[arg-type]
    again = build_dataset(table, ["u", "v", "w"], ["y"], False, 0.25, 3, "d.csv")  # type: ignore[arg-type]
    other = build_dataset(table, ["u", "v", "w"], ["y"], False, 0.25, 4, "d.csv")  # type: ignore[arg-type]
    assert first.n_val == 10 and first.n_train == 30
    np.testing.assert_array_equal(first.X_val, again.X_val)
    assert not np.array_equal(first.X_val, other.X_val)
    rows = {tuple(r) for r in np.vstack([first.X, first.X_val])}
    assert rows == {tuple(r) for r in values[:, :3]}


def test_standardize_uses_training_rows_only(tmp_path: Path) -> None:
    table, _ = table_of(tmp_path, 40)
    data = build_dataset(table, ["u", "v", "w"], ["y"], True, 0.25, 3, "d.csv")  # type: ignore[arg-type]
    # z-scores: mean 0 and (population) standard deviation 1 on the training rows.
    np.testing.assert_allclose(data.X[:, :2].mean(axis=0), 0.0, atol=1e-12)
    np.testing.assert_allclose(data.X[:, :2].std(axis=0), 1.0, rtol=1e-12)
    # a constant column keeps scale 1 instead of dividing by zero
    assert data.scale[2] == 1.0 and np.all(data.X[:, 2] == 0.0)
    raw = build_dataset(table, ["u", "v", "w"], ["y"], False, 0.25, 3, "d.csv")  # type: ignore[arg-type]
    np.testing.assert_allclose(data.X_val, (raw.X_val - data.mean) / data.scale, rtol=1e-12)
    np.testing.assert_allclose(data.mean, raw.X.mean(axis=0), rtol=1e-12)


def test_split_that_leaves_no_training_rows(tmp_path: Path) -> None:
    path = write(tmp_path, "a,b\n1,2\n")
    table = read_columns(path, ["a", "b"])
    with pytest.raises(DataFileError, match=r"^d\.csv: 1 rows leave no training rows"):
        build_dataset(table, ["a"], ["b"], False, 0.9, 0, "d.csv")
