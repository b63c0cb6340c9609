"""The check's rows formatted a chunk at a time: the same text and JSON as one row at a time.

References: Python's own number formatting (``format``) for the table, one cell at a
time as ``stepper check`` wrote it before; the standard library's ``json`` module for
the document, built as one object in memory and read back.
"""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from stepper.commands import check_rows
from stepper.commands.check_rows import (WeightRows, dump_document, mark, name_width, source_names_at,
                                         write_table_rows)
from stepper.core.activations import ACTIVATIONS
from stepper.core.gradcheck import CheckResult
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.formats.weight_sources import TensorSource, WeightOrigin

SPECIAL = [np.nan, np.inf, -np.inf, -0.0, 0.0, 1e-300, -1e300, 5e-324, 123456.789, -9.99995e-5, 1.0]


def model_and_result(seed: int = 0) -> tuple[Network, np.ndarray, CheckResult]:
    tanh = ACTIVATIONS["tanh"]
    net = Network(12, [Dense(12, 9, tanh), Dense(9, 2, ACTIVATIONS["identity"])], "mean_squared_error")
    rng = np.random.default_rng(seed)
    n = net.n_params
    columns = [rng.normal(size=n) * 10.0 ** rng.integers(-12, 12, size=n) for _ in range(4)]
    for column in columns:
        spots = rng.choice(n, size=len(SPECIAL), replace=False)
        column[spots] = SPECIAL
    theta, analytic, numeric, rel = columns
    verdict = rng.choice(np.array(["agree", "doubtful", "disagree", "kink", ""]), size=n)
    return net, theta, CheckResult(0.25, analytic, numeric, rel, verdict, "central", 6e-6)


def one_row(name: str, width: int, value: float, analytic: float, numeric: float, rel: float,
            verdict: str) -> str:
    """A row as the table wrote it one cell at a time (stepper/commands/common.py's ``fmt``)."""

    def number(v: float) -> str:
        return "-".rjust(12) if v != v else f"{v: .4e}".rjust(12)

    rel_text = "-" if rel != rel else f"{rel:.2e}"
    return (f"{name.ljust(width)}  {number(value)}  {number(analytic)}  {number(numeric)}  "
            f"{rel_text:>10}  {mark(verdict)}")


@pytest.mark.parametrize("chunk", [7, 16384])
def test_table_rows_read_as_one_row_at_a_time(monkeypatch: pytest.MonkeyPatch, chunk: int) -> None:
    monkeypatch.setattr(check_rows, "CHUNK", chunk)
    net, theta, result = model_and_result()
    rows = np.random.default_rng(1).permutation(net.n_params)
    width = name_width(net.layout, rows)
    assert width == max(len(name) for name in net.layout.names)
    out = io.StringIO()
    write_table_rows(out, net.layout, theta, result, rows, width)
    names = net.layout.names
    expected = [one_row(names[i], width, theta[i], result.analytic[i], result.numeric[i], result.rel_error[i],
                        str(result.verdict[i])) for i in rows]
    assert out.getvalue().splitlines() == expected


def one_object(net: Network, theta: np.ndarray, result: CheckResult, i: int) -> dict[str, Any]:
    """A weight's JSON object as the whole document was built before."""
    layout = net.layout
    block = layout.block_of(i)

    def number(v: float) -> float | None:
        return float(v) if np.isfinite(v) else None

    return {"name": layout.names[i], "source": None, "layer": block.layer + 1, "kind": block.kind,
            "indices": list(layout.indices(i)), "value": number(theta[i]), "analytic": number(result.analytic[i]),
            "numeric": number(result.numeric[i]), "relative_error": number(result.rel_error[i]),
            "verdict": str(result.verdict[i])}


@pytest.mark.parametrize("chunk", [5, 16384])
def test_streamed_document_reads_back_as_built_in_memory(monkeypatch: pytest.MonkeyPatch, chunk: int) -> None:
    monkeypatch.setattr(check_rows, "CHUNK", chunk)
    net, theta, result = model_and_result(seed=4)
    rows = np.sort(np.random.default_rng(2).choice(net.n_params, size=80, replace=False))
    doc = {"cost": 0.25, "weights": WeightRows(net.layout, theta, result, rows), "after": [1, {"x": None}]}
    out = io.StringIO()
    dump_document(doc, out)

    def refuse(constant: str) -> None:
        raise AssertionError(f"{constant} is not JSON (RFC 8259)")

    back = json.loads(out.getvalue(), parse_constant=refuse)
    assert back["cost"] == 0.25 and back["after"] == [1, {"x": None}]
    assert back["weights"] == [one_object(net, theta, result, int(i)) for i in rows]
    # Every float reads back bit for bit.
    values = [w["value"] for w in back["weights"]]
    assert [v for v in values if v is not None] == [float(theta[i]) for i in rows if np.isfinite(theta[i])]


def test_empty_list_is_valid_json() -> None:
    net, theta, result = model_and_result()
    for rows_result in (result, None):
        out = io.StringIO()
        dump_document({"weights": WeightRows(net.layout, theta, rows_result, np.empty(0, dtype=np.int64))}, out)
        assert json.loads(out.getvalue()) == {"weights": []}


def test_names_in_the_source_file_as_the_origin_gives_them() -> None:
    # Weights read from another program's file: L1.W stored (out, in) as "fc1.weight", L1.b as (1, out).
    net, theta, result = model_and_result()
    origin = WeightOrigin("safetensors", Path("net.safetensors"), "float32",
                          {"L1.W": TensorSource("fc1.weight", (9, 12), (1, 0)),
                           "L1.b": TensorSource("fc1.bias", (1, 9), (0,))}, "names")
    rows = np.random.default_rng(5).permutation(net.n_params)
    everything = origin.source_names(net.layout)
    assert source_names_at(origin, net.layout, rows) == [everything[i] for i in rows]
    assert source_names_at(origin, net.layout, np.array([1]))[0] == "fc1.weight[1,0]"
    out = io.StringIO()
    write_table_rows(out, net.layout, theta, result, rows[:40], 12, origin)
    for line, i in zip(out.getvalue().splitlines(), rows[:40]):
        source = everything[i]
        assert line.endswith(f"{mark(str(result.verdict[i])):<13}  {source}" if source else mark(str(result.verdict[i])))
    out = io.StringIO()
    dump_document({"weights": WeightRows(net.layout, theta, result, np.sort(rows[:40]), origin)}, out)
    assert [w["source"] for w in json.loads(out.getvalue())["weights"]] == [everything[i] for i in np.sort(rows[:40])]
