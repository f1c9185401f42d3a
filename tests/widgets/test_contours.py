"""Marching squares against closed forms and against contourpy (matplotlib's contouring library)."""
from __future__ import annotations

import contourpy
import numpy as np
import pytest

from jostle.live.contours import decision_segments, level_segments


def _grid(n=41):
    xs = np.linspace(-1.5, 1.5, n)
    ys = np.linspace(-1.0, 1.2, n + 3)
    gx, gy = np.meshgrid(xs, ys)
    return xs, ys, gx, gy


def test_affine_field_is_traced_exactly():
    # Linear interpolation along an edge is exact for an affine field (common practice).
    xs, ys, gx, gy = _grid()
    segments = level_segments(0.7 * gx - 0.4 * gy - 0.1, xs, ys)
    assert segments.shape[0] > 10
    for x, y in ((segments[:, 0], segments[:, 1]), (segments[:, 2], segments[:, 3])):
        # float64 interpolation of O(1) values: a few ulp (2.2e-16)
        np.testing.assert_allclose(0.7 * x - 0.4 * y - 0.1, 0.0, atol=1e-12)
    # The pieces add up to the line's length inside the box (closed form of the clipped line).
    t = np.linspace(-1.0, 1.2, 200001)
    x = (0.1 + 0.4 * t) / 0.7
    inside = (x >= -1.5) & (x <= 1.5)
    expected = np.hypot(np.diff(x[inside]), np.diff(t[inside])).sum()
    length = np.hypot(segments[:, 2] - segments[:, 0], segments[:, 3] - segments[:, 1]).sum()
    assert length == pytest.approx(expected, rel=1e-6)


def test_circle_length_approaches_two_pi_r():
    xs, ys, gx, gy = _grid(81)
    segments = level_segments(gx**2 + gy**2 - 0.8**2, xs, ys)
    length = np.hypot(segments[:, 2] - segments[:, 0], segments[:, 3] - segments[:, 1]).sum()
    assert length == pytest.approx(2 * np.pi * 0.8, rel=5e-3)
    radius = np.hypot(segments[:, 0], segments[:, 1])
    np.testing.assert_allclose(radius, 0.8, atol=2e-3)


def test_crossing_points_match_contourpy():
    # Reference: contourpy's line vertices at the same level are the same edge crossings.
    xs, ys, gx, gy = _grid(31)
    field = np.sin(2.5 * gx) * np.cos(3 * gy) + 0.3 * gx
    segments = level_segments(field, xs, ys, level=0.1)
    ours = np.unique(np.round(np.concatenate([segments[:, :2], segments[:, 2:]]), 9), axis=0)
    lines = contourpy.contour_generator(gx, gy, field, line_type="Separate").lines(0.1)
    theirs = np.unique(np.round(np.concatenate(lines), 9), axis=0)
    assert ours.shape == theirs.shape
    np.testing.assert_allclose(ours, theirs, atol=1e-8)


def test_no_crossing_gives_no_segments_and_shape_is_checked():
    xs, ys, gx, gy = _grid(11)
    assert level_segments(gx**2 + 5.0, xs, ys).shape == (0, 4)
    with pytest.raises(ValueError, match=r"values must have shape \(len\(ys\), len\(xs\)\)"):
        level_segments(np.zeros((3, 3)), xs, ys)


def test_decision_segments_two_and_three_classes():
    xs, ys, gx, gy = _grid(21)
    p1 = 1 / (1 + np.exp(-(gx - 0.2) * 4))
    two = decision_segments(np.stack([1 - p1, p1], axis=-1), xs, ys)
    # p1 = p0 where gx = 0.2; the sigmoid is not affine in a cell, so allow interpolation error
    np.testing.assert_allclose(two[:, [0, 2]], 0.2, atol=2e-3)
    logits = np.stack([gx, -gx, gy], axis=-1)
    probs = np.exp(logits) / np.exp(logits).sum(-1, keepdims=True)
    three = decision_segments(probs, xs, ys)
    assert three.shape[0] > 0
    # every endpoint sits near a tie between the two largest classes
    for x, y in ((three[:, 0], three[:, 1]), (three[:, 2], three[:, 3])):
        top2 = np.sort(np.stack([x, -x, y], axis=-1), axis=-1)[:, -2:]
        assert np.all(top2[:, 1] - top2[:, 0] < 0.25)
