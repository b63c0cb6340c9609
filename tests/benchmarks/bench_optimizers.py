"""Benchmark: Stepper's update rules against PyTorch's, in float64, on the same data.

Reference: ``torch.optim.SGD(momentum=0.9)`` and ``torch.optim.Adam`` (CPU
build, float64 tensors), run in the same process. PyTorch is not a dependency
of Stepper; install it into the dev environment only to run this script::

    /tmp/v/bin/pip install torch==2.13.0
    /tmp/v/bin/python tests/benchmarks/bench_optimizers.py

Two comparisons, each printing the largest difference of the weights (and of
the rule's memory) after every run:

1. rule only: both optimizers are fed the very same slopes at every step
   (Stepper's backpropagation at PyTorch's current weights), so any difference
   comes from the update rule alone;
2. end to end: a ``torch.nn.Sequential(Linear, Tanh, Linear)`` with the same
   starting weights trains with PyTorch's own autograd and ``MSELoss``, and a
   Stepper Session trains on the same data; slopes and rule both differ in
   implementation.

Momentum is written two ways. Stepper follows Sutskever et al. 2013, eq. 1:
``v <- mu v - rate g``, ``theta <- theta + v``. PyTorch's SGD keeps
``b <- mu b + g`` and does ``theta <- theta - rate b`` (its documentation notes
this differs from Sutskever et al.). For a constant rate the two are the same
sequence, with ``v = -rate b`` at every step (by induction: v_1 = -rate g_1 =
-rate b_1, and v_{t+1} = mu v_t - rate g = -rate (mu b_t + g) = -rate b_{t+1}).
They part when the rate changes mid-run: Stepper's velocity keeps the scale of
the rates it was built with, PyTorch rescales the whole buffer by the new rate.
This script keeps the rate constant.

The last part times one update of a 1,000,000-parameter vector in each
library (best of several runs) and prints the ratio.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Callable

import numpy as np
import torch

from stepper.core.optimizers import compute_update, fresh_state
from stepper.formats.model_file import load_setup
from stepper.session import Session

BAKERY = Path(__file__).resolve().parents[2] / "scenarios" / "bakery-demand" / "model.toml"
STEPS = 200
RULES = {"momentum": 0.02, "adam": 0.01}


def torch_optimizer(rule: str, params: list[torch.Tensor], rate: float) -> torch.optim.Optimizer:
    if rule == "momentum":
        return torch.optim.SGD(params, lr=rate, momentum=0.9, foreach=False)
    return torch.optim.Adam(params, lr=rate, betas=(0.9, 0.999), eps=1e-8, foreach=False)


def rule_only(rule: str, rate: float) -> tuple[float, float]:
    """Same slopes fed to both; returns (max |theta diff|, max |memory diff|)."""
    setup = load_setup(BAKERY)
    net, X, Y = setup.network, setup.data.X, setup.data.Y
    theta = setup.theta0.copy()
    state = fresh_state(rule, net.n_params)
    param = torch.tensor(setup.theta0.copy(), dtype=torch.float64)
    opt = torch_optimizer(rule, [param], rate)
    for _ in range(STEPS):
        slopes = net.cost_and_slopes(param.detach().numpy().copy(), X, Y)[1]
        # Stepper's own rule, at its own weights, with the same slopes.
        delta, state = compute_update(state, slopes, rate)
        theta = theta + delta
        param.grad = torch.tensor(slopes, dtype=torch.float64)
        opt.step()
    torch_theta = param.detach().numpy()
    opt_state = opt.state[param]
    if rule == "momentum":
        memory = np.max(np.abs(state.arrays["velocity"] - (-rate) * opt_state["momentum_buffer"].numpy()))
    else:
        memory = max(np.max(np.abs(state.arrays["m"] - opt_state["exp_avg"].numpy())),
                     np.max(np.abs(state.arrays["v"] - opt_state["exp_avg_sq"].numpy())))
    return float(np.max(np.abs(theta - torch_theta))), float(memory)


def end_to_end(rule: str, rate: float) -> tuple[float, float, float]:
    """Session vs torch.nn training; returns (max |theta diff|, cost diff, final cost)."""
    setup = load_setup(BAKERY)
    layout = setup.network.layout
    X = torch.tensor(setup.data.X, dtype=torch.float64)
    Y = torch.tensor(setup.data.Y, dtype=torch.float64)
    model = torch.nn.Sequential(torch.nn.Linear(4, 6), torch.nn.Tanh(), torch.nn.Linear(6, 1)).double()

    def block(prefix: str) -> np.ndarray:
        b = next(b for b in layout.blocks if b.prefix == prefix)
        return setup.theta0[b.start : b.stop].reshape(b.shape)

    with torch.no_grad():
        # torch.nn.Linear stores weight as (out, in); Stepper's W is (in, out).
        model[0].weight.copy_(torch.tensor(block("L1.W").T))
        model[0].bias.copy_(torch.tensor(block("L1.b")))
        model[2].weight.copy_(torch.tensor(block("L2.W").T))
        model[2].bias.copy_(torch.tensor(block("L2.b")))
    opt = torch_optimizer(rule, list(model.parameters()), rate)
    loss_fn = torch.nn.MSELoss()
    for _ in range(STEPS):
        opt.zero_grad()
        loss = loss_fn(model(X), Y)
        loss.backward()
        opt.step()
    session = Session(setup, rate=rate)
    session.set_rule(rule)
    session.step(STEPS)
    ours = np.concatenate([
        model[0].weight.detach().numpy().T.ravel(), model[0].bias.detach().numpy(),
        model[2].weight.detach().numpy().T.ravel(), model[2].bias.detach().numpy(),
    ])
    with torch.no_grad():
        torch_cost = float(loss_fn(model(X), Y))
    return float(np.max(np.abs(session.theta - ours))), abs(session.train_cost() - torch_cost), torch_cost


def best_of(repeats: int, job: Callable[[], object]) -> float:
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        job()
        best = min(best, time.perf_counter() - start)
    return best


def timing(rule: str) -> tuple[float, float]:
    """Seconds per update of 1e6 parameters: (stepper, torch)."""
    n = 1_000_000
    rng = np.random.default_rng(0)
    g = rng.normal(size=n)
    state = fresh_state(rule, n)
    ours = best_of(7, lambda: compute_update(state, g, 0.01))
    param = torch.zeros(n, dtype=torch.float64)
    param.grad = torch.tensor(g)
    opt = torch_optimizer(rule, [param], 0.01)
    opt.step()  # creates its state
    theirs = best_of(7, opt.step)
    return ours, theirs


def main() -> None:
    torch.set_default_dtype(torch.float64)
    print(f"PyTorch {torch.__version__}, float64, {STEPS} steps on the bakery-demand scenario")
    for rule, rate in RULES.items():
        theta_diff, memory_diff = rule_only(rule, rate)
        print(f"  {rule:<8} rate {rate:<5} same slopes:  max |weight diff| {theta_diff:.2e}   "
              f"max |memory diff| {memory_diff:.2e}")
        theta_diff, cost_diff, cost = end_to_end(rule, rate)
        print(f"  {rule:<8} rate {rate:<5} end to end:   max |weight diff| {theta_diff:.2e}   "
              f"|cost diff| {cost_diff:.2e} (cost {cost:.6g})")
    torch.set_num_threads(1)
    for rule in RULES:
        ours, theirs = timing(rule)
        print(f"  {rule:<8} one update of 1e6 parameters (1 thread): stepper {ours * 1e3:7.2f} ms   "
              f"torch {theirs * 1e3:7.2f} ms   ratio stepper / torch {ours / theirs:5.2f}")


if __name__ == "__main__":
    main()
