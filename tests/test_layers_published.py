"""Batch norm and layer norm against their published equations, written out as printed.

- Ioffe & Szegedy, "Batch Normalization: Accelerating Deep Network Training by
  Reducing Internal Covariate Shift", ICML 2015: Algorithm 1 (the transform over
  a mini-batch), the chain rule of section 3 (the six slope equations), and
  Algorithm 2, step 10 (inference with the population statistics);
- Ba, Kiros & Hinton, "Layer Normalization", 2016, equation 4 (statistics over
  the H hidden units of one sample) and equation 5's gain and bias. The paper
  has no epsilon, so that check runs with epsilon = 0.
"""

from __future__ import annotations

import numpy as np

from stepper.core.layers import BatchNorm, LayerNorm, Mode

EPS = 1e-5


def test_batch_norm_forward_and_slopes_follow_algorithm_1_and_section_3() -> None:
    rng = np.random.default_rng(21)
    m, d = 7, 3  # a mini-batch of m samples of d features (flat rows: one channel per feature)
    x = rng.normal(2.0, 1.5, (m, d))
    gamma, beta = rng.normal(1.0, 0.3, d), rng.normal(0.0, 0.3, d)
    dl_dy = rng.normal(size=(m, d))

    layer = BatchNorm((d,), epsilon=EPS)
    params = {"scale": gamma, "shift": beta}
    y, cache = layer.forward(params, x)
    grads, dl_dx = layer.backward(params, cache, dl_dy)

    # Algorithm 1, for each feature k over the mini-batch B = {x_1..m}.
    mu = np.sum(x, axis=0) / m                             # mini-batch mean
    var = np.sum((x - mu) ** 2, axis=0) / m                # mini-batch variance
    x_hat = (x - mu) / np.sqrt(var + EPS)                  # normalize
    np.testing.assert_allclose(y, gamma * x_hat + beta, rtol=1e-13)  # scale and shift

    # Section 3, the slopes as printed.
    dl_dxhat = dl_dy * gamma
    dl_dvar = np.sum(dl_dxhat * (x - mu), axis=0) * -0.5 * (var + EPS) ** -1.5
    dl_dmu = np.sum(dl_dxhat * -1.0 / np.sqrt(var + EPS), axis=0) + dl_dvar * np.sum(-2.0 * (x - mu), axis=0) / m
    expected_dx = dl_dxhat / np.sqrt(var + EPS) + dl_dvar * 2.0 * (x - mu) / m + dl_dmu / m
    np.testing.assert_allclose(dl_dx, expected_dx, rtol=1e-11, atol=1e-14)
    np.testing.assert_allclose(grads["scale"], np.sum(dl_dy * x_hat, axis=0), rtol=1e-12)
    np.testing.assert_allclose(grads["shift"], np.sum(dl_dy, axis=0), rtol=1e-12)


def test_batch_norm_on_images_takes_statistics_per_channel_over_samples_and_positions() -> None:
    # Section 3.2: for convolutional layers the mini-batch of a channel is every sample at every
    # position, m = samples x height x width, with one gamma and beta per channel.
    rng = np.random.default_rng(22)
    x = rng.normal(size=(4, 2, 3, 3))
    layer = BatchNorm((2, 3, 3), epsilon=EPS)
    gamma, beta = np.array([1.5, 0.5]), np.array([0.2, -0.1])
    y, _ = layer.forward({"scale": gamma, "shift": beta}, x.reshape(4, -1))
    for c in range(2):
        batch = x[:, c]
        expected = gamma[c] * (batch - batch.mean()) / np.sqrt(batch.var() + EPS) + beta[c]
        np.testing.assert_allclose(y.reshape(x.shape)[:, c], expected, rtol=1e-13)


def test_batch_norm_inference_follows_algorithm_2_and_keeps_running_statistics() -> None:
    rng = np.random.default_rng(23)
    d = 3
    layer = BatchNorm((d,), momentum=0.8, epsilon=EPS)
    gamma, beta = rng.normal(1.0, 0.3, d), rng.normal(0.0, 0.3, d)
    state = {"running_mean": rng.normal(size=d), "running_var": rng.uniform(0.5, 2.0, d)}
    x = rng.normal(size=(5, d))
    y, _ = layer.bind(Mode(training=False), state).forward({"scale": gamma, "shift": beta}, x)
    # Algorithm 2, step 10: y = gamma / sqrt(Var[x] + eps) * x + (beta - gamma E[x] / sqrt(Var[x] + eps)).
    root = np.sqrt(state["running_var"] + EPS)
    np.testing.assert_allclose(y, gamma / root * x + (beta - gamma * state["running_mean"] / root), rtol=1e-12)
    # The running statistics move towards the batch's by (1 - momentum) per step (ONNX
    # BatchNormalization's definition; Algorithm 2 averages over many batches instead).
    _, cache = layer.forward({"scale": gamma, "shift": beta}, x)
    after = layer.next_state(cache, state)
    np.testing.assert_allclose(after["running_mean"], 0.8 * state["running_mean"] + 0.2 * x.mean(axis=0))
    np.testing.assert_allclose(after["running_var"], 0.8 * state["running_var"] + 0.2 * x.var(axis=0))


def test_layer_norm_follows_equation_4_over_the_units_of_each_sample() -> None:
    rng = np.random.default_rng(24)
    n, H = 5, 6
    a = rng.normal(1.0, 2.0, (n, H))  # summed inputs of H hidden units, one row per sample
    g, b = rng.normal(1.0, 0.3, H), rng.normal(0.0, 0.3, H)
    layer = LayerNorm((H,), epsilon=0.0)
    y, cache = layer.forward({"scale": g, "shift": b}, a)
    mu = np.sum(a, axis=1, keepdims=True) / H                          # mu^l
    sigma = np.sqrt(np.sum((a - mu) ** 2, axis=1, keepdims=True) / H)   # sigma^l
    np.testing.assert_allclose(y, g / sigma * (a - mu) + b, rtol=1e-12)
    # Slopes: Ioffe & Szegedy's section-3 equations with the mini-batch replaced by the H units
    # of one sample (the statistics Ba et al. take), per sample.
    dl_dy = rng.normal(size=(n, H))
    grads, dl_da = layer.backward({"scale": g, "shift": b}, cache, dl_dy)
    dl_dxhat = dl_dy * g
    var = sigma**2
    dl_dvar = np.sum(dl_dxhat * (a - mu), axis=1, keepdims=True) * -0.5 * var**-1.5
    dl_dmu = np.sum(-dl_dxhat / sigma, axis=1, keepdims=True) + dl_dvar * np.sum(-2.0 * (a - mu), axis=1,
                                                                                  keepdims=True) / H
    np.testing.assert_allclose(dl_da, dl_dxhat / sigma + dl_dvar * 2.0 * (a - mu) / H + dl_dmu / H,
                               rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(grads["scale"], np.sum(dl_dy * (a - mu) / sigma, axis=0), rtol=1e-12)
    np.testing.assert_allclose(grads["shift"], np.sum(dl_dy, axis=0), rtol=1e-12)
