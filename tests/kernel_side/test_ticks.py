"""Axis arithmetic of the charts (jostle.common.ticks): 1-2-5 steps, log ticks, axis domains."""
from __future__ import annotations

import math

import numpy as np
import pytest

from jostle.common.ticks import (
    count_axis,
    log_ticks,
    loss_axis_for,
    nice_step,
    share_axis,
    step_ticks,
    thinned,
    tick_label_limit,
)


@pytest.mark.parametrize("loss", [[0.0] * 9, [9.06e-6] * 9, [float("nan")] * 4, [float("inf"), 1.0, 2.0],
                                  [5.0] * 3, [0.1, 0.5, 1.2], [0.00024, 0.00026]])
def test_loss_axis_contains_every_finite_value_strictly_and_ticks_start_at_zero(loss):
    # facts of the trade (common practice): a domain strictly wider than the data shows every point;
    # ticks of 1, 2 or 5 times a power of ten, inside the domain
    axis = loss_axis_for(loss)
    finite = np.asarray(loss)[np.isfinite(loss)]
    assert math.isfinite(axis.low) and math.isfinite(axis.high) and axis.low < axis.high
    if finite.size:
        assert axis.low < finite.min() and finite.max() < axis.high
    assert axis.ticks.size >= 2 and axis.ticks[0] == 0.0
    assert np.all((axis.ticks >= axis.low) & (axis.ticks <= axis.high))
    step = axis.ticks[1] - axis.ticks[0]
    mantissa = step / 10 ** math.floor(math.log10(step))
    assert min(abs(mantissa - m) for m in (1, 2, 5)) < 1e-6


def test_count_axis_has_no_negative_tick_and_reaches_the_most_members():
    for most, expected in ((0, [0, 1]), (1, [0, 1]), (6, [0, 2, 4, 6]), (17, [0, 5, 10, 15])):
        top, ticks = count_axis(most)
        assert top >= max(most, 1) and ticks.tolist() == expected


def test_tick_label_limit_shrinks_with_the_number_of_classes():
    assert tick_label_limit(2) == 12 and tick_label_limit(10) == 4 and tick_label_limit(6) == 8


def test_log_ticks_are_nice_numbers_inside_the_range():
    # 1-2-5 ticks on a log axis (common practice), never outside the data, at most 4.
    assert log_ticks(0.3, 10.0).tolist() == [1.0, 10.0]          # five 1-2-5 numbers: decades only
    assert log_ticks(0.15, 0.6).tolist() == [0.2, 0.5]
    assert log_ticks(0.15, 2.5).tolist() == [0.2, 0.5, 1.0, 2.0]
    assert log_ticks(1.0, 1000.0).tolist() == [1.0, 10.0, 100.0, 1000.0]
    narrow = log_ticks(6.1, 6.9)  # no 1-2-5 number inside: the ends, to two digits
    assert narrow.tolist() == [6.1, 6.9]
    for low, high in [(1e-6, 3e-6), (0.02, 40.0), (5.0, 5.0), (3e-9, 2e3)]:
        ticks = log_ticks(low, high)
        assert 1 <= len(ticks) <= 4
        assert ticks.min() >= low * 0.95 and ticks.max() <= high * 1.05


def test_share_axis_ticks_where_even_spacing_did_not():
    # the old even split of a padded range gave 0.61, 0.69, 0.77-style ticks; round steps instead
    axis = share_axis([0.6416, 0.7384])
    assert axis.ticks.tolist() == [0.64, 0.66, 0.68, 0.7, 0.72, 0.74]
    assert axis.labels == ["0.64", "0.66", "0.68", "0.70", "0.72", "0.74"]
    assert share_axis([]).ticks.tolist() == [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]
    assert share_axis([0.2758, 0.597]).labels == ["0.3", "0.4", "0.5", "0.6"]


@pytest.mark.parametrize("raw, expected", [(0.3, 0.5), (1.0, 1.0), (1.01, 2.0), (2.0, 2.0), (2.2, 5.0),
                                           (7.0, 10.0), (0.0042, 0.005), (130.0, 200.0)])
def test_nice_step_is_the_least_1_2_5_step_not_below_the_request(raw, expected):
    # 1, 2 or 5 times a power of ten (common practice for axis ticks); exact decimal results
    assert math.isclose(nice_step(raw), expected, rel_tol=1e-12)  # one power-of-ten product: ~1 ulp


def test_step_ticks_are_whole_steps_from_zero_to_the_last():
    assert step_ticks(1).tolist() == [0.0, 1.0]
    assert step_ticks(3).tolist() == [0.0, 1.0, 2.0, 3.0]
    assert step_ticks(20).tolist() == [0.0, 5.0, 10.0, 15.0, 20.0]
    ticks = step_ticks(37)
    assert len(ticks) == 5 and ticks[0] == 0 and ticks[-1] == 37 and np.all(ticks == np.round(ticks))


def test_thinned_keeps_both_ends_and_at_most_the_asked_number():
    counts = np.array([1, 2, 5, 10, 20, 50, 100])
    assert thinned(counts, 4).tolist() == [1, 5, 20, 100]
    assert thinned(counts[:3], 4).tolist() == [1, 2, 5]
    assert thinned(np.array([]), 4).size == 0
