"""The cost plot's text: its size, its axis scale, thinning long histories, the step mark."""

from __future__ import annotations

import numpy as np
import pytest

from stepper.ui.costplot import TRAIN_MARK, VAL_MARK, Curves, build_plot, log_possible, thin


def curves(n: int, val: bool = True) -> Curves:
    steps = np.arange(n)
    train = 1.0 / (1.0 + steps)
    return Curves(steps, train, train * 1.2 if val else np.full(n, np.nan), n - 1)


@pytest.mark.parametrize("width,height", [(40, 8), (78, 9), (120, 30)])
def test_the_plot_has_the_size_of_the_widget(width: int, height: int) -> None:
    lines = build_plot(curves(50), width, height, log=False).splitlines()
    assert len(lines) == height
    assert all(len(line) == width for line in lines)


def test_both_curves_are_drawn_with_their_own_marks() -> None:
    text = build_plot(curves(30), 60, 12, log=False)
    assert TRAIN_MARK in text and VAL_MARK in text
    assert VAL_MARK not in build_plot(curves(30, val=False), 60, 12, log=False)


def test_a_log_axis_spreads_decades_evenly() -> None:
    # Costs falling over three decades: on a log axis the tick labels step by a
    # constant factor; on a linear one by a constant difference.
    steps = np.arange(4)
    c = Curves(steps, np.array([1.0, 0.1, 0.01, 0.001]), np.full(4, np.nan), 3)
    log_labels = _y_labels(build_plot(c, 50, 12, log=True))
    ratios = np.array(log_labels[:-1]) / np.array(log_labels[1:])
    assert np.allclose(ratios, ratios[0], rtol=0.05)
    lin_labels = _y_labels(build_plot(c, 50, 12, log=False))
    assert np.allclose(np.diff(lin_labels), np.diff(lin_labels)[0], rtol=0.05, atol=1e-3)


def _y_labels(text: str) -> list[float]:
    out = []
    for line in text.splitlines():
        head = line.split("┤")[0].strip()
        if "┤" in line and head:
            out.append(float(head))
    return out


def test_log_needs_positive_costs_that_vary() -> None:
    flat = Curves(np.arange(3), np.full(3, 0.5), np.full(3, np.nan), 2)
    assert not log_possible(flat)
    zero = Curves(np.arange(3), np.array([1.0, 0.5, 0.0]), np.full(3, np.nan), 2)
    assert not log_possible(zero)
    # Asking for log anyway draws exactly the linear plot instead of failing.
    for c in (flat, zero):
        assert build_plot(c, 40, 8, log=True) == build_plot(c, 40, 8, log=False)
    # A single step (train and validation costs differ) can be drawn on a log axis.
    assert len(build_plot(curves(1), 40, 8, log=True).splitlines()) == 8
    # ...while where a log axis is possible, asking for it changes the picture.
    assert log_possible(curves(30))
    assert build_plot(curves(30), 40, 8, log=True) != build_plot(curves(30), 40, 8, log=False)


def test_long_histories_are_thinned_keeping_both_ends() -> None:
    keep = thin(100_000, 200)
    assert keep.size <= 200
    assert keep[0] == 0 and keep[-1] == 99_999
    assert np.all(np.diff(keep) > 0)
    assert np.array_equal(thin(10, 200), np.arange(10))
    text = build_plot(curves(100_000), 80, 12, log=True)
    assert len(text.splitlines()) == 12


# -- reading right (each check below is about drawing, so its reference is the data drawn) ----


def _canvas(text: str) -> str:
    """The plot's inside, between the frame's left and right edges (no tick labels)."""
    rows = []
    for line in text.splitlines():
        left = line.find("┤") if "┤" in line else line.find("│")
        right = line.rfind("│")
        if 0 <= left < right:
            rows.append(line[left + 1 : right])
    return "\n".join(rows)


def test_two_steps_draw_two_marks_per_curve() -> None:
    c = Curves(np.arange(2), np.array([1.27, 0.58]), np.array([1.41, 0.67]), 1)
    body = _canvas(build_plot(c, 70, 10, log=False))
    assert body.count(TRAIN_MARK) == 2 and body.count(VAL_MARK) == 2


def test_validation_never_hides_training() -> None:
    # Both curves in the same cells: the training mark is the one seen.
    steps = np.arange(20)
    train = 1.0 / (1.0 + steps)
    body = _canvas(build_plot(Curves(steps, train, train.copy(), 19), 60, 10, log=False))
    assert body.count(TRAIN_MARK) >= 19 and VAL_MARK not in body


@pytest.mark.parametrize("n", [2, 8, 11, 23, 101, 997])
def test_the_last_step_has_its_tick(n: int) -> None:
    last_line = build_plot(curves(n), 70, 10, log=False).splitlines()[-1]
    assert last_line.split()[-1] == str(n - 1)
    assert last_line.split()[0] == "0"


def test_axis_labels_stay_short_after_a_blow_up() -> None:
    steps = np.arange(21)
    train = 1.27 * np.exp(7.0 * steps)  # 1.3 to 1.3e60, as after a runaway rate
    for log in (False, True):
        labels = [line.split("┤")[0].strip() for line in build_plot(Curves(steps, train, train * 1.1, 20), 70, 12,
                                                                      log).splitlines() if "┤" in line]
        assert labels and all(len(label) <= 8 for label in labels), labels
        assert all(float(label) >= 0 or not log for label in labels)


def test_short_numbers() -> None:
    from stepper.plots import short_number, whole_ticks

    assert short_number(1.342027465817828e60) == "1.34e60"
    assert short_number(1e-5) == "1e-5"
    assert short_number(0.25) == "0.25"
    assert whole_ticks(0, 7, 5)[-1] == 7 and whole_ticks(0, 7, 5)[0] == 0
    assert whole_ticks(3, 3, 5) == [3]
