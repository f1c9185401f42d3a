"""Scales and ticks of the explorer's bqplot charts: always finite, explicit, and inside the data's range.

bqplot guesses a tick format only for an axis without ``tick_format``; for an empty tick
list (a NaN or missing domain, as in a reopened notebook) its guess is the d3 format
".undefinedg", which d3 refuses with "invalid format". So every axis here states its format.
"""
from __future__ import annotations

import json
import math

import bqplot
import numpy as np
import pytest

import jostle
from jostle.common.ticks import tick_label_limit
from jostle.widgets import Explorer, ImageExplorer
from jostle.widgets._charts import path_chart

from .conftest import tiny_ensemble


def _figures(widget):
    found, stack = {}, [widget]
    while stack:
        node = stack.pop()
        if isinstance(node, bqplot.Figure):
            found[next(c[11:] for c in node._dom_classes if c.startswith("jostle-tid-"))] = node
        stack.extend(getattr(node, "children", ()))
    return found


def _check_axes_explicit_and_finite(figure):
    for axis in figure.axes:
        # an explicit format (or explicit labels) means bqplot never guesses one
        assert axis.tick_format or axis.tick_labels, f"{figure.title}: axis {axis.label!r} has no tick format"
        scale = axis.scale
        if isinstance(scale, bqplot.LinearScale):
            assert scale.min is not None and scale.max is not None, f"{axis.label!r}: domain left to bqplot"
            assert math.isfinite(scale.min) and math.isfinite(scale.max) and scale.min < scale.max
            ticks = np.asarray(axis.tick_values, dtype=float)
            assert ticks.size >= 2 and np.all((ticks >= scale.min) & (ticks <= scale.max)), axis.label
        # the saved widget state of a notebook is strict JSON: NaN or inf would reopen as null
        json.dumps({k: v for k, v in scale.get_state().items() if k in ("min", "max")}, allow_nan=False)


def _confident_net():
    """One member with weights scaled 40x: near (-2, -2) it is certain (p > 0.9999), loss ~1e-5, flat."""
    ens = tiny_ensemble(members=1)
    for name, value in ens.params.items():
        ens.params[name] = value * 40
    return ens


def test_a_flat_loss_at_a_confident_point_still_draws_both_lines_on_finite_scales(moons):
    ens = _confident_net()
    ex = Explorer(ens, moons, point=[-2.0, -2.0], budget=0.2, steps=8, grid=8, boundaries=1)
    try:
        assert ex.wait(60)
        ex.budget = 0.05  # the defect was seen after a budget change
        assert ex.wait(60)
        view = ex.result
        assert view.before.probs.max() > 0.9999 and np.ptp(view.attack.loss) < 1e-6
        figures = _figures(ex)
        for figure in figures.values():
            _check_axes_explicit_and_finite(figure)
        loss, prob = figures["path-chart"].marks
        for mark in (loss, prob):
            scale = mark.scales["y"]
            assert mark.visible and np.all((mark.y > scale.min) | np.isclose(mark.y, 1.0)), mark.y
            assert np.all(mark.y <= scale.max)
        np.testing.assert_allclose(loss.y, view.attack.loss, rtol=1e-6)
    finally:
        ex.close()


def test_probability_axes_run_exactly_from_0_to_1_and_counts_from_0(explorer_view):
    figures = _figures(explorer_view)
    for testid, axis_index in (("predictive-chart", 1), ("spread-chart", 0), ("path-chart", 2)):
        axis = figures[testid].axes[axis_index]
        assert (axis.scale.min, axis.scale.max) == (0.0, 1.0) and not axis.scale.allow_padding, testid
        assert np.asarray(axis.tick_values).tolist() == [0.0, 0.25, 0.5, 0.75, 1.0], testid
    members = figures["spread-chart"].axes[1]
    assert members.scale.min == 0.0 and np.all(np.asarray(members.tick_values) >= 0)
    assert members.scale.max == len(explorer_view._ens)  # 0..S: a histogram bar may hold every member


def test_long_class_names_are_cut_with_an_ellipsis_on_the_axis_only(moons):
    names = ["a rather long first class name", "second <b>bold</b> class"]
    data = jostle.datasets.from_arrays(moons.x_train, moons.y_train, moons.x_test, moons.y_test, classes=names,
                                       name="moons", bounds=moons.bounds)
    ex = Explorer(tiny_ensemble(members=2, class_names=names), data, grid=8, steps=2, boundaries=1)
    try:
        assert ex.wait(60)
        labels = _figures(ex)["predictive-chart"].axes[0].tick_labels
        assert all(len(v) <= tick_label_limit(2) for v in labels.values())
        assert labels["0"] == names[0][:11] + "\u2026"
        assert ex._map.classes == names  # whole names, shown as text in the legend
    finally:
        ex.close()


def test_image_explorer_axes_are_explicit_and_finite():
    digits = jostle.datasets.digits(seed=0)
    ens = tiny_ensemble(members=2, in_features=64, classes=10)
    ex = ImageExplorer(ens, digits, steps=2)
    try:
        assert ex.wait(60)
        for figure in _figures(ex).values():
            _check_axes_explicit_and_finite(figure)
    finally:
        ex.close()


def test_path_chart_with_no_attack_keeps_its_fixed_domains():
    figure, update = path_chart()
    update(type("View", (), {"attack": None})())
    _check_axes_explicit_and_finite(figure)


@pytest.fixture
def explorer_view(moons):
    ex = Explorer(tiny_ensemble(members=6), moons, budget=0.2, steps=4, grid=8, boundaries=1)
    assert ex.wait(60)
    yield ex
    ex.close()
