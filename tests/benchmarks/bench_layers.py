"""Benchmark: the convolutional scenario glaze-defects (2,195 weights, 256 training rows).

Three figures, each against a reference run in the same process on the same
data and weights (see rounds.py: interleaved rounds, per-round ratios, medians
with their distribution, the machine's load):

1. analytic slopes (``Network.cost_and_slopes`` on the flat weights) against
   ``jax.jit(jax.grad(cost))`` of the same cost written with
   ``jax.lax.conv_general_dilated`` and ``jax.lax.reduce_window``, float64 on the
   CPU, timed after compilation; goal: Stepper no slower than 2x jax;
2. central numeric slopes of every weight against ``scipy.optimize.approx_fprime``
   (forward differences, one full forward pass per weight); goal: at least 5x
   faster (Stepper's forward-difference pass is timed too, like for like);
3. the app, headless: key press ``s`` to the table and the cost plot redrawn
   (as bench_ui.py times it); goal: median under 100 ms.

Threads: one OpenBLAS thread and one XLA thread (Eigen's pool off) unless the
caller set OPENBLAS_NUM_THREADS, and Stepper's finite differences on one
worker; a last numeric line times two workers, as the ``stepper`` command runs.

Run: ``.venv/bin/python tests/benchmarks/bench_layers.py [--skip-ui]``
"""

from __future__ import annotations

import os
import sys

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
if os.environ["OPENBLAS_NUM_THREADS"] == "1":
    os.environ.setdefault("XLA_FLAGS", "--xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1")

import asyncio  # noqa: E402
from typing import Any, Callable

import jax  # noqa: E402
import numpy as np  # noqa: E402
from scipy.optimize import approx_fprime  # noqa: E402

jax.config.update("jax_enable_x64", True)
import jax.numpy as jnp  # noqa: E402
from jax import lax  # noqa: E402

from stepper.core.numeric import default_step, numeric_slopes, set_workers  # noqa: E402
from stepper.formats.model_file import load_setup  # noqa: E402
from stepper.scenarios import resolve_model  # noqa: E402
from stepper.session import Session  # noqa: E402

from rounds import interleaved, load_note, ratios, spread  # noqa: E402

ROUNDS = 9
PAUSE = 0.2


def jax_cost(session: Session) -> Callable[[Any], Any]:
    """The glaze-defects cost of the flat weights, written with jax from the model file's description."""
    net = session.training_net()
    data = session.setup.data
    X = jnp.asarray(data.X.reshape((data.X.shape[0], 1, 8, 8)))
    Y = jnp.asarray(data.Y)
    n = X.shape[0]
    blocks = {(b.layer, b.key): (b.start, b.stop, b.shape) for b in net.layout.blocks}

    def part(theta: Any, layer: int, key: str) -> Any:
        start, stop, shape = blocks[(layer, key)]
        return theta[start:stop].reshape(shape)

    def cost(theta: Any) -> Any:
        z = lax.conv_general_dilated(X, part(theta, 0, "K"), (1, 1), "SAME")
        a = jax.nn.relu(z + part(theta, 0, "b")[None, :, None, None])
        a = lax.reduce_window(a, -jnp.inf, lax.max, (1, 1, 2, 2), (1, 1, 2, 2), "VALID").reshape(n, -1)
        a = jax.nn.relu(a @ part(theta, 3, "W") + part(theta, 3, "b"))
        logits = a @ part(theta, 4, "W") + part(theta, 4, "b")
        return -jnp.sum(Y * jax.nn.log_softmax(logits)) / n

    return cost


def analytic(session: Session) -> None:
    net = session.training_net()
    data = session.setup.data
    theta = session.theta.copy()
    cost = jax_cost(session)
    grad = jax.jit(jax.grad(cost))
    ref = np.asarray(grad(jnp.asarray(theta)))  # compiled here, before any timing
    ours = net.cost_and_slopes(theta, data.X, data.Y)[1]
    jt = jnp.asarray(theta)
    times = interleaved({
        "stepper": lambda: net.cost_and_slopes(theta, data.X, data.Y),
        "jax": lambda: grad(jt).block_until_ready(),
    }, ROUNDS * 5, PAUSE / 4)
    scale = float(np.max(np.abs(ref)))
    print(f"analytic slopes, {net.n_params} weights, {data.X.shape[0]} rows "
          f"(max |ours - jax| / max |slope| {float(np.max(np.abs(ours - ref))) / scale:.1e})")
    print(f"  stepper             {spread(times['stepper'], 1e3, ' ms')}")
    print(f"  jax.jit(jax.grad)   {spread(times['jax'], 1e3, ' ms')}")
    print(f"  jax time / stepper time (above 0.5 meets the goal): "
          f"{spread(ratios(times['jax'], times['stepper']), unit='x')}")


def numeric(session: Session) -> None:
    net = session.training_net()
    data = session.setup.data
    theta = session.theta.copy()
    slopes = net.cost_and_slopes(theta, data.X, data.Y)[1]
    h_forward = default_step("forward")
    results: dict[str, Any] = {}

    def keep(name: str, job: Callable[[], Any]) -> Callable[[], None]:
        def run() -> None:
            results[name] = job()
        return run

    def two_workers() -> Any:
        set_workers(2)
        try:
            return numeric_slopes(net, theta, data.X, data.Y, "central").slopes
        finally:
            set_workers(1)

    set_workers(1)
    times = interleaved({
        "central": keep("central", lambda: numeric_slopes(net, theta, data.X, data.Y, "central").slopes),
        "forward": keep("forward", lambda: numeric_slopes(net, theta, data.X, data.Y, "forward", h_forward).slopes),
        "scipy": keep("scipy", lambda: approx_fprime(theta, lambda t: net.cost(t, data.X, data.Y), h_forward)),
        "central, 2 workers": keep("central2", two_workers),
    }, ROUNDS, PAUSE)
    scale = float(np.max(np.abs(slopes)))
    print(f"numeric slopes of every weight ({net.n_params})")
    for name, label in [("central", "stepper central"), ("forward", "stepper forward"),
                        ("scipy", "scipy approx_fprime (fwd)"), ("central, 2 workers", "stepper central, 2 workers")]:
        key = {"central, 2 workers": "central2"}.get(name, name)
        error = float(np.max(np.abs(np.asarray(results[key]) - slopes))) / scale
        print(f"  {label:<28} {spread(times[name], 1e3, ' ms', digits=4)}   max |error| / max |slope| {error:.1e}")
    for name in ("central", "forward"):
        print(f"  speed-up over scipy, {name:<8} (both one thread): "
              f"{spread(ratios(times['scipy'], times[name]), unit='x')}")
    print(f"  not like with like: stepper central with 2 workers against one-thread scipy: "
          f"{spread(ratios(times['scipy'], times['central, 2 workers']), unit='x')}")


def app() -> None:
    from bench_ui import step_latency

    times = asyncio.run(step_latency(resolve_model("glaze-defects"), presses=40))
    print(f"app, key s to table and plot redrawn, 120x40: {spread(times, 1.0, ' ms')}")


def main() -> None:
    print(f"OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}, XLA_FLAGS={os.environ.get('XLA_FLAGS', '')!r}")
    print(load_note())
    session = Session(load_setup(resolve_model("glaze-defects")))
    analytic(session)
    numeric(session)
    if "--skip-ui" not in sys.argv:
        app()
    print(load_note())


if __name__ == "__main__":
    main()
