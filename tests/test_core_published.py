"""A published worked example, reproduced through a model file.

Source for every number below: M. Mazur, "A Step by Step Backpropagation
Example" (2015), https://mattmazur.com/2015/03/17/a-step-by-step-backpropagation-example/

Network of the post: 2 inputs, 2 sigmoid hidden units, 2 sigmoid outputs,
cost E_total = sum over outputs of 1/2 (target - out)^2 for its one sample,
which is our loss "half_squared_error" with n_samples = 1. The post's weight
w_k names are mapped onto our (n_in, n_out) matrices:

    hidden W1 = [[w1, w3], [w2, w4]]   (w1: i1->h1, w2: i2->h1, w3: i1->h2, w4: i2->h2)
    output W2 = [[w5, w7], [w6, w8]]   (w5: h1->o1, w6: h2->o1, w7: h1->o2, w8: h2->o2)

Each published figure is compared at exactly the number of decimals the post
prints: our value rounded to that many decimals must equal the printed text.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stepper.core.numeric import numeric_slopes
from stepper.formats.model_file import Setup, load_setup

from published_example import POST_NAMES, PUBLISHED_AFTER_ONE_STEP, same_as_published, write_example

@pytest.fixture
def setup(tmp_path: Path) -> Setup:
    return load_setup(write_example(tmp_path))


def test_file_maps_the_post_weights(setup: Setup) -> None:
    # Mazur (2015), "Overview": w1..w8 = .15 .20 .25 .30 .40 .45 .50 .55, b1 = .35, b2 = .60.
    given = {"w1": 0.15, "w2": 0.20, "w3": 0.25, "w4": 0.30,
             "w5": 0.40, "w6": 0.45, "w7": 0.50, "w8": 0.55}
    layout = setup.network.layout
    for post, ours in POST_NAMES.items():
        assert setup.theta0[layout.lookup(ours)] == given[post]
    for name in ("L1.b[0]", "L1.b[1]"):
        assert setup.theta0[layout.lookup(name)] == 0.35
    for name in ("L2.b[0]", "L2.b[1]"):
        assert setup.theta0[layout.lookup(name)] == 0.60


def test_forward_pass_matches_published(setup: Setup) -> None:
    out = setup.network.predict(setup.theta0, setup.data.X)
    assert out.shape == (1, 2)
    # Mazur (2015), "The Forward Pass": out_o1 = 0.75136507, out_o2 = 0.772928465.
    assert same_as_published(out[0, 0], "0.75136507")
    assert same_as_published(out[0, 1], "0.772928465")
    # Mazur (2015), "Calculating the Total Error": E_total = 0.298371109.
    assert same_as_published(setup.network.cost(setup.theta0, setup.data.X, setup.data.Y), "0.298371109")


def test_slopes_match_published(setup: Setup) -> None:
    cost, slopes = setup.network.cost_and_slopes(setup.theta0, setup.data.X, setup.data.Y)
    layout = setup.network.layout
    assert same_as_published(cost, "0.298371109")  # Mazur (2015): E_total
    # Mazur (2015), "Output Layer": dE_total/dw5 = 0.082167041.
    assert same_as_published(slopes[layout.lookup(POST_NAMES["w5"])], "0.082167041")
    # Mazur (2015), "Hidden Layer": dE_total/dw1 = 0.000438568.
    assert same_as_published(slopes[layout.lookup(POST_NAMES["w1"])], "0.000438568")


def test_numeric_slopes_match_published(setup: Setup) -> None:
    # The same two published slopes by central differences, which never use backprop.
    numeric = numeric_slopes(setup.network, setup.theta0, setup.data.X, setup.data.Y, "central")
    layout = setup.network.layout
    assert same_as_published(numeric.slopes[layout.lookup(POST_NAMES["w5"])], "0.082167041")
    assert same_as_published(numeric.slopes[layout.lookup(POST_NAMES["w1"])], "0.000438568")
    assert not numeric.kink.any()


def test_one_step_matches_published_weights(setup: Setup) -> None:
    _, slopes = setup.network.cost_and_slopes(setup.theta0, setup.data.X, setup.data.Y)
    layout = setup.network.layout
    # Mazur (2015): one step of gradient descent at rate 0.5 on the weights only,
    # every slope taken at the original weights.
    updated = setup.theta0 - 0.5 * np.where(layout.is_bias, 0.0, slopes)
    for post, published in PUBLISHED_AFTER_ONE_STEP.items():
        assert same_as_published(updated[layout.lookup(POST_NAMES[post])], published), post
    assert np.array_equal(updated[layout.is_bias], setup.theta0[layout.is_bias])


def test_rounding_comparison_can_fail() -> None:
    # The comparison is strict at the last printed digit.
    assert same_as_published(0.751365069552, "0.75136507")
    assert not same_as_published(0.75136508, "0.75136507")
    assert not same_as_published(0.751365064, "0.75136507")
