"""Numeric slopes on several threads give exactly the one-thread result.

``set_workers`` only changes how chunks of perturbations are scheduled, never
what each computes, so the slopes and kink marks must be equal bit for bit
(a property of the design, no outside source needed); a cancelled pass leaves
no work running; a user's custom layer is never run from a pool thread.
"""

from __future__ import annotations

import threading
from typing import Any, Callable, Iterator

import numpy as np
import pytest

from stepper.core import numeric
from stepper.core.layers import Dense
from stepper.core.activations import ACTIVATIONS
from stepper.core.network import Network
from stepper.core.numeric import iter_numeric_slopes, numeric_slopes, set_workers


@pytest.fixture
def two_workers() -> Iterator[None]:
    set_workers(2)
    yield
    set_workers(1)


@pytest.mark.parametrize("hidden", ["tanh", "relu", "leaky_relu"])
@pytest.mark.parametrize("method", ["central", "forward"])
def test_two_workers_give_the_one_worker_result_bit_for_bit(dense_net: Callable[..., Any], hidden: str,
                                                           method: str) -> None:
    net, theta = dense_net(5, [(24, hidden), (16, hidden), (3, "softmax")], "categorical_cross_entropy", seed=4)
    rng = np.random.default_rng(3)
    X = rng.normal(size=(64, 5))
    Y = np.eye(3)[rng.integers(0, 3, 64)]
    set_workers(1)
    one = numeric_slopes(net, theta, X, Y, method)
    set_workers(2)
    try:
        two = numeric_slopes(net, theta, X, Y, method)
    finally:
        set_workers(1)
    assert one.slopes.tobytes() == two.slopes.tobytes()
    assert np.array_equal(one.kink, two.kink)


def test_a_cancelled_pass_leaves_no_work_running(dense_net: Callable[..., Any], two_workers: None,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    net, theta = dense_net(8, [(64, "tanh"), (64, "tanh"), (1, "identity")], "mean_squared_error")
    X = np.random.default_rng(1).normal(size=(128, 8))
    Y = np.zeros((128, 1))
    running = {"now": 0, "calls": 0}
    lock = threading.Lock()
    original = numeric._dense_costs

    def counted(*args: Any, **kwargs: Any) -> Any:
        with lock:
            running["now"] += 1
            running["calls"] += 1
        try:
            return original(*args, **kwargs)
        finally:
            with lock:
                running["now"] -= 1

    monkeypatch.setattr(numeric, "_dense_costs", counted)
    numeric_slopes(net, theta, X, Y)
    full = running["calls"]
    running["calls"] = 0
    job = iter_numeric_slopes(net, theta, X, Y)
    next(job)
    next(job)
    job.close()
    calls = running["calls"]
    assert running["now"] == 0  # closing waited for the pieces in flight
    threading.Event().wait(0.2)
    assert running["calls"] == calls  # and nothing queued started afterwards
    assert calls <= full // 4  # far from the whole pass


class _ThreadNoting:
    """A custom layer (identity map) that records which threads run it."""

    def __init__(self, width: int) -> None:
        self.n_in = self.n_out = width
        self.threads: set[str] = set()

    @property
    def label(self) -> str:
        return "noting"

    def param_specs(self) -> tuple[()]:
        return ()

    def forward(self, params: dict[str, Any], X: np.ndarray) -> tuple[np.ndarray, None]:
        self.threads.add(threading.current_thread().name)
        return X.copy(), None

    def backward(self, params: dict[str, Any], cache: None, dOut: np.ndarray) -> tuple[dict[str, Any], np.ndarray]:
        return {}, dOut


def test_a_custom_layer_is_never_run_on_a_pool_thread(two_workers: None) -> None:
    noting = _ThreadNoting(6)
    net = Network(4, [Dense(4, 6, ACTIVATIONS["tanh"]), noting, Dense(6, 1, ACTIVATIONS["identity"])],
                  "mean_squared_error")
    rng = np.random.default_rng(2)
    theta = rng.normal(size=net.n_params)
    X = rng.normal(size=(20, 4))
    Y = rng.normal(size=(20, 1))
    numeric_slopes(net, theta, X, Y)
    assert noting.threads == {threading.current_thread().name}


def test_the_callers_numpy_error_state_holds_on_the_pool(dense_net: Callable[..., Any], two_workers: None) -> None:
    # Huge weights make the squared error overflow; the caller silences that, so
    # no RuntimeWarning may escape from a pool thread (pytest turns warnings into errors).
    net, theta = dense_net(3, [(8, "identity"), (1, "identity")], "mean_squared_error", scale=1e100)
    X = np.random.default_rng(5).normal(size=(16, 3))
    Y = np.zeros((16, 1))
    with np.errstate(over="ignore", invalid="ignore"):
        result = numeric_slopes(net, theta, X, Y)
    assert not np.all(np.isfinite(result.slopes))  # the costs overflowed: no finite differences
