"""Benchmark: the cost slice along one weight, batched, against one network run per sweep point.

Reference: the plain way, ``Network.cost`` on a copy of the weights with the
swept weight set, once per point (45 points: the default 41 sweep points plus
the curvature's three and the step's landing), on the same data, in the same
process. The batched sweep skips the layers before the weight and the matrix
product after it, but the next layer's activation must still be computed for
every point, as the reference does. Goal: never slower than the reference for
weights in the last two layers, and at least 5x faster there.

Both run in interleaved rounds with one OpenBLAS thread; the figure is the median
of the per-round ratios, printed with its distribution (see rounds.py). What holds
(2-core machine, loaded, see the report printed): for L1.W the batched sweep is
about as fast as the reference (ratios around 1, between 0.9 and 1.4 in earlier
runs: the first layer's weight leaves little to skip); for L2.W and L3.b it is
several times faster.

Run: ``.venv/bin/python tests/benchmarks/bench_slice.py``
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


import numpy as np

from stepper.core.activations import ACTIVATIONS
from stepper.core.init import initial_params
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.slice import cost_slice

from rounds import interleaved, load_note, ratios, spread

N_SAMPLES = 512
ROUNDS = 15


def build() -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """A 10-64-64-1 tanh network, MSE, on seeded random data."""
    act = ACTIVATIONS["tanh"]
    net = Network(10, [Dense(10, 64, act), Dense(64, 64, act), Dense(64, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    theta = initial_params(net, "glorot_uniform", seed=5)
    rng = np.random.default_rng(9)
    return net, theta, rng.normal(size=(N_SAMPLES, 10)), rng.normal(size=(N_SAMPLES, 1))


def main() -> None:
    print(f"OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}; {load_note()}")
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
        times = interleaved({"batched": lambda: cost_slice(net, theta, X, Y, index, rate=0.1),
                             "reference": reference}, ROUNDS)
        print(f"{name:>10}: batched {spread(times['batched'], 1e3, ' ms')}")
        print(f"{'':>10}  one run per point {spread(times['reference'], 1e3, ' ms')}")
        print(f"{'':>10}  ratio {spread(ratios(times['reference'], times['batched']), unit='x')}; "
              f"largest cost difference {gap:.1e}")


if __name__ == "__main__":
    main()
