"""Task metrics against scikit-learn, the reference library for them.

Each figure is compared with the scikit-learn function of the same name
(``sklearn.metrics``: ``accuracy_score``, ``confusion_matrix``,
``multilabel_confusion_matrix``, ``precision_score``, ``recall_score``,
``r2_score``, ``mean_absolute_error``) on seeded random outputs, so the
definitions are not ours to get wrong.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import (accuracy_score, confusion_matrix, mean_absolute_error, multilabel_confusion_matrix,
                             precision_score, r2_score, recall_score)

from stepper.core.activations import ACTIVATIONS
from stepper.core.layers import Dense
from stepper.core.metrics import THRESHOLD, metrics, task_of
from stepper.core.network import Network


def softmax_rows(rng: np.random.Generator, n: int, k: int) -> np.ndarray:
    z = rng.normal(size=(n, k))
    e = np.exp(z - z.max(axis=1, keepdims=True))
    return e / e.sum(axis=1, keepdims=True)


@pytest.mark.parametrize("seed,k", [(0, 3), (1, 4), (2, 2)])
def test_classes_match_sklearn(seed: int, k: int) -> None:
    rng = np.random.default_rng(seed)
    n = 157
    output = softmax_rows(rng, n, k)
    true = rng.integers(0, k, n)
    target = np.eye(k)[true]
    m = metrics("classes", output, target)
    pred = output.argmax(axis=1)
    # sklearn.metrics.accuracy_score and confusion_matrix (rows: true class, columns: predicted).
    assert m.accuracy == pytest.approx(accuracy_score(true, pred), abs=0, rel=1e-15)
    assert m.confusion is not None
    np.testing.assert_array_equal(m.confusion, confusion_matrix(true, pred, labels=list(range(k))))
    assert m.n == n and m.r2 is None and m.precision is None


@pytest.mark.parametrize("seed,m_out", [(3, 1), (4, 3)])
def test_binary_match_sklearn(seed: int, m_out: int) -> None:
    rng = np.random.default_rng(seed)
    n = 203
    output = rng.uniform(size=(n, m_out))
    target = (rng.uniform(size=(n, m_out)) < 0.4).astype(float)
    m = metrics("binary", output, target)
    said = (output >= THRESHOLD).astype(int)
    truth = target.astype(int)
    if m_out == 1:
        said, truth = said[:, 0], truth[:, 0]
        # sklearn.metrics.confusion_matrix for a binary task: [[TN, FP], [FN, TP]].
        reference = confusion_matrix(truth, said, labels=[0, 1])
    else:
        # Summed over the labels: micro-averaged counts (sklearn.metrics.multilabel_confusion_matrix).
        reference = multilabel_confusion_matrix(truth, said).sum(axis=0)
    # accuracy_score on a multi-label indicator is the share of rows with every label right.
    assert m.accuracy == pytest.approx(accuracy_score(truth, said), rel=1e-15)
    average = "binary" if m_out == 1 else "micro"
    assert m.precision == pytest.approx(precision_score(truth, said, average=average), rel=1e-15)
    assert m.recall == pytest.approx(recall_score(truth, said, average=average), rel=1e-15)
    assert m.confusion is not None
    np.testing.assert_array_equal(m.confusion, reference)


def test_binary_threshold_moves_the_answers() -> None:
    output = np.array([[0.2], [0.45], [0.55], [0.9], [0.5]])
    target = np.array([[0.0], [1.0], [1.0], [1.0], [1.0]])
    # At 0.5 (documented: at or above says yes): yes for 0.55, 0.9 and 0.5 itself -> 4 of 5 right;
    # at 0.4, 0.45 says yes as well -> 5 of 5.
    assert metrics("binary", output, target).accuracy == pytest.approx(
        accuracy_score([0, 1, 1, 1, 1], [0, 0, 1, 1, 1]))
    assert metrics("binary", output, target, threshold=0.4).accuracy == 1.0


def test_precision_with_no_yes_is_undefined_as_in_sklearn() -> None:
    output = np.full((5, 1), 0.1)
    target = np.array([[0.0], [1.0], [0.0], [1.0], [0.0]])
    m = metrics("binary", output, target)
    # sklearn.metrics.precision_score(zero_division=np.nan) gives NaN when nothing is predicted yes.
    assert np.isnan(precision_score(target[:, 0], np.zeros(5), zero_division=np.nan))
    assert m.precision is not None and np.isnan(m.precision)
    assert m.recall == 0.0


@pytest.mark.parametrize("seed,m_out", [(5, 1), (6, 3)])
def test_regression_match_sklearn(seed: int, m_out: int) -> None:
    rng = np.random.default_rng(seed)
    n = 120
    target = rng.normal(size=(n, m_out)) * [3.0, 0.5, 1.0][:m_out]
    output = target + rng.normal(scale=0.7, size=(n, m_out))
    m = metrics("regression", output, target)
    # r2_score's default averages the outputs' R^2 uniformly; so does mean_absolute_error.
    assert m.r2 == pytest.approx(r2_score(target, output), rel=1e-12)
    assert m.mae == pytest.approx(mean_absolute_error(target, output), rel=1e-12)
    assert m.accuracy is None


def test_r2_of_constant_targets_is_undefined() -> None:
    target = np.full((4, 1), 2.0)
    output = np.array([[1.0], [2.0], [3.0], [2.0]])
    # r2_score(force_finite=False) is -inf here: the total sum of squares is 0, so R^2 is not defined.
    with np.errstate(divide="ignore"):
        assert not np.isfinite(r2_score(target, output, force_finite=False))
    r2 = metrics("regression", output, target).r2
    assert r2 is not None and np.isnan(r2)


def test_task_follows_loss_and_output() -> None:
    def net(act: str, loss: str, units: int = 2) -> Network:
        return Network(2, [Dense(2, units, ACTIVATIONS[act])], loss)

    assert task_of(net("softmax", "categorical_cross_entropy")) == "classes"
    assert task_of(net("softmax", "mean_squared_error")) == "classes"
    assert task_of(net("sigmoid", "binary_cross_entropy")) == "binary"
    assert task_of(net("sigmoid", "half_squared_error")) == "regression"
    assert task_of(net("identity", "mean_squared_error")) == "regression"
