"""Benchmark: per-row losses of 100,000 rows, against the same numbers written out in plain numpy.

Reference: the forward pass and the per-row loss written by hand for the
network below (two matrix products, tanh, a log-sum-exp cross-entropy per
row), on the same data, in the same process: the least work any per-row
loss can do. Goal: under 50 ms for 100k rows (issue 13), and within a small
factor of the reference. Rounds are interleaved (ours, reference, ours, ...)
and the medians are quoted, since the machine is shared.

Run: ``.venv/bin/python tests/benchmarks/bench_rows.py``
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the stepper command runs

import statistics  # noqa: E402
import time  # noqa: E402
from typing import Callable  # noqa: E402

import numpy as np  # noqa: E402

from stepper.core.activations import ACTIVATIONS  # noqa: E402
from stepper.core.init import initial_params  # noqa: E402
from stepper.core.layers import Dense  # noqa: E402
from stepper.core.network import Network  # noqa: E402
from stepper.core.rows import row_losses, worst_rows  # noqa: E402

N_ROWS = 100_000
ROUNDS = 15
GOAL = 0.050


def build(n_out: int, loss: str, out_act: str) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    net = Network(8, [Dense(8, 16, ACTIVATIONS["tanh"]), Dense(16, n_out, ACTIVATIONS[out_act])], loss)
    theta = initial_params(net, "glorot_uniform", seed=2)
    rng = np.random.default_rng(4)
    X = rng.normal(size=(N_ROWS, 8))
    if loss == "categorical_cross_entropy":
        Y = np.eye(n_out)[rng.integers(0, n_out, N_ROWS)]
    else:
        Y = rng.normal(size=(N_ROWS, n_out))
    return net, theta, X, Y


def medians(jobs: dict[str, Callable[[], object]]) -> dict[str, float]:
    times: dict[str, list[float]] = {name: [] for name in jobs}
    for _ in range(ROUNDS):
        for name, job in jobs.items():
            start = time.perf_counter()
            job()
            times[name].append(time.perf_counter() - start)
    return {name: statistics.median(t) for name, t in times.items()}


def main() -> None:
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
        found = medians({
            "ours": lambda: row_losses(net, theta, X, Y),
            "reference": reference,
            "ours+worst": lambda: worst_rows(row_losses(net, theta, X, Y).loss, 20),
        })
        verdict = "under" if found["ours"] < GOAL else "OVER"
        print(f"{loss:>26}: {N_ROWS} rows: ours {found['ours'] * 1e3:6.1f} ms ({verdict} the 50 ms goal), "
              f"reference {found['reference'] * 1e3:6.1f} ms, ratio {found['ours'] / found['reference']:.2f}; "
              f"with the 20 worst picked {found['ours+worst'] * 1e3:6.1f} ms; largest difference {gap:.1e}")


if __name__ == "__main__":
    main()
