"""Slopes of every built-in layer against `jax` (reverse mode, CPU, float64).

Each layer's function is written again with jax from its definition, not from
stepper's code: convolutions with ``jax.lax.conv_general_dilated`` (a
cross-correlation, as ONNX Conv; padding "SAME" is XLA's rule, the odd zero
after), pooling with ``jax.lax.reduce_window``, the norms, dropout and the
embedding with ``jax.numpy``. ``jax.grad`` of ``sum(R * layer(X))`` for a random
``R`` gives the reference slopes of the parameters and of the input; stepper's
``backward`` with ``dOut = R`` must match them (Bradbury et al., JAX: composable
transformations of Python+NumPy programs, https://github.com/jax-ml/jax).

Tolerance: 1e-10 relative per entry; entries below 1e-13 of the array's largest
are compared absolutely at that level (a relative error means nothing at zero).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

jax = pytest.importorskip("jax")
jax.config.update("jax_enable_x64", True)
import jax.numpy as jnp  # noqa: E402
from jax import lax  # noqa: E402

from stepper.core.activations import ACTIVATIONS  # noqa: E402
from stepper.core.layers import (  # noqa: E402
    BatchNorm, Conv, Dense, Dropout, Embedding, Flatten, LayerNorm, Mode, Pool,
)
from stepper.core.network import Network  # noqa: E402
from layer_cases import Case, cases, grid, input_of, params_of  # noqa: E402

RTOL = 1e-10
CASES = cases()


def close(ours: np.ndarray, ref: Any) -> None:
    ref = np.asarray(ref)
    assert ours.shape == ref.shape
    scale = float(np.max(np.abs(ref))) if ref.size else 0.0
    np.testing.assert_allclose(ours, ref, rtol=RTOL, atol=1e-13 * scale)


def jax_activation(name: str, Z: Any) -> Any:
    return {"identity": lambda z: z, "tanh": jnp.tanh, "sigmoid": jax.nn.sigmoid, "relu": jax.nn.relu}[name](Z)


def jax_padding(padding: Any, dims: int) -> Any:
    if padding in ("same", "valid"):
        return padding.upper()
    return [(padding, padding)] * dims


def reference(case: Case, params: dict[str, Any], X: Any) -> Any:
    """The layer's output ``(n, n_out)``, written from its definition with jax."""
    layer, s = case.layer, case.settings
    n = X.shape[0]
    if isinstance(layer, Conv):
        x = X.reshape((n,) + layer.in_shape)
        z = lax.conv_general_dilated(x, params["K"], s["stride"], jax_padding(s["padding"], len(s["kernel"])))
        if s.get("bias", True):
            z = z + params["b"].reshape((1, -1) + (1,) * len(s["kernel"]))
        return jax_activation(s["activation"], z).reshape(n, -1)
    if isinstance(layer, Pool):
        x = X.reshape((n,) + layer.in_shape)
        window, stride = (1, 1) + s["size"], (1, 1) + s["stride"]
        if layer.how == "max":
            y = lax.reduce_window(x, -jnp.inf, lax.max, window, stride, "VALID")
        else:
            y = lax.reduce_window(x, 0.0, lax.add, window, stride, "VALID") / np.prod(s["size"])
        return y.reshape(n, -1)
    if isinstance(layer, Flatten):
        return X.reshape(n, -1)
    if isinstance(layer, Dropout):
        # The documented mask: kept where default_rng([seed, step]).random >= rate, scaled by 1/(1-rate).
        keep = np.random.default_rng([layer.seed, layer.step]).random(X.shape) >= s["rate"]
        return X * keep / (1.0 - s["rate"])
    if isinstance(layer, LayerNorm):
        mean = jnp.mean(X, axis=1, keepdims=True)
        var = jnp.mean((X - mean) ** 2, axis=1, keepdims=True)
        return (X - mean) / jnp.sqrt(var + s["epsilon"]) * params["scale"].ravel() + params["shift"].ravel()
    if isinstance(layer, BatchNorm):
        C = layer.in_shape[0]
        x = X.reshape(n, C, -1)
        mean = jnp.mean(x, axis=(0, 2), keepdims=True)
        var = jnp.mean((x - mean) ** 2, axis=(0, 2), keepdims=True)
        y = (x - mean) / jnp.sqrt(var + s["epsilon"]) * params["scale"][:, None] + params["shift"][:, None]
        return y.reshape(n, -1)
    if isinstance(layer, Embedding):
        cats = X[:, list(s["columns"])].astype(jnp.int64)
        others = [i for i in range(X.shape[1]) if i not in s["columns"]]
        return jnp.concatenate([jnp.take(params["E"], cats, axis=0).reshape(n, -1), X[:, others]], axis=1)
    raise AssertionError(case.name)


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_forward_and_slopes_match_jax(case: Case) -> None:
    layer = case.layer
    params, X = params_of(layer), input_of(layer)
    R = np.random.default_rng(7).normal(size=(X.shape[0], layer.n_out))
    out, cache = layer.forward(params, X)
    grads, dX = layer.backward(params, cache, R)
    # Category numbers are not quantities: an embedding's input slope is taken for the
    # passed-through columns only (the category columns are held fixed).
    moving = [i for i in range(X.shape[1]) if not (isinstance(layer, Embedding) and i in layer.columns)]

    @jax.jit
    def ref(p: dict[str, Any], rest: Any) -> Any:
        ref_out, pull = jax.vjp(lambda p, rest: reference(case, p, jnp.asarray(X).at[:, moving].set(rest)), p, rest)
        return ref_out, pull(jnp.asarray(R))

    ref_out, (ref_p, ref_x) = ref({k: jnp.asarray(v) for k, v in params.items()}, jnp.asarray(X[:, moving]))
    close(out, ref_out)
    close(dX[:, moving], ref_x)
    assert np.all(np.delete(dX, moving, axis=1) == 0.0)
    assert set(grads) == set(params)
    for key in params:
        close(grads[key], ref_p[key])


def test_batch_norm_in_evaluation_matches_jax_on_running_statistics() -> None:
    # Ioffe & Szegedy (2015), Algorithm 2: at inference the running mean and variance replace the batch's.
    layer = BatchNorm((3, 4))
    rng = np.random.default_rng(3)
    state = {"running_mean": rng.normal(size=3), "running_var": rng.uniform(0.5, 2.0, 3)}
    bound = layer.bind(Mode(training=False), state)
    params, X = params_of(layer), input_of(layer)
    R = rng.normal(size=(X.shape[0], layer.n_out))

    def ref(p: dict[str, Any], x: Any) -> Any:
        x3 = x.reshape(x.shape[0], 3, 4)
        y = ((x3 - state["running_mean"][:, None]) / jnp.sqrt(state["running_var"][:, None] + 1e-5)
             * p["scale"][:, None] + p["shift"][:, None])
        return y.reshape(x.shape[0], -1)

    out, cache = bound.forward(params, X)
    jp = {k: jnp.asarray(v) for k, v in params.items()}
    close(out, ref(jp, jnp.asarray(X)))
    grads, dX = bound.backward(params, cache, R)
    ref_p, ref_x = jax.jit(jax.grad(lambda p, x: jnp.sum(R * ref(p, x)), argnums=(0, 1)))(jp, jnp.asarray(X))
    close(dX, ref_x)
    for key in params:
        close(grads[key], ref_p[key])


def test_a_whole_convolutional_network_matches_jax() -> None:
    # conv2d (same) -> batch norm -> max pool -> conv1d-free flatten -> layer norm -> dense softmax,
    # with categorical cross-entropy computed from the logits: the network's cost and every slope.
    act = ACTIVATIONS
    conv = Conv((1, 6, 6), 3, grid((6, 6), (3, 3), (1, 1), "same"), act["relu"])
    layers = [conv, BatchNorm((3, 6, 6)), Pool((3, 6, 6), grid((6, 6), (2, 2), (2, 2)), "max"),
              Flatten((3, 3, 3)), LayerNorm((27,)), Dense(27, 4, act["softmax"])]
    net = Network(36, layers, "categorical_cross_entropy", input_shape=(1, 6, 6))
    rng = np.random.default_rng(11)
    theta = rng.normal(0.0, 0.5, net.n_params)
    X = rng.normal(size=(10, 36))
    Y = np.eye(4)[rng.integers(0, 4, 10)]
    views = net.views(theta)

    def cost(p: list[dict[str, Any]]) -> Any:
        x = X.reshape(10, 1, 6, 6)
        z = lax.conv_general_dilated(x, p[0]["K"], (1, 1), "SAME") + p[0]["b"][None, :, None, None]
        a = jax.nn.relu(z)
        mean = jnp.mean(a, axis=(0, 2, 3), keepdims=True)
        var = jnp.mean((a - mean) ** 2, axis=(0, 2, 3), keepdims=True)
        a = (a - mean) / jnp.sqrt(var + 1e-5) * p[1]["scale"][None, :, None, None] + p[1]["shift"][None, :, None, None]
        a = lax.reduce_window(a, -jnp.inf, lax.max, (1, 1, 2, 2), (1, 1, 2, 2), "VALID").reshape(10, -1)
        mean = jnp.mean(a, axis=1, keepdims=True)
        var = jnp.mean((a - mean) ** 2, axis=1, keepdims=True)
        a = (a - mean) / jnp.sqrt(var + 1e-5) * p[4]["scale"] + p[4]["shift"]
        logits = a @ p[5]["W"] + p[5]["b"]
        return -jnp.sum(Y * jax.nn.log_softmax(logits)) / 10  # mean over samples of -sum y log p

    jp = [{k: jnp.asarray(v) for k, v in d.items()} for d in views]
    value, slopes = net.cost_and_slopes(theta, X, Y)
    ref = jax.jit(jax.grad(cost))(jp)
    np.testing.assert_allclose(value, float(jax.jit(cost)(jp)), rtol=1e-12)
    for index, d in enumerate(views):
        for key in d:
            block = net.layout.find_block(index, key)
            close(slopes[block.start : block.stop].reshape(block.shape), ref[index][key])
