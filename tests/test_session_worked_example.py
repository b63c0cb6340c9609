"""The published worked example of one backpropagation step, driven through the Session.

Source: M. Mazur, "A Step by Step Backpropagation Example" (blog post, 2015).
A 2-2-2 network, sigmoid on both layers, one training sample, error
``1/2 * sum_k (target_k - out_k)^2``, plain gradient descent at rate 0.5 on the
eight weights while the biases stay fixed (the post updates weights only).

The post's notation against ours: hidden unit h1 = sigmoid(w1 i1 + w2 i2 + b1),
h2 = sigmoid(w3 i1 + w4 i2 + b1); output o1 = sigmoid(w5 h1 + w6 h2 + b2),
o2 = sigmoid(w7 h1 + w8 h2 + b2). Our W is (n_in, n_out), W[i, j] from input i
to unit j, so W1 = [[w1, w3], [w2, w4]] and W2 = [[w5, w7], [w6, w8]].

The later figures of the post (the error after the first round and after
10,000 rounds) do not follow exactly from its own method; they are recomputed
here with the Session and with an independent plain-numpy reimplementation,
and the comparison with the published digits is written out below.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from stepper.formats.model_file import load_setup
from stepper.session import Session

from published_example import (
    B1, B2, INPUTS, POST_NAMES, PUBLISHED_AFTER_ONE_STEP, TARGETS, W, same_as_published, write_example,
)

RATE = 0.5


@pytest.fixture
def session(tmp_path: Path) -> Session:
    s = Session(load_setup(write_example(tmp_path)), rate=RATE)
    s.freeze_matching("*.b[*]")
    return s


def weight(session: Session, post_name: str) -> float:
    return float(session.theta[session.net.layout.index_of[POST_NAMES[post_name]]])


def numpy_reference(n_steps: int, learn_biases: bool) -> tuple[float, list[float]]:
    """Independent reimplementation of the post's method in plain numpy.

    Returns the error before any step and the error after each step. The
    chain rule is written out as in the post: delta_o = (out - target) * out * (1 - out),
    delta_h = (W2 delta_o) * h * (1 - h); every slope uses the weights from
    before the step (the post says so for the hidden layer).
    """
    x, y = np.array(INPUTS), np.array(TARGETS)
    W1 = np.array([[W["w1"], W["w3"]], [W["w2"], W["w4"]]])
    W2 = np.array([[W["w5"], W["w7"]], [W["w6"], W["w8"]]])
    b1, b2 = np.full(2, B1), np.full(2, B2)

    def forward() -> tuple[np.ndarray, np.ndarray]:
        h = 1.0 / (1.0 + np.exp(-(x @ W1 + b1)))
        return h, 1.0 / (1.0 + np.exp(-(h @ W2 + b2)))

    errors = []
    for _ in range(n_steps + 1):
        h, out = forward()
        errors.append(0.5 * float(np.sum((y - out) ** 2)))
        delta_o = (out - y) * out * (1.0 - out)
        delta_h = (W2 @ delta_o) * h * (1.0 - h)
        W2 = W2 - RATE * np.outer(h, delta_o)
        W1 = W1 - RATE * np.outer(x, delta_h)
        if learn_biases:
            b2 = b2 - RATE * delta_o
            b1 = b1 - RATE * delta_h
    return errors[0], errors[1:]


def test_forward_pass_matches_the_post(session: Session) -> None:
    # Mazur 2015: out_h1 = 0.593269992, out_h2 = 0.596884378 (forward pass section).
    X = session.setup.data.X
    hidden = session.net.forward(session.theta, X)[0][0]
    assert same_as_published(float(hidden[0, 0]), "0.593269992")
    assert same_as_published(float(hidden[0, 1]), "0.596884378")
    # Mazur 2015: E_total = 0.298371109 (recalled from memory of the post, and
    # equal to the independent numpy reimplementation below).
    assert same_as_published(session.train_cost(), "0.298371109")
    assert session.train_cost() == pytest.approx(numpy_reference(0, False)[0], rel=1e-14)


def test_one_step_reproduces_every_published_digit(session: Session) -> None:
    session.step()
    for post_name, printed in PUBLISHED_AFTER_ONE_STEP.items():
        # Mazur 2015, "The Backwards Pass": the updated value of each of w1..w8.
        value = weight(session, post_name)
        assert same_as_published(value, printed), f"{post_name}: {value!r} vs published {printed}"
    # The biases were frozen, as in the post, and did not move.
    biases = session.net.layout.is_bias
    assert np.array_equal(session.theta[biases], session.setup.theta0[biases])


def test_error_after_first_round_recomputed(session: Session) -> None:
    before, after = numpy_reference(1, learn_biases=False)
    session.step()
    ours = session.train_cost()
    assert ours == pytest.approx(after[0], rel=1e-13)
    assert session.history[-1].train_cost == ours
    # Mazur 2015 prints 0.291027924 for the error after the first round. The
    # method as stated (biases fixed) gives 0.2910277737, which agrees with the
    # published figure to six significant digits (0.291027...) and not beyond.
    published = 0.291027924
    assert ours == pytest.approx(published, abs=5e-7)
    assert not same_as_published(ours, "0.291027924")
    assert same_as_published(ours, "0.2910278")


def test_error_after_first_round_with_biases_learning(tmp_path: Path) -> None:
    s = Session(load_setup(write_example(tmp_path)), rate=RATE)
    s.step()
    _, after = numpy_reference(1, learn_biases=True)
    assert s.train_cost() == pytest.approx(after[0], rel=1e-13)
    # With the biases learning too, the error after one round is about 0.28047,
    # clearly not the post's 0.291027924: the post did not update its biases.
    assert abs(s.train_cost() - 0.291027924) > 1e-2


@pytest.mark.parametrize("learn_biases", [False, True], ids=["biases-frozen", "biases-learning"])
def test_ten_thousand_rounds_recomputed(tmp_path: Path, learn_biases: bool) -> None:
    s = Session(load_setup(write_example(tmp_path)), rate=RATE)
    if not learn_biases:
        s.freeze_matching("*.b[*]")
    s.step(10_000)
    _, errors = numpy_reference(10_000, learn_biases)
    ours = s.train_cost()
    # The Session and the independent reimplementation agree closely after
    # 10,000 steps (rounding differences only, accumulated over the steps).
    assert ours == pytest.approx(errors[-1], rel=1e-9)
    history = np.array([h.train_cost for h in s.history[1:]])
    np.testing.assert_allclose(history, errors, rtol=1e-9)
    published = 0.0000351085  # Mazur 2015: error after 10,000 rounds.
    if not learn_biases:
        # The published figure, at the precision it supports: it agrees with ours in
        # three significant digits (3.51e-05) and differs from the fourth on.
        assert ours == pytest.approx(published, rel=5e-3)
        assert abs(ours - published) > 5e-9
        # REGRESSION VALUE, not an outside reference: 3.5101878e-05 is what this code
        # (and the numpy reimplementation above) produced when the test was written;
        # it only guards against an unnoticed change.
        assert ours == pytest.approx(3.5101878e-05, rel=1e-6)
    else:
        # With biases learning the error is an order of magnitude below the published
        # figure: the post's figure is not of this method.
        assert ours < published / 10
        # REGRESSION VALUE, not an outside reference: what this code produced when the
        # test was written (about 2.45e-06).
        assert ours == pytest.approx(2.4475622e-06, rel=1e-6)
