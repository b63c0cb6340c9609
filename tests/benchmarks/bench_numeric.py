"""Benchmark: numeric slopes of every weight of a ~5,000-weight network.

Reference: ``scipy.optimize.approx_fprime`` (forward differences, one full
forward pass of the same cost per weight) on the same cost, data and weights,
in the same process. Stepper's default pass uses central differences, which
need twice as many cost evaluations; its forward pass is timed too, as the
like-for-like figure. Goal: at least 10x faster than the reference.

Each figure is the best of several runs (``time.perf_counter``); runs of ours
and of the reference alternate, so both see the same load on a shared machine.

Threads: by default this script runs as the ``stepper`` command does (one
OpenBLAS thread, and two threads for Stepper's chunks of perturbations; see
``stepper.core.numeric.set_workers``). The reference gets the same BLAS. Run it
with ``OPENBLAS_NUM_THREADS=2`` to time both with OpenBLAS's own threads instead
(Stepper then stays on one thread, since the two kinds compete).

Run: ``/tmp/v/bin/python tests/benchmarks/bench_numeric.py``
"""

from __future__ import annotations

import os

# As the stepper command does (stepper/cli.py): one BLAS thread unless the caller chose.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import time  # noqa: E402
from typing import Any, Callable

import numpy as np
from scipy.optimize import approx_fprime

from stepper.core.activations import ACTIVATIONS
from stepper.core.init import initial_params
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.numeric import default_step, numeric_slopes, set_workers

N_SAMPLES = 256
ROUNDS = 3  # alternating rounds; ours runs OURS_PER_ROUND times per round
OURS_PER_ROUND = 3


def build(hidden: str) -> tuple[Network, np.ndarray, np.ndarray, np.ndarray]:
    """A 10-64-64-1 network with ``hidden`` activations, MSE, on seeded random data."""
    act = ACTIVATIONS[hidden]
    net = Network(
        10,
        [Dense(10, 64, act), Dense(64, 64, act), Dense(64, 1, ACTIVATIONS["identity"])],
        "mean_squared_error",
    )
    theta = initial_params(net, "glorot_uniform", seed=5)
    rng = np.random.default_rng(9)
    X = rng.normal(size=(N_SAMPLES, 10))
    Y = rng.normal(size=(N_SAMPLES, 1))
    return net, theta, X, Y


def timed(job: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    result = job()
    return time.perf_counter() - start, result


def main() -> None:
    one_blas_thread = os.environ["OPENBLAS_NUM_THREADS"] == "1"
    workers = min(2, os.cpu_count() or 1) if one_blas_thread else 1
    set_workers(workers)
    print(f"OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}, Stepper's workers: {workers}")
    for hidden in ("tanh", "relu"):
        net, theta, X, Y = build(hidden)
        _, analytic = net.cost_and_slopes(theta, X, Y)
        h_forward = default_step("forward")

        def cost(t: np.ndarray) -> float:
            return net.cost(t, X, Y)

        jobs: dict[str, Callable[[], Any]] = {
            "central": lambda: numeric_slopes(net, theta, X, Y, "central").slopes,
            "forward": lambda: numeric_slopes(net, theta, X, Y, "forward", h_forward).slopes,
            "scipy": lambda: approx_fprime(theta, cost, h_forward),
        }
        best = {name: float("inf") for name in jobs}
        results: dict[str, Any] = {}
        for _ in range(ROUNDS):
            for name, job in jobs.items():
                for _ in range(1 if name == "scipy" else OURS_PER_ROUND):
                    seconds, results[name] = timed(job)
                    best[name] = min(best[name], seconds)

        scale = float(np.max(np.abs(analytic)))

        def error(name: str) -> float:
            return float(np.max(np.abs(np.asarray(results[name]) - analytic))) / scale

        print(f"10-64-64-1 {hidden}, mean squared error, {N_SAMPLES} samples, {net.n_params} weights")
        print(f"  stepper central           {best['central']:7.3f} s   max |error| / max |slope| "
              f"{error('central'):.1e}")
        print(f"  stepper forward           {best['forward']:7.3f} s   max |error| / max |slope| "
              f"{error('forward'):.1e}")
        print(f"  scipy approx_fprime (fwd) {best['scipy']:7.3f} s   max |error| / max |slope| "
              f"{error('scipy'):.1e}")
        print(f"  speed-up over scipy: central {best['scipy'] / best['central']:5.1f}x, "
              f"forward {best['scipy'] / best['forward']:5.1f}x   (goal >= 10x)")
        same = float(np.max(np.abs(np.asarray(results["forward"]) - np.asarray(results["scipy"])))) / scale
        print(f"  stepper forward vs scipy: max |difference| / max |slope| {same:.1e} (same h = {h_forward:.2e})")


if __name__ == "__main__":
    main()
