"""Benchmark: numeric slopes of every weight of a ~5,000-weight network.

Reference: ``scipy.optimize.approx_fprime`` (forward differences, one full
forward pass of the same cost per weight) on the same cost, data and weights,
in the same process. Stepper's default pass uses central differences, which
need twice as many cost evaluations; its forward pass is timed too, as the
like-for-like figure. Goal: at least 10x faster than the reference.

Like with like (see rounds.py): both sides run with the same threads, one
OpenBLAS thread and one thread of Python each (Stepper's ``set_workers(1)``),
in interleaved rounds; the figure quoted is the median of the per-round ratios,
with their distribution. A last line times Stepper with two workers, as the
``stepper`` command runs it, against the same single-threaded reference: that
ratio is not like with like, and says so.

Run: ``.venv/bin/python tests/benchmarks/bench_numeric.py``
"""

from __future__ import annotations

import os

# As the stepper command does (stepper/cli.py): one BLAS thread unless the caller chose.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from typing import Any, Callable

import numpy as np
from scipy.optimize import approx_fprime

from stepper.core.activations import ACTIVATIONS
from stepper.core.init import initial_params
from stepper.core.layers import Dense
from stepper.core.network import Network
from stepper.core.numeric import default_step, numeric_slopes, set_workers

from rounds import interleaved, load_note, ratios, spread

N_SAMPLES = 256
ROUNDS = 7


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


def main() -> None:
    print(f"OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}; {load_note()}")
    for hidden in ("tanh", "relu"):
        net, theta, X, Y = build(hidden)
        _, analytic = net.cost_and_slopes(theta, X, Y)
        h_forward = default_step("forward")
        results: dict[str, Any] = {}

        def cost(t: np.ndarray) -> float:
            return net.cost(t, X, Y)

        def keep(name: str, job: Callable[[], Any]) -> Callable[[], None]:
            def run() -> None:
                results[name] = job()
            return run

        def with_workers(n: int, job: Callable[[], Any]) -> Callable[[], Any]:
            def run() -> Any:
                set_workers(n)
                try:
                    return job()
                finally:
                    set_workers(1)
            return run

        central = lambda: numeric_slopes(net, theta, X, Y, "central").slopes  # noqa: E731
        forward = lambda: numeric_slopes(net, theta, X, Y, "forward", h_forward).slopes  # noqa: E731
        set_workers(1)
        times = interleaved({
            "central": keep("central", central),
            "forward": keep("forward", forward),
            "scipy": keep("scipy", lambda: approx_fprime(theta, cost, h_forward)),
            "central, 2 workers": keep("central2", with_workers(2, central)),
        }, ROUNDS)
        scale = float(np.max(np.abs(analytic)))

        def error(name: str) -> float:
            return float(np.max(np.abs(np.asarray(results[name]) - analytic))) / scale

        print(f"10-64-64-1 {hidden}, mean squared error, {N_SAMPLES} samples, {net.n_params} weights")
        for name, label in [("central", "stepper central"), ("forward", "stepper forward"),
                            ("scipy", "scipy approx_fprime (fwd)")]:
            print(f"  {label:<26} {spread(times[name], 1e3, ' ms', digits=4)}   max |error| / max |slope| "
                  f"{error(name):.1e}")
        for name in ("central", "forward"):
            print(f"  speed-up over scipy, {name:<8} (both one thread): "
                  f"{spread(ratios(times['scipy'], times[name]), unit='x', digits=3)}")
        print(f"  not like with like: stepper central with 2 workers against one-thread scipy: "
              f"{spread(ratios(times['scipy'], times['central, 2 workers']), unit='x', digits=3)}")
        same = float(np.max(np.abs(np.asarray(results["forward"]) - np.asarray(results["scipy"])))) / scale
        print(f"  stepper forward vs scipy: max |difference| / max |slope| {same:.1e} (same h = {h_forward:.2e})")


if __name__ == "__main__":
    main()
