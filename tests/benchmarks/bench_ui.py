"""Speed of the app on a model of about 10,000 weights.

Run: /tmp/v/bin/python tests/benchmarks/bench_ui.py   (or any venv's python)

Measures, headless (Textual's run_test) on the same machine and model:

1. key press to updated screen after one step (``s``): from the key event to
   the table's rows and the cost plot both redrawn (goal: median under 100 ms);
2. start-up to first screen, in a fresh interpreter: from the first line of the
   script (imports included) to the table and plot drawn (goal: under 1.5 s);
   also through a real terminal (tmux) when tmux is there;
3. the reference: the stock DataTable filling the same 10,000 rows, and
   updating one column cell by cell, in the same process, against the line-API
   table showing a snapshot and a new one. Both are timed the same way, through
   the pilot's wait for an idle screen, in TABLE_ROUNDS interleaved rounds whose
   order alternates (so neither is always first and cold); the ratio is taken
   within each round and its median printed with the distribution (rounds.py).

BLAS threads matter on a small, busy machine: with OpenBLAS's default of one
thread per core, tiny matrix products can wait for each other when the other
core is taken. The ``stepper`` command therefore runs with one BLAS thread
(stepper/cli.py), and so does this script unless OPENBLAS_NUM_THREADS is set:
run it with OPENBLAS_NUM_THREADS=2 to see the difference.

The model (invented for speed, no meaning): 20 inputs, 400 tanh units, 4
linear outputs, mean squared error, 256 training samples: 10,004 weights.
"""

from __future__ import annotations

import os

# As the stepper command does (stepper/cli.py): one BLAS thread unless the caller chose.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import asyncio  # noqa: E402
import shutil
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path
from typing import Callable

import numpy as np

from rounds import load_note, ratios, spread

N_IN, N_HIDDEN, N_OUT, N_SAMPLES = 20, 400, 4, 320
TABLE_ROUNDS = 6


def write_model(folder: Path) -> Path:
    """A model file and CSV for the 10,004-weight network; returns the model path."""
    rng = np.random.default_rng(5)
    X = rng.normal(size=(N_SAMPLES, N_IN))
    Y = np.tanh(X[:, :N_OUT] * 0.7) + 0.1 * rng.normal(size=(N_SAMPLES, N_OUT))
    inputs = [f"x{i}" for i in range(N_IN)]
    targets = [f"y{i}" for i in range(N_OUT)]
    np.savetxt(folder / "data.csv", np.hstack([X, Y]), delimiter=",", header=",".join(inputs + targets),
               comments="", fmt="%.6f")
    model = folder / "model.toml"
    model.write_text(textwrap.dedent(f"""\
        name = "ten thousand weights"
        loss = "mean_squared_error"
        [data]
        file = "data.csv"
        inputs = {inputs!r}
        targets = {targets!r}
        validation_fraction = 0.2
        seed = 1
        [init]
        scheme = "glorot_uniform"
        seed = 2
        [[layers]]
        units = {N_HIDDEN}
        activation = "tanh"
        [[layers]]
        units = {N_OUT}
        activation = "identity"
        """).replace("'", '"'), encoding="utf-8")
    return model


async def step_latency(model: Path, presses: int = 30) -> list[float]:
    """Milliseconds from pressing ``s`` to the table and the plot redrawn, per press."""
    from stepper.formats.model_file import load_setup
    from stepper.session import Session
    from stepper.ui.app import StepperApp
    from stepper.ui.weights import WeightTable

    session = Session(load_setup(model))
    app = StepperApp(session)
    drawn = {"rows": 0}
    original = WeightTable.render_line

    def counting(self: WeightTable, y: int):  # type: ignore[no-untyped-def]
        if y == 1:
            drawn["rows"] += 1
        return original(self, y)

    WeightTable.render_line = counting  # type: ignore[method-assign]
    times: list[float] = []
    try:
        async with app.run_test(size=(120, 40)) as pilot:
            await pilot.pause()
            for _ in range(presses):
                rows, builds = drawn["rows"], app.plot.builds
                t0 = time.perf_counter()
                await pilot.press("s")
                while drawn["rows"] == rows or app.plot.builds == builds:
                    await asyncio.sleep(0)
                times.append((time.perf_counter() - t0) * 1000)
            assert session.step_count == presses
    finally:
        WeightTable.render_line = original  # type: ignore[method-assign]
    return times


async def table_reference(model: Path) -> dict[str, list[float]]:
    """Stock DataTable against the line-API table on the same 10,004 rows (milliseconds)."""
    from textual.app import App, ComposeResult
    from textual.widgets import DataTable

    from stepper.formats.model_file import load_setup
    from stepper.session import Session
    from stepper.ui.snapshot import take
    from stepper.ui.weights import WeightTable

    session = Session(load_setup(model))
    session.refresh_check()
    snap = take(session)

    class Both(App[None]):
        CSS = "DataTable, WeightTable { height: 1fr; }"

        def compose(self) -> ComposeResult:
            yield DataTable(id="stock")
            yield WeightTable(id="ours")

    out: dict[str, list[float]] = {name: [] for name in ("stock fill", "line-API fill", "stock one column",
                                                         "line-API new snapshot")}
    app = Both()
    async with app.run_test(size=(120, 40)) as pilot:
        stock = app.query_one(DataTable)
        ours = app.query_one(WeightTable)
        table = WeightTable()  # only for its cell formatting
        table.snapshot = snap
        rows = [table.row_cells(i) for i in range(snap.n_params)]
        keys = stock.add_columns("weight", "value", "analytic", "numeric", "rel.err", "verdict", "frozen")

        async def timed(name: str, job: Callable[[], object]) -> None:
            t0 = time.perf_counter()
            job()
            await pilot.pause()
            out[name].append((time.perf_counter() - t0) * 1000)

        def stock_fill() -> None:
            stock.clear()
            stock.add_rows(rows)

        def stock_column() -> None:
            new_values = [f"{v: .3e}" for v in snap.value + 1.0 + len(out["stock one column"])]
            for key, text in zip(list(stock.rows), new_values):
                stock.update_cell(key, keys[1], text)

        def ours_new() -> None:
            ours.show(take(session))

        for r in range(TABLE_ROUNDS):
            pairs = [("stock fill", stock_fill), ("line-API fill", lambda: ours.show(snap))]
            for name, job in pairs if r % 2 == 0 else pairs[::-1]:
                await timed(name, job)
            session.step(1)   # outside the timing: the new weights the new snapshot shows
            pairs = [("stock one column", stock_column), ("line-API new snapshot", ours_new)]
            for name, job in pairs if r % 2 == 0 else pairs[::-1]:
                await timed(name, job)
        assert ours.render_line(1).text.strip()
    return out


STARTUP_CHILD = """
import time
t0 = time.perf_counter()
import asyncio, sys
from stepper.formats.model_file import load_setup
from stepper.session import Session
from stepper.ui.app import StepperApp

async def main():
    app = StepperApp(Session(load_setup(sys.argv[1])))
    async with app.run_test(size=(120, 40)) as pilot:
        while app.plot.builds == 0:
            await pilot.pause()
        print((time.perf_counter() - t0) * 1000)

asyncio.run(main())
"""


def startup_headless(model: Path, runs: int = 3) -> list[float]:
    """Milliseconds from a fresh interpreter's first line to the first full screen, headless."""
    out = []
    for _ in range(runs):
        done = subprocess.run([sys.executable, "-c", STARTUP_CHILD, str(model)], capture_output=True,
                              text=True, check=True)
        out.append(float(done.stdout.strip().splitlines()[-1]))
    return out


def startup_tmux(model: Path, runs: int = 3) -> list[float] | None:
    """Milliseconds from launching ``stepper open`` in an 80x24 tmux pane to the table on screen."""
    if shutil.which("tmux") is None:
        return None
    stepper = Path(sys.executable).parent / "stepper"
    out = []
    for i in range(runs):
        name = f"stepper-bench-{os.getpid()}-{i}"
        t0 = time.perf_counter()
        for attempt in range(5):
            # A tmux server that is shutting down (its last session just ended) refuses new sessions.
            started = subprocess.run(["tmux", "new-session", "-d", "-s", name, "-x", "80", "-y", "24",
                                      f"{stepper} open {model} --log {model.parent / 'open.log'}"],
                                     capture_output=True)
            if started.returncode == 0:
                break
            time.sleep(0.2)
            t0 = time.perf_counter()
        else:
            raise RuntimeError(f"tmux could not start a session: {started.stderr.decode()}")
        try:
            while True:
                screen = subprocess.run(["tmux", "capture-pane", "-p", "-t", name], capture_output=True,
                                        text=True).stdout
                if "L1.W[0,0]" in screen and "train" in screen and "┤" in screen:
                    out.append((time.perf_counter() - t0) * 1000)
                    break
                if time.perf_counter() - t0 > 20:
                    raise RuntimeError("the app did not show its screen within 20 s:\n" + screen)
                time.sleep(0.01)
        finally:
            subprocess.run(["tmux", "kill-session", "-t", name], check=False)
    return out


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        model = write_model(Path(tmp))
        from stepper.formats.model_file import load_setup

        n = load_setup(model).network.n_params
        print(f"model: {n} weights, {N_SAMPLES} rows in the CSV (80% for training); "
              f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}, {os.cpu_count()} cores")

        times = asyncio.run(step_latency(model))
        print(f"key 's' to table and plot redrawn: median {statistics.median(times):.1f} ms, "
              f"max {max(times):.1f} ms over {len(times)} presses (goal: median < 100 ms)")

        ref = asyncio.run(table_reference(model))
        print(f"table, same rows, same process, both through the pilot's wait ({load_note()}):")
        for label, ms in ref.items():
            print(f"  {label:<24} {spread(ms, unit=' ms')}")
        print(f"  stock fill / line-API fill: {spread(ratios(ref['stock fill'], ref['line-API fill']), unit='x')}")
        print(f"  stock one column / line-API new snapshot: "
              f"{spread(ratios(ref['stock one column'], ref['line-API new snapshot']), unit='x')}")

        head = startup_headless(model)
        print(f"start-up to first screen, fresh interpreter, headless: median {statistics.median(head):.0f} ms "
              f"(goal: < 1500 ms)")
        real = startup_tmux(model)
        if real is None:
            print("start-up in a terminal: skipped, tmux is not installed")
        else:
            print(f"start-up in tmux 80x24 (stepper open, until the table and plot show): "
                  f"median {statistics.median(real):.0f} ms")


if __name__ == "__main__":
    main()
