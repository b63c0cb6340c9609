"""Benchmark: per-row losses of 100,000 rows, against the same numbers written out in plain numpy.

Reference: the forward pass and the per-row loss written by hand for the
network below (two matrix products, tanh, then a log-sum-exp cross-entropy or
a squared error per row), on the same data, in the same process: the least
work any per-row loss can do. Both sides run on one BLAS thread (as the
``stepper`` command does). Goal (issue 13): under 50 ms for 100k rows; the
per-round ratio shows what the general code costs over the hand-written one.
Rounds are interleaved in a rotating order (``rounds.py``), medians quoted
with their spread and the machine's load.

Run: ``.venv/bin/python tests/benchmarks/bench_rows.py``
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the stepper command runs

import numpy as np  # noqa: E402
from rounds import interleaved, load_note, ratios, spread  # noqa: E402

from stepper.core.activations import ACTIVATIONS  # noqa: E402
from stepper.core.init import initial_params  # noqa: E402
from stepper.core.layers import Dense  # noqa: E402
from stepper.core.network import Network  # noqa: E402
from stepper.core.rows import row_losses, worst_rows  # noqa: E402

N_ROWS = 100_000
ROUNDS = 21
GOAL = 0.050


def build(n_out: int, loss: str, out_act: str) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """8 inputs, 16 tanh units, ``n_out`` outputs; seeded random rows (invented for the benchmark)."""
    net = Network(8, [Dense(8, 16, ACTIVATIONS["tanh"]), Dense(16, n_out, ACTIVATIONS[out_act])], loss)
    theta = initial_params(net, "glorot_uniform", seed=2)
    rng = np.random.default_rng(4)
    X = rng.normal(size=(N_ROWS, 8))
    if loss == "categorical_cross_entropy":
        Y = np.eye(n_out)[rng.integers(0, n_out, N_ROWS)]
    else:
        Y = rng.normal(size=(N_ROWS, n_out))
    return net, theta, X, Y


def main() -> None:
    print(f"{N_ROWS} rows, {load_note()}")
    for n_out, loss, act in ((3, "categorical_cross_entropy", "softmax"), (1, "mean_squared_error", "identity")):
        net, theta, X, Y = build(n_out, loss, act)
        p = net.views(theta)

        def reference() -> np.ndarray:
            Z = np.tanh(X @ p[0]["W"] + p[0]["b"]) @ p[1]["W"] + p[1]["b"]
            if loss == "mean_squared_error":
                return np.mean((Z - Y) ** 2, axis=1)
            top = Z.max(axis=1, keepdims=True)
            lse = top[:, 0] + np.log(np.sum(np.exp(Z - top), axis=1))
            return lse - np.sum(Y * Z, axis=1)

        gap = float(np.max(np.abs(reference() - row_losses(net, theta, X, Y).loss)))
        times = interleaved({
            "ours": lambda: row_losses(net, theta, X, Y),
            "reference": reference,
            "ours+worst": lambda: worst_rows(row_losses(net, theta, X, Y).loss, 20),
        }, ROUNDS)
        median = sorted(times["ours"])[len(times["ours"]) // 2]
        verdict = "under" if median < GOAL else "OVER"
        print(f"{loss}: largest difference from the reference {gap:.1e}")
        print(f"  ours            {spread(times['ours'], 1e3, ' ms')} ({verdict} the 50 ms goal)")
        print(f"  reference       {spread(times['reference'], 1e3, ' ms')}")
        print(f"  ours + 20 worst {spread(times['ours+worst'], 1e3, ' ms')}")
        print(f"  reference / ours per round: {spread(ratios(times['reference'], times['ours']))}")


if __name__ == "__main__":
    main()
