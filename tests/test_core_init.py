"""Starting weights against the published schemes' formulas: bounds, spread and shape of the draws.

Sources (the papers' formulas; equation numbers recalled from memory):
- Glorot & Bengio (2010), "Understanding the difficulty of training deep feedforward
  neural networks", eq. 16: W ~ U[-sqrt(6) / sqrt(n_j + n_j+1), +sqrt(6) / sqrt(n_j + n_j+1)],
  whose variance is 2 / (n_j + n_j+1); the normal form with that variance is common practice.
- He, Zhang, Ren & Sun (2015), "Delving Deep into Rectifiers", eq. 10: a zero-mean
  Gaussian with standard deviation sqrt(2 / n_l), n_l the fan-in; the uniform form with
  the same variance, U[-sqrt(6 / n_l), +sqrt(6 / n_l)], is common practice.
The reference for the shape of a draw is scipy.stats (Kolmogorov-Smirnov test against
the uniform or normal law with the paper's parameters).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from stepper.core.activations import ACTIVATIONS
from stepper.core.init import initial_params
from stepper.core.layers import Dense
from stepper.core.network import Network

# Fan-in 300 and fan-out 100 differ, so a formula that swaps or drops one of them shows.
FAN_IN, FAN_OUT = 300, 100


def drawn(scheme: str, seed: int = 4, spread: float = 0.5) -> tuple[np.ndarray, np.ndarray]:
    """The (FAN_IN, FAN_OUT) weight matrix of one dense layer, and its biases."""
    net = Network(FAN_IN, [Dense(FAN_IN, FAN_OUT, ACTIVATIONS["tanh"])], "mean_squared_error")
    views = net.views(initial_params(net, scheme, seed, spread))
    return views[0]["W"], views[0]["b"]


# scheme: (law, its parameter from the paper's formula)
SCHEMES = {
    "glorot_uniform": ("uniform", np.sqrt(6.0 / (FAN_IN + FAN_OUT))),   # Glorot & Bengio eq. 16
    "glorot_normal": ("normal", np.sqrt(2.0 / (FAN_IN + FAN_OUT))),     # variance of eq. 16
    "he_normal": ("normal", np.sqrt(2.0 / FAN_IN)),                      # He et al. eq. 10
    "he_uniform": ("uniform", np.sqrt(6.0 / FAN_IN)),                    # variance of eq. 10
    "uniform": ("uniform", 0.5),                                         # U(-r, r), r = range
}


@pytest.mark.parametrize("scheme", sorted(SCHEMES))
def test_draws_follow_the_published_law(scheme: str) -> None:
    law, parameter = SCHEMES[scheme]
    W, b = drawn(scheme)
    values = W.ravel()
    assert np.all(b == 0.0)   # biases start at zero (common practice)
    if law == "uniform":
        # Bound: every draw within [-s, s], and 30,000 draws reach within 0.1% of it.
        assert np.max(np.abs(values)) <= parameter
        assert np.max(np.abs(values)) > 0.999 * parameter
        assert np.std(values) == pytest.approx(parameter / np.sqrt(3.0), rel=0.02)   # std of U(-s, s)
        reference = stats.uniform(loc=-parameter, scale=2.0 * parameter)
    else:
        # Spread: the sample standard deviation of 30,000 draws is within 2% of sigma
        # (its own standard error is about 0.4%).
        assert np.std(values) == pytest.approx(parameter, rel=0.02)
        reference = stats.norm(loc=0.0, scale=parameter)
    assert abs(np.mean(values)) < 4.0 * parameter / np.sqrt(values.size)
    # The whole law: a Kolmogorov-Smirnov test against the paper's distribution
    # (the seed is fixed, so this is deterministic; a 5% change of scale fails it).
    assert stats.kstest(values, reference.cdf).pvalue > 1e-3


def test_the_uniform_range_and_the_seed() -> None:
    W, _ = drawn("uniform", spread=0.2)
    assert np.max(np.abs(W)) <= 0.2 and np.max(np.abs(W)) > 0.199
    np.testing.assert_array_equal(drawn("he_normal", seed=9)[0], drawn("he_normal", seed=9)[0])
    assert not np.array_equal(drawn("he_normal", seed=9)[0], drawn("he_normal", seed=10)[0])


def test_an_unknown_scheme_is_refused() -> None:
    net = Network(2, [Dense(2, 1, ACTIVATIONS["identity"])], "mean_squared_error")
    with pytest.raises(KeyError):
        initial_params(net, "zeros", 0)
