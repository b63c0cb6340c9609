"""Benchmark: analytic slopes (``Network.cost_and_slopes``) against reference autodiff.

References, in the same process on the same data and weights, all float64 on
the CPU, all taking the flat parameter vector and returning the flat slopes:
- autograd (``autograd.value_and_grad`` of the same cost written with autograd.numpy);
- PyTorch, if ``import torch`` works (reverse mode on a flat leaf tensor).
Goal: Stepper no slower than either.

Like with like (see rounds.py): every library runs with one thread (OpenBLAS,
OpenMP and PyTorch's intra-op pool are pinned to 1 before anything is imported,
unless OPENBLAS_NUM_THREADS is set by the caller, which then applies to all),
in interleaved rounds of timed batches; each ratio is taken within a round and
the median is printed with its distribution. The slopes of each reference are
compared with Stepper's (Stepper is not compared with itself).

Run: ``.venv/bin/python tests/benchmarks/bench_analytic.py``. Most of the time
goes to matrix products, so the BLAS library matters: numpy's wheels bundle
OpenBLAS, PyTorch's CPU wheels Intel MKL. PyTorch is optional and never a
dependency of the project.
"""

from __future__ import annotations

import os

for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, os.environ.get("OPENBLAS_NUM_THREADS", "1"))

import time  # noqa: E402
from typing import Any, Callable

import autograd
import autograd.numpy as anp
import numpy as np

from stepper.core.activations import ACTIVATIONS
from stepper.core.init import initial_params
from stepper.core.layers import Dense
from stepper.core.network import Network

try:
    import torch
except ImportError:  # optional reference
    torch = None
else:
    torch.set_num_threads(int(os.environ["OPENBLAS_NUM_THREADS"]))

from rounds import load_note, ratios, spread  # noqa: E402

ROUNDS = 9
PAUSE = 0.3  # seconds between timed batches

# (label, inputs, [(units, activation)], loss, samples)
CASES = [
    ("10-64-64-1 tanh, mean squared error", 10, [(64, "tanh"), (64, "tanh"), (1, "identity")],
     "mean_squared_error", 256),
    ("10-64-64-1 relu, mean squared error", 10, [(64, "relu"), (64, "relu"), (1, "identity")],
     "mean_squared_error", 256),
    ("64-128-64-10 relu, softmax + categorical cross-entropy", 64,
     [(128, "relu"), (64, "relu"), (10, "softmax")], "categorical_cross_entropy", 1024),
]


def problem(n_in: int, spec: list[tuple[int, str]], loss: str, n: int) -> tuple[Network, Any, Any, Any]:
    layers, width = [], n_in
    for units, act in spec:
        layers.append(Dense(width, units, ACTIVATIONS[act]))
        width = units
    net = Network(n_in, layers, loss)
    theta = initial_params(net, "glorot_uniform", seed=1)
    rng = np.random.default_rng(2)
    X = rng.normal(size=(n, n_in))
    Y = np.eye(width)[rng.integers(0, width, n)] if loss == "categorical_cross_entropy" else rng.normal(size=(n, 1))
    return net, theta, X, Y


def autograd_job(n_in: int, spec: list[tuple[int, str]], loss: str, X: Any, Y: Any) -> Callable[[Any], Any]:
    def cost(theta: Any) -> Any:
        A, width, at = X, n_in, 0
        for units, act in spec:
            W = anp.reshape(theta[at : at + width * units], (width, units))
            b = theta[at + width * units : at + width * units + units]
            at += width * units + units
            Z = anp.dot(A, W) + b
            if act == "tanh":
                A = anp.tanh(Z)
            elif act == "relu":
                A = anp.maximum(Z, 0.0)
            elif act == "softmax":
                A = Z  # folded into the loss below (log-sum-exp), as Stepper does
            else:
                A = Z
            width = units
        n = X.shape[0]
        if loss == "categorical_cross_entropy":
            shifted = A - anp.max(A, axis=1, keepdims=True)
            log_p = shifted - anp.log(anp.sum(anp.exp(shifted), axis=1, keepdims=True))
            return -anp.sum(Y * log_p) / n
        return anp.sum((A - Y) ** 2) / (n * Y.shape[1])

    grad = autograd.value_and_grad(cost)
    return lambda theta: grad(theta)[1]


def torch_job(n_in: int, spec: list[tuple[int, str]], loss: str, X: Any, Y: Any) -> Callable[[Any], Any]:
    assert torch is not None
    Xt = torch.from_numpy(X)
    Yt = torch.from_numpy(Y)

    def slopes(theta: Any) -> Any:
        t = torch.from_numpy(theta).requires_grad_(True)
        A, width, at = Xt, n_in, 0
        for units, act in spec:
            W = t[at : at + width * units].view(width, units)
            b = t[at + width * units : at + width * units + units]
            at += width * units + units
            Z = torch.addmm(b, A, W)
            A = torch.tanh(Z) if act == "tanh" else torch.relu(Z) if act == "relu" else Z
            width = units
        n = Xt.shape[0]
        if loss == "categorical_cross_entropy":
            cost = -(Yt * torch.log_softmax(A, dim=1)).sum() / n
        else:
            cost = ((A - Yt) ** 2).sum() / (n * Yt.shape[1])
        cost.backward()
        return t.grad.numpy()

    return slopes


def per_call(job: Callable[[], Any], calls: int) -> float:
    start = time.perf_counter()
    for _ in range(calls):
        job()
    return (time.perf_counter() - start) / calls


def main() -> None:
    blas = np.show_config(mode="dicts")["Build Dependencies"]["blas"]  # type: ignore[index]
    print(f"numpy {np.__version__} with {blas.get('name')} {blas.get('version')}")
    if torch is None:
        print("PyTorch not importable: comparing with autograd only")
    else:
        mkl = "MKL" if torch.backends.mkl.is_available() else "no MKL"
        print(f"PyTorch {torch.__version__} ({mkl}), {torch.get_num_threads()} threads")
    print(f"threads: OpenBLAS {os.environ['OPENBLAS_NUM_THREADS']}, OpenMP {os.environ['OMP_NUM_THREADS']}; "
          f"{load_note()}")
    for label, n_in, spec, loss, n in CASES:
        net, theta, X, Y = problem(n_in, spec, loss, n)
        jobs: dict[str, Callable[[], Any]] = {"stepper": lambda: net.cost_and_slopes(theta, X, Y)[1]}
        ag = autograd_job(n_in, spec, loss, X, Y)
        jobs["autograd"] = lambda: ag(theta)
        if torch is not None:
            tj = torch_job(n_in, spec, loss, X, Y)
            jobs["torch"] = lambda: tj(theta)
        ours = jobs["stepper"]()
        scale = float(np.max(np.abs(ours)))
        calls = max(3, int(0.05 / per_call(jobs["stepper"], 3)))
        times: dict[str, list[float]] = {name: [] for name in jobs}
        names = list(jobs)
        for r in range(ROUNDS):
            for name in names[r % len(names):] + names[: r % len(names)]:
                # Idle BLAS / OpenMP worker threads of the previous library keep
                # spinning for a while after its last call; let them go to sleep first.
                time.sleep(PAUSE)
                times[name].append(per_call(jobs[name], calls))
        print(f"{label}, {n} samples, {net.n_params} weights")
        print(f"  stepper   {spread(times['stepper'], 1e3, ' ms per call')}")
        for name in names[1:]:
            diff = float(np.max(np.abs(np.asarray(jobs[name]()) - ours))) / scale
            print(f"  {name:9s} {spread(times[name], 1e3, ' ms per call')}")
            print(f"  {'':9s} its time / Stepper's {spread(ratios(times[name], times['stepper']), unit='x')}; "
                  f"max |its slopes - Stepper's| / max |slope| {diff:.1e}")


if __name__ == "__main__":
    main()
