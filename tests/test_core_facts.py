"""Textbook facts about activations and losses, and values from reference libraries.

Books cited (section numbers recalled from memory unless a test says otherwise):
- Goodfellow, Bengio & Courville, *Deep Learning*, MIT Press, 2016 ("DL").
- Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006 ("PRML").
Reference libraries: scipy.special (expit, softmax, log_softmax) and
scipy.differentiate.derivative (adaptive finite differences with Richardson
extrapolation), numpy.logaddexp.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.special
from scipy.differentiate import derivative

from stepper.core.activations import ACTIVATIONS, LEAKY_SLOPE, log_softmax, softmax
from stepper.core.layers import Dense
from stepper.core.losses import EPS, FUSED, LOSSES
from stepper.core.network import Network

EPS64 = float(np.finfo(np.float64).eps)

# Points away from the kink at 0, from -12 to 12.
Z = np.concatenate([-np.logspace(-2, np.log10(12.0), 40), np.logspace(-2, np.log10(12.0), 40)])


def act(name: str, z: np.ndarray) -> np.ndarray:
    return ACTIVATIONS[name].fn(z)


def slope(name: str, z: np.ndarray) -> np.ndarray:
    a = ACTIVATIONS[name]
    assert a.derivative is not None
    return a.derivative(z, a.fn(z))


# -- values against reference libraries ------------------------------------------------------


def test_values_match_reference_libraries() -> None:
    # scipy.special.expit is the logistic sigmoid; numpy.logaddexp(0, z) = log(1 + e^z).
    # Our sigmoid is 0.5 (1 + tanh(z / 2)): accurate to about eps absolutely, not
    # relatively for very negative z (where it rounds to multiples of eps / 2).
    np.testing.assert_allclose(act("sigmoid", Z), scipy.special.expit(Z), rtol=0, atol=EPS64)
    np.testing.assert_allclose(act("softplus", Z), np.logaddexp(0.0, Z), rtol=1e-15)
    # tanh is the logistic function rescaled: tanh(z) = 2 sigma(2z) - 1 (a textbook
    # identity, e.g. PRML section 5.1, recalled from memory), with scipy.special.expit as sigma.
    np.testing.assert_allclose(act("tanh", Z), 2.0 * scipy.special.expit(2.0 * Z) - 1.0, rtol=0, atol=4 * EPS64)
    rows = np.random.default_rng(0).normal(0.0, 20.0, size=(50, 6))
    np.testing.assert_allclose(softmax(rows), scipy.special.softmax(rows, axis=1), rtol=1e-13, atol=1e-300)
    np.testing.assert_allclose(log_softmax(rows), scipy.special.log_softmax(rows, axis=1), rtol=1e-13,
                               atol=1e-13)


def test_no_overflow_for_large_inputs() -> None:
    big = np.array([-1000.0, -50.0, 50.0, 1000.0])
    with np.errstate(over="raise", invalid="raise", divide="raise"):
        assert np.array_equal(act("sigmoid", big)[[0, 3]], [0.0, 1.0])
        np.testing.assert_allclose(act("softplus", big), np.logaddexp(0.0, big), rtol=1e-15)
        assert np.all(np.isfinite(softmax(np.array([[1000.0, -1000.0, 0.0]]))))


# -- derivatives ---------------------------------------------------------------------------------


def test_sigmoid_slope_at_zero_is_a_quarter() -> None:
    # sigma'(x) = sigma(x) (1 - sigma(x)), so sigma'(0) = 1/4 (DL section 3.10).
    assert slope("sigmoid", np.array([0.0]))[0] == 0.25
    np.testing.assert_allclose(slope("sigmoid", Z), scipy.special.expit(Z) * (1 - scipy.special.expit(Z)),
                               rtol=0, atol=EPS64)


def test_tanh_slope_is_sech_squared() -> None:
    # tanh'(z) = sech(z)^2 = 1 / cosh(z)^2 (calculus; PRML section 5.3.2 writes it as
    # 1 - tanh^2, which is what the code computes, so the check uses the other form).
    np.testing.assert_allclose(slope("tanh", Z), 1.0 / np.cosh(Z) ** 2, rtol=1e-9, atol=EPS64)
    assert slope("tanh", np.array([0.0]))[0] == 1.0


def test_softplus_slope_is_sigmoid() -> None:
    # d/dx log(1 + e^x) = sigma(x) (DL section 3.10).
    np.testing.assert_allclose(slope("softplus", Z), scipy.special.expit(Z), rtol=0, atol=EPS64)


def test_rectifier_slopes() -> None:
    # ReLU: slope 0 below zero and 1 above (DL section 6.3.1). Leaky ReLU: slope
    # 0.01 below zero (Maas, Hannun & Ng 2013, "Rectifier Nonlinearities Improve
    # Neural Network Acoustic Models").
    assert LEAKY_SLOPE == 0.01
    np.testing.assert_array_equal(slope("relu", Z), (Z > 0).astype(float))
    np.testing.assert_array_equal(slope("leaky_relu", Z), np.where(Z > 0, 1.0, 0.01))
    np.testing.assert_array_equal(act("leaky_relu", Z), np.where(Z > 0, Z, 0.01 * Z))
    assert ACTIVATIONS["relu"].kink and ACTIVATIONS["leaky_relu"].kink
    assert not any(a.kink for name, a in ACTIVATIONS.items() if name not in ("relu", "leaky_relu"))


@pytest.mark.parametrize("name", [n for n, a in ACTIVATIONS.items() if a.elementwise])
def test_elementwise_slopes_match_scipy_differentiate(name: str) -> None:
    # Reference: scipy.differentiate.derivative (order-8 differences with
    # extrapolation). Z stays at least 0.01 from the kinks and the initial step is
    # small enough not to straddle them. Its accuracy is about 1e-10 absolute here
    # (limited by rounding in the function values), far below any formula error.
    ref = derivative(lambda z: ACTIVATIONS[name].fn(z), Z, initial_step=0.004)
    np.testing.assert_allclose(slope(name, Z), ref.df, rtol=1e-9, atol=1e-9)


def test_softmax_jacobian() -> None:
    # d softmax_k / d z_j = p_k (I_kj - p_j) (PRML section 4.3.4); our softmax is
    # coupled, so it gives J^T v, which must equal that matrix times v.
    rng = np.random.default_rng(1)
    z = rng.normal(size=(1, 5))
    v = rng.normal(size=(1, 5))
    p = softmax(z)[0]
    J = np.diag(p) - np.outer(p, p)
    np.testing.assert_allclose(ACTIVATIONS["softmax"].vjp(z, softmax(z), v)[0], J.T @ v[0], rtol=1e-13)
    # and against SciPy's adaptive differences, column by column
    for j in range(5):
        def column(t: np.ndarray, j: int = j) -> np.ndarray:
            zz = np.repeat(z, t.size, axis=0)
            zz[:, j] = t.ravel()
            return scipy.special.softmax(zz, axis=1) @ v[0]
        ref = derivative(lambda t: column(t).reshape(t.shape), np.array([z[0, j]]), initial_step=0.01)
        assert ref.df[0] == pytest.approx((J.T @ v[0])[j], rel=1e-9)


# -- output slopes of loss and activation pairs ---------------------------------------------------


def output_dz(activation: str, loss: str, Z_out: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Slope of the cost w.r.t. the output layer's pre-activations, from a one-layer network.

    A single dense layer with W = I and b = 0 takes X = Z_out through unchanged,
    so the slope of the bias is the column sum of dCost/dZ and the slope of W is
    X^T dCost/dZ; the backward pass gives dCost/dZ through the network's view.
    """
    n, m = Z_out.shape
    net = Network(m, [Dense(m, m, ACTIVATIONS[activation])], loss)
    theta = np.zeros(net.n_params)
    theta[: m * m] = np.eye(m).ravel()
    trace = net.forward(theta, Z_out)
    _, grads, _ = net.backward(theta, trace, Y)
    W = net.views(grads)[0]["W"]
    b = net.views(grads)[0]["b"]
    # Recover dZ from W = X^T dZ with X = Z_out (invertible here: n == m).
    dZ = np.linalg.solve(Z_out.T, W)
    np.testing.assert_allclose(dZ.sum(axis=0), b, rtol=1e-9, atol=1e-12)
    return dZ


def test_softmax_with_cross_entropy_gives_p_minus_y() -> None:
    # Softmax outputs with categorical cross-entropy: dE/da_k = p_k - t_k per sample
    # (PRML section 4.3.4; DL section 6.2.2.3). Our cost averages over the n
    # samples, so the slope is (p - y) / n.
    rng = np.random.default_rng(2)
    n = m = 4
    Zo = rng.normal(size=(n, m))
    Y = np.eye(m)[[2, 0, 3, 1]]
    expected = (scipy.special.softmax(Zo, axis=1) - Y) / n
    np.testing.assert_allclose(FUSED[("softmax", "categorical_cross_entropy")].grad_z(Zo, Y), expected,
                               rtol=1e-12, atol=1e-16)
    np.testing.assert_allclose(output_dz("softmax", "categorical_cross_entropy", Zo, Y), expected,
                               rtol=1e-9, atol=1e-12)


def test_sigmoid_with_binary_cross_entropy_gives_p_minus_y() -> None:
    # Logistic outputs with cross-entropy: dE/da = y - t (PRML section 4.3.2;
    # DL section 6.2.2.2). Averaged over n samples and m outputs: (p - y) / (n m).
    rng = np.random.default_rng(3)
    n = m = 3
    Zo = rng.normal(size=(n, m))
    Y = rng.integers(0, 2, size=(n, m)).astype(float)
    expected = (scipy.special.expit(Zo) - Y) / (n * m)
    np.testing.assert_allclose(FUSED[("sigmoid", "binary_cross_entropy")].grad_z(Zo, Y), expected,
                               rtol=1e-12, atol=1e-16)
    np.testing.assert_allclose(output_dz("sigmoid", "binary_cross_entropy", Zo, Y), expected,
                               rtol=1e-9, atol=1e-12)


def test_identity_with_half_squared_error_gives_a_minus_y() -> None:
    # Linear outputs with the sum-of-squares error: dE/da_k = y_k - t_k (PRML
    # section 5.3.1). Averaged over n samples: (a - y) / n.
    rng = np.random.default_rng(4)
    n = m = 3
    Zo = rng.normal(size=(n, m))
    Y = rng.normal(size=(n, m))
    np.testing.assert_allclose(output_dz("identity", "half_squared_error", Zo, Y), (Zo - Y) / n,
                               rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(LOSSES["mean_squared_error"].grad(Zo, Y), 2.0 * (Zo - Y) / (n * m),
                               rtol=1e-15)  # d/da (a - y)^2 = 2 (a - y): calculus


def test_fused_and_plain_cross_entropies_agree() -> None:
    # The logit forms (log-sum-exp) equal the plain definitions where no clipping happens.
    rng = np.random.default_rng(5)
    Zo = rng.normal(size=(6, 3))
    Y = np.eye(3)[rng.integers(0, 3, 6)]
    plain_cce = LOSSES["categorical_cross_entropy"].value(softmax(Zo), Y)
    assert FUSED[("softmax", "categorical_cross_entropy")].value(Zo, Y) == pytest.approx(plain_cce, rel=1e-13)
    plain_bce = LOSSES["binary_cross_entropy"].value(scipy.special.expit(Zo), Y)
    assert FUSED[("sigmoid", "binary_cross_entropy")].value(Zo, Y) == pytest.approx(plain_bce, rel=1e-13)
    # The clipping at EPS keeps log(0) out of the plain forms.
    assert np.isfinite(LOSSES["binary_cross_entropy"].value(np.array([[0.0, 1.0]]), np.array([[1.0, 0.0]])))
    assert LOSSES["categorical_cross_entropy"].value(np.array([[0.0, 1.0]]), np.array([[1.0, 0.0]])) == \
        pytest.approx(-np.log(EPS))


def test_losses_keep_leading_axes() -> None:
    # Many perturbed copies of the outputs are scored in one call (stepper.core.losses docstring).
    rng = np.random.default_rng(6)
    A = rng.uniform(0.1, 0.9, size=(4, 5, 3))
    Y = rng.uniform(0.1, 0.9, size=(5, 3))
    for loss in LOSSES.values():
        stacked = loss.value(A, Y)
        assert stacked.shape == (4,)
        np.testing.assert_allclose(stacked, [loss.value(A[i], Y) for i in range(4)], rtol=1e-14)
