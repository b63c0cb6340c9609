"""Benchmark: a rate range test of 8 rates x 50 steps on a 5k-weight network, against bare descent.

Reference: the same 400 updates written as bare plain descent
(``theta -= rate * slopes`` with the slopes from ``Network.cost_and_slopes``)
plus the 8 final costs, on the same data, in the same process: the least work
any range test of this size can do. The range test adds copies of the state,
the update pipeline (clipping, schedule, decay) and the finite checks. Goal:
under 2 s (issue 13). The test spreads the rates over two threads, as the
``stepper`` command sets them up; the reference runs on one, so on an idle
2-core machine the ratio is below 1. Rounds are interleaved and the medians
quoted.

Run: ``.venv/bin/python tests/benchmarks/bench_ratetest.py``
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the stepper command runs

import statistics  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from stepper.core.activations import ACTIVATIONS  # noqa: E402
from stepper.core.descent import Descent  # noqa: E402
from stepper.core.init import initial_params  # noqa: E402
from stepper.core.layers import Dense  # noqa: E402
from stepper.core.network import Network  # noqa: E402
from stepper.core.numeric import run_to_end, set_workers  # noqa: E402
from stepper.core.optimizers import fresh_state  # noqa: E402
from stepper.core.ratetest import Start, iter_range_test, log_rates  # noqa: E402

ROUNDS = 5
GOAL = 2.0


def build(n_rows: int) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """10-64-64-1 tanh network (4,929 weights), MSE, on seeded random data."""
    act = ACTIVATIONS["tanh"]
    net = Network(10, [Dense(10, 64, act), Dense(64, 64, act), Dense(64, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = initial_params(net, "glorot_uniform", seed=5)
    rng = np.random.default_rng(9)
    return net, theta, rng.normal(size=(n_rows, 10)), rng.normal(size=(n_rows, 1))


def main() -> None:
    # Two threads, as the stepper command sets (stepper.cli._use_cores); the reference runs on one.
    set_workers(min(2, os.cpu_count() or 1))
    rates = log_rates(1e-3, 1.0, 8)
    for n_rows in (256, 500):
        net, theta, X, Y = build(n_rows)
        for rule, settings in (("gd", Descent()), ("adam", Descent(weight_decay=0.01, clip_norm=1.0))):
            start = Start(theta, fresh_state(rule, net.n_params), np.zeros(net.n_params, dtype=bool), 0, None,
                          np.random.default_rng(0).bit_generator.state, settings)

            def ours() -> object:
                return run_to_end(iter_range_test(net, start, X, Y, None, None, rates, 50))

            def reference() -> object:
                finals = []
                for rate in rates:
                    t = theta.copy()
                    for _ in range(50):
                        t -= rate * net.cost_and_slopes(t, X, Y)[1]
                    finals.append(net.cost(t, X, Y))
                return finals

            times: dict[str, list[float]] = {"ours": [], "reference": []}
            for _ in range(ROUNDS):
                for name, job in (("ours", ours), ("reference", reference)):
                    began = time.perf_counter()
                    with np.errstate(all="ignore"):
                        job()
                    times[name].append(time.perf_counter() - began)
            mine, base = statistics.median(times["ours"]), statistics.median(times["reference"])
            verdict = "under" if mine < GOAL else "OVER"
            print(f"{net.n_params} weights, {n_rows} rows, {rule:>4}: 8 rates x 50 steps in {mine:.3f} s "
                  f"({verdict} the 2 s goal); bare descent {base:.3f} s; ratio {mine / base:.2f}")


if __name__ == "__main__":
    main()
