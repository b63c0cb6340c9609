"""The loss of every data row (sample), with the network's output for it.

A row's loss is the model's loss evaluated on that row alone: every loss in
:data:`stepper.core.losses.LOSSES` is an average over samples, so the mean of
the row losses is the data term of the cost (the L2 term belongs to no row and
is left out). The row losses come from the loss's own function, called once on
all rows stacked as ``(n_samples, 1, n_outputs)``: the leading axis that the
losses keep for perturbed copies here holds one row each, so a new loss needs
nothing here. Where the output activation is computed together with its loss
(:data:`stepper.core.losses.FUSED`), the row losses come from the
pre-activations, as the cost does (for softmax with categorical cross-entropy
with the forward pass's own softmax: :func:`_softmax_rows`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from stepper.core.layers import DenseCache
from stepper.core.network import Network

Array = NDArray[np.float64]


@dataclass(frozen=True)
class RowLosses:
    """Per-row losses of one set of rows.

    Attributes:
        loss: the loss of each row, ``(n_samples,)``.
        output: the network's output for each row, ``(n_samples, n_outputs)``.
        target: the targets, ``(n_samples, n_outputs)``.
    """

    loss: Array
    output: Array
    target: Array

    @property
    def n(self) -> int:
        return int(self.loss.size)


def row_losses(net: Network, theta: Array, X: Array, Y: Array) -> RowLosses:
    """The loss and output of every row of ``X`` ``(n_samples, n_inputs)`` against ``Y`` ``(n_samples, n_outputs)``.

    ``theta`` has shape ``(n_params,)``. With no rows the arrays are empty.
    """
    n = X.shape[0]
    if n == 0:
        return RowLosses(np.empty(0), np.empty((0, net.n_outputs)), Y)
    A, cache = net.forward(theta, X)[-1]
    return rows_of_output(net, A, cache, Y)


def rows_of_output(net: Network, A: Array, cache: object, Y: Array) -> RowLosses:
    """:func:`row_losses` from a forward pass already made: the last layer's output ``A``
    ``(n_samples, n_outputs)`` and cache, against ``Y``."""
    n = A.shape[0]
    fused = net.fused
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        if fused is not None and isinstance(cache, DenseCache) and net.loss == "categorical_cross_entropy":
            loss = _softmax_rows(cache.Z, A, Y)
        elif fused is not None and isinstance(cache, DenseCache):
            loss = fused.value(cache.Z[:, None, :], Y[:, None, :])
        else:
            loss = net.loss_fn.value(A[:, None, :], Y[:, None, :])
    return RowLosses(np.asarray(loss, dtype=np.float64).reshape(n), A, Y)


def _softmax_rows(Z: Array, A: Array, Y: Array) -> Array:
    """Per row ``-sum_k y_k log softmax(z)_k = sum_k y_k * lse(z) - sum_k y_k z_k``, ``(n,)``.

    The log-sum-exp comes from the forward pass's own softmax output ``A``:
    ``lse(z) = z_j - log a_j`` for any ``j``, taken at the row's largest output,
    where ``a_j >= 1 / n_outputs`` keeps the logarithm exact to rounding. This
    spares a second pass of exponentials over every output (a third of the
    time for 100,000 rows; tests/benchmarks/bench_rows.py), and gives what the
    fused loss gives to within rounding (tests/test_core_rows.py checks it
    against scikit-learn's log_loss).
    """
    rows = np.arange(A.shape[0])
    top = np.argmax(A, axis=1)
    lse = Z[rows, top] - np.log(A[rows, top])
    return np.sum(Y, axis=1) * lse - np.einsum("ij,ij->i", Y, Z)


def worst_rows(loss: Array, count: int) -> NDArray[np.int64]:
    """Indices of the ``count`` largest losses, largest first (ties: lower index first).

    A NaN loss counts as the largest. ``loss`` is ``(n,)``.
    """
    n = loss.size
    count = max(0, min(int(count), n))
    if count == 0:
        return np.empty(0, dtype=np.int64)
    key = np.where(np.isnan(loss), np.inf, loss)
    if count < n:
        part = np.argpartition(-key, count - 1)[:count]
        # Rows tied with the smallest kept loss may be left out by argpartition; take
        # every row at or above that level and sort, so ties go by index.
        level = key[part].min()
        part = np.flatnonzero(key >= level)
    else:
        part = np.arange(n)
    order = np.lexsort((part, -key[part]))
    return np.asarray(part[order][:count], dtype=np.int64)
