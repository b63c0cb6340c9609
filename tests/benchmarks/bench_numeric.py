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

Two more figures:

- the arithmetic floor: the stacked arrays the pass makes (copies x rows x
  units of each layer it runs, per block) times this machine's measured cost
  per entry of the same numpy calls on an in-cache stack (rank-one update,
  activation, product with the next layer), plus the matrix products at the
  measured GEMM rate; and, for scale, the floor of running every later layer in
  full for each move (the plain stacked method) at the GEMM rate;
- one worker against two (``set_workers``), Stepper against itself in the same
  rounds, to choose the default; ``--load N`` runs N busy processes beside the
  benchmark (the machine is shared: the other engineers' tests do the same).

Run: ``.venv/bin/python tests/benchmarks/bench_numeric.py [--load N] [--rounds R]``
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import time

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
from stepper.core.numeric_dense import through_pays

from rounds import interleaved, load_note, ratios, spread

N_SAMPLES = 256
ROUNDS = 10


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


def per_entry_costs(k: int = 8) -> dict[str, float]:
    """Seconds per entry of the numpy calls of a stacked pass, on an in-cache ``(k, 256, 64)`` stack.

    ``update``: the rank-one update (a broadcast product, then the unmoved
    pre-activation added); ``tanh`` / ``relu``: the activation in place;
    ``product``: the product with a one-unit next layer (per entry of the stack);
    ``gemm``: seconds per multiply-add pair of a ``(k * 256, 64) @ (64, 64)`` product.
    """
    rng = np.random.default_rng(0)
    n, width = N_SAMPLES, 64
    c, w = rng.normal(size=(k, n)), rng.normal(size=(k, width))
    base, Z = rng.normal(size=(n, width)), np.empty((k, n, width))
    W1, W64 = rng.normal(size=(width, 1)), rng.normal(size=(width, width))
    out1, out64 = np.empty((k * n, 1)), np.empty((k * n, width))

    def update() -> None:
        np.multiply(c[:, :, None], w[:, None, :], out=Z)
        Z.__iadd__(base)

    jobs: dict[str, Callable[[], Any]] = {
        "update": update,
        "tanh": lambda: np.tanh(Z, out=Z),
        "relu": lambda: np.maximum(Z, 0.0, out=Z),
        "product": lambda: np.matmul(Z.reshape(-1, width), W1, out=out1),
        "gemm": lambda: np.matmul(Z.reshape(-1, width), W64, out=out64),
    }
    costs = {}
    for name, job in jobs.items():
        update()
        best = []
        for _ in range(7):
            start = time.perf_counter()
            for _ in range(50):
                job()
            best.append((time.perf_counter() - start) / 50)
        costs[name] = float(np.median(best)) / Z.size
    costs["gemm"] /= width  # per multiply-add pair: each output entry takes 64
    return costs


def floors(net: Network, costs: dict[str, float], moves_per_weight: int) -> tuple[float, float]:
    """Seconds of the stacked arithmetic of one pass, and of the plain stacked method (module docstring).

    Mirrors the paths of stepper.core.numeric_dense: each move changes one column
    of its layer (``n`` entries, an update and an activation); a dense layer's moves update
    the next layer by a rank-one change (or, before a piecewise-linear layer,
    the one after it through ``G``); the later layers run on the whole stack.
    """
    n = N_SAMPLES
    ours = plain = 0.0
    layers = net.layers
    for block in net.layout.blocks:
        moves = moves_per_weight * (block.stop - block.start)
        later = layers[block.layer + 1 :]
        plain += moves * n * sum(l.n_in * l.n_out for l in later) * costs["gemm"]
        # Each move's own column: the moved pre-activation, its activation and its change.
        ours += moves * n * (costs["update"] + costs.get(layers[block.layer].activation.name, 0.0))
        if not later:
            continue  # the output layer's own moves: one column of the output per move
        first = block.layer + (2 if through_pays(net, block.layer, n, moves) else 1)
        for index in range(first, len(layers)):
            entries = moves * n * layers[index].n_out
            act = layers[index].activation.name
            ours += entries * costs.get(act, 0.0)
            if index == first:
                ours += entries * costs["update"]
            else:
                ours += entries * layers[index].n_in * costs["gemm"]
    return ours, plain


class Busy:
    """``count`` processes spinning on numpy arithmetic until stopped (a stand-in for other users)."""

    def __init__(self, count: int) -> None:
        self.stop = multiprocessing.Event()
        self.procs = [multiprocessing.Process(target=_spin, args=(self.stop,), daemon=True) for _ in range(count)]
        for proc in self.procs:
            proc.start()

    def close(self) -> None:
        self.stop.set()
        for proc in self.procs:
            proc.join()


def _spin(stop: Any) -> None:
    A = np.random.default_rng(1).normal(size=(256, 256))
    while not stop.is_set():
        np.tanh(A @ A, out=A)
        A /= np.max(np.abs(A)) + 1.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--load", type=int, default=0, help="busy processes to run beside the benchmark")
    parser.add_argument("--rounds", type=int, default=ROUNDS)
    args = parser.parse_args()
    busy = Busy(args.load)
    try:
        if args.load:
            time.sleep(2.0)
            print(f"{args.load} busy process(es) running beside the benchmark")
        run(args.rounds)
    finally:
        busy.close()


def run(rounds: int) -> None:
    print(f"OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}; {load_note()}")
    costs = per_entry_costs()
    print("  measured per entry of an in-cache (8, 256, 64) stack: " + ", ".join(
        f"{name} {seconds * 1e9:.2f} ns" for name, seconds in costs.items() if name != "gemm")
          + f"; GEMM {2.0 / costs['gemm'] / 1e9:.1f} GFLOP/s")
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
        }, rounds)
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
        print(f"  two workers against one, stepper central: "
              f"{spread(ratios(times['central'], times['central, 2 workers']), unit='x', digits=3)}"
              f"; equal bit for bit: {np.asarray(results['central']).tobytes() == np.asarray(results['central2']).tobytes()}")
        print(f"  not like with like: stepper central with 2 workers against one-thread scipy: "
              f"{spread(ratios(times['scipy'], times['central, 2 workers']), unit='x', digits=3)}")
        same = float(np.max(np.abs(np.asarray(results["forward"]) - np.asarray(results["scipy"])))) / scale
        print(f"  stepper forward vs scipy: max |difference| / max |slope| {same:.1e} (same h = {h_forward:.2e})")
        for method, moves in (("central", 2), ("forward", 1)):
            ours, plain = floors(net, costs, moves)
            took = float(np.median(times[method]))
            print(f"  {method} floor: the stack's arithmetic {ours * 1e3:.1f} ms, so the pass runs at "
                  f"{ours / took:.0%} of it; every later layer in full at the GEMM rate: {plain * 1e3:.0f} ms")
    print(f"after: {load_note()}")


if __name__ == "__main__":
    main()
