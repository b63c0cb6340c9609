"""Benchmark: the cost slice along one weight, batched, against one network run per sweep point.

Reference: the plain way, ``Network.cost`` on a copy of the weights with the
swept weight set, once per point (45 points: the default 41 sweep points plus
the curvature's three and the step's landing), on the same data, in the same
process. The batched sweep skips the layers before the weight and the matrix
product after it, but the next layer's activation must still be computed for
every point, as the reference does. Goal: never slower than the reference, and
at least 5x faster for weights in the last two layers. Measured on the 2-core
development machine: about 1.5x for L1.W, 9x for L2.W, 10x for L3.b.

Run: ``/tmp/v/bin/python tests/benchmarks/bench_slice.py``
"""

from __future__ import annotations

import time
from typing import Callable

import numpy as np

from stepper.core.activations import ACTIVATIONS
from stepper.core.init import initial_params
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.slice import cost_slice

N_SAMPLES = 512
REPEATS = 5


def build() -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """A 10-64-64-1 tanh network, MSE, on seeded random data."""
    act = ACTIVATIONS["tanh"]
    net = Network(10, [Dense(10, 64, act), Dense(64, 64, act), Dense(64, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = initial_params(net, "glorot_uniform", seed=5)
    rng = np.random.default_rng(9)
    return net, theta, rng.normal(size=(N_SAMPLES, 10)), rng.normal(size=(N_SAMPLES, 1))


def best_of(job: Callable[[], object]) -> float:
    """Smallest wall time of ``REPEATS`` runs (``time.perf_counter``)."""
    best = float("inf")
    for _ in range(REPEATS):
        start = time.perf_counter()
        job()
        best = min(best, time.perf_counter() - start)
    return best


def main() -> None:
    net, theta, X, Y = build()
    for name in ("L1.W[3,7]", "L2.W[5,9]", "L3.b[0]"):
        index = net.layout.lookup(name)
        result = cost_slice(net, theta, X, Y, index, rate=0.1)
        values = np.concatenate([result.points, [result.value] * 3, [result.landing]])

        def reference() -> None:
            moved = theta.copy()
            for v in values:
                moved[index] = v
                net.cost(moved, X, Y)

        moved = theta.copy()
        direct = []
        for v in result.points:
            moved[index] = v
            direct.append(net.cost(moved, X, Y))
        gap = float(np.max(np.abs(np.array(direct) - result.costs)))
        ours = best_of(lambda: cost_slice(net, theta, X, Y, index, rate=0.1))
        theirs = best_of(reference)
        print(f"{name:>10}: batched {ours * 1e3:7.2f} ms, one run per point {theirs * 1e3:7.2f} ms, "
              f"ratio {theirs / ours:5.1f}x, largest cost difference {gap:.1e}")


if __name__ == "__main__":
    main()
