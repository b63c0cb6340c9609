"""Benchmark: a rate range test of 8 rates x 50 steps on a 5k-weight network, against bare descent.

Reference: the same 400 updates written as bare plain descent
(``theta -= rate * slopes`` with the slopes from ``Network.cost_and_slopes``)
plus the 8 final costs, on the same data, in the same process: the least work
any range test of this size can do. The range test adds copies of the state,
the update pipeline (clipping, schedule, decay) and the finite checks.

Like with like: both sides run on one thread first. Then the range test runs
its rates on two threads, as the ``stepper`` command sets it up
(``numeric.set_workers(2)``); that figure is not like with like (the reference
keeps one thread) and is labelled so. Goal (issue 13): under 2 s. Rounds are
interleaved in a rotating order (``rounds.py``), medians quoted with their
spread and the machine's load.

Run: ``.venv/bin/python tests/benchmarks/bench_ratetest.py``
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the stepper command runs

import numpy as np  # noqa: E402
from rounds import interleaved, load_note, ratios, spread  # noqa: E402

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
    """10-64-64-1 tanh network (4,929 weights), MSE, on seeded random rows (invented for the benchmark)."""
    act = ACTIVATIONS["tanh"]
    net = Network(10, [Dense(10, 64, act), Dense(64, 64, act), Dense(64, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = initial_params(net, "glorot_uniform", seed=5)
    rng = np.random.default_rng(9)
    return net, theta, rng.normal(size=(n_rows, 10)), rng.normal(size=(n_rows, 1))


def main() -> None:
    rates = log_rates(1e-3, 1.0, 8)
    print(load_note())
    for n_rows in (256, 500):
        net, theta, X, Y = build(n_rows)
        for rule, settings in (("gd", Descent()), ("adam", Descent(weight_decay=0.01, clip_norm=1.0))):
            start = Start(theta, fresh_state(rule, net.n_params), np.zeros(net.n_params, dtype=bool), 0, None,
                          np.random.default_rng(0).bit_generator.state, settings)

            def ours() -> object:
                return run_to_end(iter_range_test(net, start, X, Y, None, None, rates, 50))

            def reference() -> object:
                finals = []
                with np.errstate(all="ignore"):
                    for rate in rates:
                        t = theta.copy()
                        for _ in range(50):
                            t -= rate * net.cost_and_slopes(t, X, Y)[1]
                        finals.append(net.cost(t, X, Y))
                return finals

            set_workers(1)
            one = interleaved({"ours": ours, "reference": reference}, ROUNDS)
            set_workers(2)
            two = interleaved({"ours": ours}, ROUNDS)
            set_workers(1)
            median = sorted(two["ours"])[ROUNDS // 2]
            print(f"{net.n_params} weights, {n_rows} rows, {rule} (8 rates x 50 steps):")
            print(f"  range test, 1 thread   {spread(one['ours'], 1, ' s')}")
            print(f"  bare descent, 1 thread {spread(one['reference'], 1, ' s')}")
            print(f"  bare / range test per round: {spread(ratios(one['reference'], one['ours']))}")
            print(f"  range test, 2 threads (as stepper runs it; not like with like) {spread(two['ours'], 1, ' s')} "
                  f"({'under' if median < GOAL else 'OVER'} the 2 s goal)")


if __name__ == "__main__":
    main()
