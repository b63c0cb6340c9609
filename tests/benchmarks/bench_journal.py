"""Journal overhead per step and checkpoint load time with a long cost history.

Reference runs are in the same process on the same data, interleaved, medians:

- steps with a journal against the same steps without one (bakery-demand, full batch);
- loading a checkpoint whose history holds 10 million entries against loading the same
  checkpoint with a history of one entry (the weights and state alone).

    .venv/bin/python tests/benchmarks/bench_journal.py
"""

from __future__ import annotations

import os
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from stepper.formats.model_file import load_setup  # noqa: E402
from stepper.formats.saved_state import CostHistory  # noqa: E402
from stepper.session import Session  # noqa: E402

MODEL = Path(__file__).resolve().parents[2] / "scenarios" / "bakery-demand" / "model.toml"


def timed(fn) -> float:  # type: ignore[no-untyped-def]
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def cpu(fn) -> float:  # type: ignore[no-untyped-def]
    """CPU seconds of this process (less sensitive than wall time to a busy shared machine)."""
    start = time.process_time()
    fn()
    return time.process_time() - start


def journal_overhead(folder: Path, steps: int = 2000, rounds: int = 7) -> None:
    setup = load_setup(MODEL)
    plain, journaled = [], []
    for r in range(rounds):
        a = Session(setup, rate=0.01)
        plain.append(timed(lambda: a.step(steps)))
        b = Session(setup, rate=0.01, journal=folder / f"j{r}.jsonl")
        journaled.append(timed(lambda: b.step(steps)))
        b.close()
    p, j = statistics.median(plain), statistics.median(journaled)
    lines = sum(1 for _ in open(folder / "j0.jsonl")) - 1
    print(f"steps: {steps}, rounds: {rounds}")
    print(f"  per step without a journal: {1e6 * p / steps:8.2f} us (median)")
    print(f"  per step with a journal:    {1e6 * j / steps:8.2f} us (median); ratio {j / p:.3f}")
    print(f"  journal lines for {steps} steps: {lines}")


def long_history(folder: Path, n: int = 10_000_000, rounds: int = 3) -> None:
    setup = load_setup(MODEL)
    s = Session(setup, rate=0.01)
    s.step(3)
    short = s.save_checkpoint(folder / "short.safetensors")
    rng = np.random.default_rng(0)
    extra = CostHistory(np.arange(4, 4 + n, dtype=np.int64), rng.random(n), rng.random(n),
                        np.full(n, 0.01), np.zeros(n, dtype=np.uint8))
    s.history.extend(extra)
    save_time = timed(lambda: s.save_checkpoint(folder / "long.safetensors"))
    size = (folder / "long.safetensors").stat().st_size
    loads_long, loads_short, cpu_long = [], [], []
    for _ in range(rounds):
        t = Session(setup)
        loads_long.append(timed(lambda: t.load_checkpoint(folder / "long.safetensors")))
        assert len(t.history) == n + 4
        t2 = Session(setup)
        cpu_long.append(cpu(lambda: t2.load_checkpoint(folder / "long.safetensors")))
        u = Session(setup)
        loads_short.append(timed(lambda: u.load_checkpoint(short)))
    print(f"history of {n:,} entries: checkpoint {size / 1e6:.0f} MB, saved in {save_time:.2f} s")
    print(f"  load: {statistics.median(loads_long):.3f} s wall, {statistics.median(cpu_long):.3f} s CPU "
          f"(medians of {rounds}); a one-entry history: {statistics.median(loads_short) * 1000:.1f} ms")


if __name__ == "__main__":
    with tempfile.TemporaryDirectory() as tmp:
        journal_overhead(Path(tmp))
        long_history(Path(tmp))
