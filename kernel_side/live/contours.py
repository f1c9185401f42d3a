"""Level lines of a field sampled on a regular grid (marching squares), vectorised in numpy.

Used to draw each posterior member's decision boundary on the explorer's input map.
"""
from __future__ import annotations

import numpy as np

__all__ = ["level_segments", "decision_segments"]

# Edge k of a cell joins corners _EDGES[k]; corners are 0 = (j, i), 1 = (j, i+1),
# 2 = (j+1, i+1), 3 = (j+1, i) in (row, column) offsets, i.e. bottom, right, top, left.
_EDGES = ((0, 1), (1, 2), (3, 2), (0, 3))
_CORNER_OFFSETS = ((0, 0), (0, 1), (1, 1), (1, 0))


def level_segments(values: np.ndarray, xs: np.ndarray, ys: np.ndarray, level: float = 0.0) -> np.ndarray:
    """Line segments where a gridded field crosses ``level``.

    Parameters
    ----------
    values : ndarray of shape (n_y, n_x)
        ``values[j, i]`` is the field at ``(xs[i], ys[j])``.
    xs : ndarray of shape (n_x,), increasing
    ys : ndarray of shape (n_y,), increasing
    level : float

    Returns
    -------
    ndarray of shape (n_segments, 4)
        Rows ``(x0, y0, x1, y1)``. Crossings are placed by linear interpolation along cell
        edges, so a field that is affine within a cell is traced exactly. Saddle cells are
        resolved by the value at the cell centre (mean of its corners).
    """
    values = np.asarray(values, dtype=np.float64)
    xs = np.asarray(xs, dtype=np.float64)
    ys = np.asarray(ys, dtype=np.float64)
    if values.ndim != 2 or values.shape != (ys.size, xs.size):
        raise ValueError(f"values must have shape (len(ys), len(xs)) = ({ys.size}, {xs.size}); got {values.shape}")
    if values.shape[0] < 2 or values.shape[1] < 2:
        return np.zeros((0, 4))
    corners = [values[dj:values.shape[0] - 1 + dj, di:values.shape[1] - 1 + di] for dj, di in _CORNER_OFFSETS]
    above = [c > level for c in corners]
    gx, gy = np.meshgrid(xs, ys)
    corner_x = [gx[dj:gx.shape[0] - 1 + dj, di:gx.shape[1] - 1 + di] for dj, di in _CORNER_OFFSETS]
    corner_y = [gy[dj:gy.shape[0] - 1 + dj, di:gy.shape[1] - 1 + di] for dj, di in _CORNER_OFFSETS]
    crossed, points = [], []
    for p, q in _EDGES:
        hit = above[p] != above[q]
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(hit, (level - corners[p]) / (corners[q] - corners[p]), 0.0)
        crossed.append(hit)
        points.append((corner_x[p] + t * (corner_x[q] - corner_x[p]), corner_y[p] + t * (corner_y[q] - corner_y[p])))
    count = sum(c.astype(np.int8) for c in crossed)
    pieces = []
    for a in range(4):
        for b in range(a + 1, 4):
            mask = (count == 2) & crossed[a] & crossed[b]
            pieces.append(_stack(points[a], points[b], mask))
    saddle = count == 4
    if saddle.any():
        centre_above = (sum(corners) / 4.0) > level
        joins_first = saddle & (centre_above == above[0])
        joins_other = saddle & ~(centre_above == above[0])
        for a, b in ((0, 1), (2, 3)):
            pieces.append(_stack(points[a], points[b], joins_first))
        for a, b in ((3, 0), (1, 2)):
            pieces.append(_stack(points[a], points[b], joins_other))
    return np.concatenate(pieces, axis=0) if pieces else np.zeros((0, 4))


def decision_segments(member_probs: np.ndarray, xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
    """Decision boundaries of one classifier whose class probabilities are gridded.

    Parameters
    ----------
    member_probs : ndarray of shape (n_y, n_x, n_classes)

    Returns
    -------
    ndarray of shape (n_segments, 4)
        For two classes the line ``p1 = p0``; for more, for each class the line where its
        probability equals the largest other one (shared borders appear once per side).
    """
    probs = np.asarray(member_probs, dtype=np.float64)
    classes = probs.shape[-1]
    if classes == 2:
        return level_segments(probs[..., 1] - probs[..., 0], xs, ys)
    pieces = []
    for c in range(classes):
        others = np.delete(probs, c, axis=-1).max(axis=-1)
        pieces.append(level_segments(probs[..., c] - others, xs, ys))
    return np.concatenate(pieces, axis=0)


def _stack(start: tuple[np.ndarray, np.ndarray], end: tuple[np.ndarray, np.ndarray], mask: np.ndarray) -> np.ndarray:
    return np.stack([start[0][mask], start[1][mask], end[0][mask], end[1][mask]], axis=1)
