"""The weight table's ordering, filtering and drawing, without a running app where possible."""

from __future__ import annotations

import asyncio
import dataclasses
import time
from typing import Any

import numpy as np
import pytest
from textual.app import App, ComposeResult

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.formats.model_file import load_setup
from stepper.scenarios import default_model
from stepper.session import Session
from stepper.ui.snapshot import VERDICT_CODE, HistoryArrays, Snapshot, take, verdict_codes
from stepper.ui.weights import COLUMN_KEYS, WeightTable, sort_order, wildcard


@pytest.fixture
def snap() -> Snapshot:
    session = Session(load_setup(default_model()))
    session.refresh_check()
    return take(session)


def test_wildcards_are_only_star_and_question_mark() -> None:
    assert wildcard("L2.W[0,1]").search("L2.W[0,1]")
    assert not wildcard("L2.W[0,1]").search("L2.W0")
    assert wildcard("L1.b[*]").search("L1.b[12]")
    assert not wildcard("L1.b[*]").search("L1.W[0,1]")
    assert wildcard("L?.b[0]").search("L3.b[0]")
    # No wildcard: any name containing the text.
    assert wildcard(".b[").search("L2.b[0]")


def test_sorting_puts_the_largest_first_and_missing_numbers_last(snap: Snapshot) -> None:
    rel = snap.rel_error.copy()
    rel[[3, 7]] = np.nan
    snap = dataclasses.replace(snap, rel_error=rel)
    rows = np.arange(snap.n_params)
    order = sort_order(snap, "rel_error", True, rows)
    assert set(order[-2:].tolist()) == {3, 7}
    assert np.all(np.diff(rel[order[:-2]]) <= 0)
    ascending = sort_order(snap, "rel_error", False, rows)
    assert set(ascending[-2:].tolist()) == {3, 7}
    assert np.all(np.diff(rel[ascending[:-2]]) >= 0)
    by_value = sort_order(snap, "value", True, rows)
    assert np.all(np.diff(np.abs(snap.value[by_value])) <= 0)
    assert np.array_equal(sort_order(snap, "name", False, rows), rows)


def test_sorting_by_verdict_puts_disagreements_first(snap: Snapshot) -> None:
    codes = snap.verdict.copy()
    codes[5] = VERDICT_CODE["disagree"]
    codes[9] = VERDICT_CODE["doubtful"]
    codes[11] = VERDICT_CODE["kink"]
    codes[12] = 0
    order = sort_order(dataclasses.replace(snap, verdict=codes), "verdict", True, np.arange(snap.n_params))
    assert order[:3].tolist() == [5, 9, 11]
    assert order[-1] == 12


def test_verdict_codes_map_every_verdict_and_unknown_to_zero() -> None:
    names = np.array(["agree", "doubtful", "disagree", "kink", "unresolved", ""])
    assert verdict_codes(names).tolist() == [1, 4, 5, 2, 3, 0]


def test_sort_keys_cover_every_column(snap: Snapshot) -> None:
    rows = np.arange(snap.n_params)
    for key in COLUMN_KEYS:
        assert sorted(sort_order(snap, key, True, rows).tolist()) == rows.tolist()


def _big_snapshot(n_hidden: int = 2000) -> Snapshot:
    """A snapshot of an (untrained) 4 -> n_hidden -> 1 network: about 5 * n_hidden weights."""
    base = Session(load_setup(default_model()))
    net = Network(4, [Dense(4, n_hidden, ACTIVATIONS["tanh"]), Dense(n_hidden, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = np.random.default_rng(0).normal(0.0, 0.1, net.n_params)
    setup = dataclasses.replace(base.setup, network=net, theta0=theta)
    return take(Session(setup))


def test_ten_thousand_rows_draw_only_what_is_on_screen() -> None:
    snap = _big_snapshot()
    assert snap.n_params > 10_000

    class Host(App[None]):
        def compose(self) -> ComposeResult:
            yield WeightTable()

    drawn: list[int] = []

    async def main() -> None:
        app = Host()
        async with app.run_test(size=(90, 20)) as pilot:
            table = app.query_one(WeightTable)
            original = table.render_line

            def counting(y: int) -> Any:
                drawn.append(y)
                return original(y)

            table.render_line = counting  # type: ignore[method-assign]
            t0 = time.perf_counter()
            table.show(snap)
            table.set_order("value")
            await pilot.pause()
            elapsed = time.perf_counter() - t0
            assert table.rows.size == snap.n_params
            assert table.virtual_size.height == snap.n_params + 1
            # Only the rows on screen were drawn, however many there are.
            assert 0 < len(set(drawn)) <= 20
            assert elapsed < 1.0
            await pilot.press("end")
            assert table.selected == int(table.rows[-1])
            assert table.render_line(table.size.height - 1).text.startswith(">")

    asyncio.run(main())


def test_rows_show_values_and_verdict_words(snap: Snapshot) -> None:
    table = WeightTable()
    table.snapshot = snap
    cells = table.row_cells(0)
    assert cells[0].strip() == snap.names[0]
    assert float(cells[1]) == pytest.approx(snap.value[0], rel=1e-3)
    assert cells[5].strip() == "agree"
    frozen = dataclasses.replace(snap, frozen=np.ones(snap.n_params, dtype=bool))
    table.snapshot = frozen
    assert table.row_cells(0)[6].strip() == "yes"


def test_history_arrays_follow_steps_undo_redo_and_reset() -> None:
    session = Session(load_setup(default_model()))
    cache = HistoryArrays()

    def fresh() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        h = session.history
        return (np.array([e.step for e in h]), np.array([e.train_cost for e in h]),
                np.array([np.nan if e.val_cost is None else e.val_cost for e in h]))

    def same() -> None:
        for got, want in zip(cache.arrays(session.history), fresh()):
            np.testing.assert_array_equal(got, want)

    same()
    session.step(3)
    same()
    session.undo()
    same()
    session.step(2)
    same()
    session.undo()
    session.redo()
    same()
    session.perturb(0.1)
    session.reset()
    same()
    assert cache.arrays(session.history)[0].size == len(session.history)
