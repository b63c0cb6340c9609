"""Timing like with like: interleaved rounds, medians, and the whole distribution printed.

Every benchmark in this folder times Stepper against a reference in the same process on the
same data. On a shared machine the load changes from second to second, so:

- each round runs every job once, in an order that rotates from round to round, so no job
  always runs first (cold) or right after the same neighbour;
- a ratio is taken within each round (reference time / Stepper's time in that round), so
  both sides of a ratio saw about the same load, and the median of those ratios is quoted;
- the distribution (minimum, quartiles, maximum) is printed beside every median.

Not collected by pytest (no ``test_`` prefix); imported by the ``bench_*.py`` scripts.
"""

from __future__ import annotations

import statistics
import time
from typing import Any, Callable


def interleaved(jobs: dict[str, Callable[[], Any]], rounds: int, pause: float = 0.0) -> dict[str, list[float]]:
    """Seconds per call of each job, one call per job per round, the order rotating each round."""
    names = list(jobs)
    times: dict[str, list[float]] = {name: [] for name in names}
    for r in range(rounds):
        for name in names[r % len(names):] + names[: r % len(names)]:
            if pause:
                # Idle BLAS / OpenMP threads of the previous library keep spinning for a while.
                time.sleep(pause)
            start = time.perf_counter()
            jobs[name]()
            times[name].append(time.perf_counter() - start)
    return times


def ratios(reference: list[float], ours: list[float]) -> list[float]:
    """Per-round ratios reference / ours (above 1: ours is faster)."""
    return [r / o for r, o in zip(reference, ours)]


def spread(values: list[float], scale: float = 1.0, unit: str = "", digits: int = 3) -> str:
    """``median M (min A, quartiles Q1-Q3, max B, n rounds)`` of ``values`` times ``scale``."""
    v = sorted(x * scale for x in values)
    if len(v) >= 4:
        q1, _, q3 = statistics.quantiles(v, n=4)
    else:
        q1, q3 = v[0], v[-1]
    f = f"{{:.{digits}g}}"
    return (f"median {f.format(statistics.median(v))}{unit} (min {f.format(v[0])}, quartiles "
            f"{f.format(q1)}-{f.format(q3)}, max {f.format(v[-1])}, {len(v)} rounds)")


def load_note() -> str:
    """The machine's load average, to print beside the figures."""
    try:
        with open("/proc/loadavg", encoding="ascii") as handle:
            one, five, _ = handle.read().split()[:3]
        return f"load average {one} (1 min), {five} (5 min)"
    except OSError:
        return "load average unknown"
