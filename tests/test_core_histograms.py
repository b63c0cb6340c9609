"""Histograms of each layer's numbers, counted again with ``numpy.histogram`` (the reference).

The values of each set are gathered here independently of the code under
test: a layer's weight arrays by name from ``ParamLayout.views`` (``W`` of a
dense layer; biases are not counted), its activations from a forward pass
written out again in numpy.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
import pytest

from stepper.core.histograms import QUANTITIES, histogram, layer_spreads


def test_counts_and_edges_match_numpy_histogram() -> None:
    rng = np.random.default_rng(0)
    values = rng.normal(size=1000) ** 3
    h = histogram(values, bins=17)
    counts, edges = np.histogram(values, bins=17)  # numpy.histogram: equal bins over [min, max]
    np.testing.assert_array_equal(h.counts, counts)
    np.testing.assert_array_equal(h.edges, edges)
    assert h.n == 1000 and h.nonfinite == 0


def test_values_on_edges_follow_numpy() -> None:
    # The largest value belongs to the last bin; every other edge value to the bin on its right.
    values = np.array([0.0, 1.0, 2.0, 3.0, 4.0, 2.0, 0.0])
    h = histogram(values, bins=4)
    np.testing.assert_array_equal(h.counts, np.histogram(values, bins=4)[0])
    assert h.zeros == 2


def test_non_finite_values_are_counted_apart() -> None:
    values = np.array([1.0, np.nan, 2.0, np.inf, -np.inf, 3.0])
    h = histogram(values, bins=3)
    np.testing.assert_array_equal(h.counts, np.histogram(np.array([1.0, 2.0, 3.0]), bins=3)[0])
    assert h.nonfinite == 3
    assert h.mean == pytest.approx(2.0)


def test_one_value_gets_numpys_unit_range() -> None:
    h = histogram(np.full(5, 7.0), bins=4)
    counts, edges = np.histogram(np.full(5, 7.0), bins=4)  # numpy uses [v - 0.5, v + 0.5]
    np.testing.assert_array_equal(h.counts, counts)
    np.testing.assert_array_equal(h.edges, edges)


def test_layer_spreads_count_each_layers_own_numbers(dense_net: Callable[..., Any]) -> None:
    net, theta = dense_net(3, [(5, "tanh"), (4, "relu"), (2, "identity")], "mean_squared_error", seed=2)
    rng = np.random.default_rng(9)
    X = rng.normal(size=(40, 3))
    slopes = rng.normal(size=theta.size)
    update = rng.normal(size=theta.size) * 1e-3
    spreads = layer_spreads(net, theta, slopes, update, X, bins=9)
    params = net.layout.views(theta)
    slope_views = net.layout.views(slopes)
    update_views = net.layout.views(update)
    # The forward pass again, in plain numpy: tanh, relu, identity.
    A1 = np.tanh(X @ params[0]["W"] + params[0]["b"])
    A2 = np.maximum(A1 @ params[1]["W"] + params[1]["b"], 0.0)
    A3 = A2 @ params[2]["W"] + params[2]["b"]
    expected = {
        "weights": [params[i]["W"] for i in range(3)],
        "slopes": [slope_views[i]["W"] for i in range(3)],
        "updates": [update_views[i]["W"] for i in range(3)],
        "activations": [A1, A2, A3],
    }
    assert [s.index for s in spreads] == [0, 1, 2]
    for i, spread in enumerate(spreads):
        for quantity in QUANTITIES:
            counts, edges = np.histogram(expected[quantity][i], bins=9)
            got = spread.hists[quantity]
            np.testing.assert_array_equal(got.counts, counts, err_msg=f"L{i + 1} {quantity}")
            np.testing.assert_allclose(got.edges, edges, rtol=1e-12, err_msg=f"L{i + 1} {quantity}")


def test_without_a_last_step_no_update_is_counted(dense_net: Callable[..., Any]) -> None:
    net, theta = dense_net(2, [(3, "tanh"), (1, "identity")], "mean_squared_error", seed=1)
    spreads = layer_spreads(net, theta, np.ones(theta.size), None, np.ones((4, 2)), bins=5)
    assert all(s.hists["updates"].n == 0 for s in spreads)
    assert spreads[0].hists["weights"].n == 6  # 2 x 3 weights, the 3 biases left out
