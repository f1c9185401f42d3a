"""The certified-radius map layer: the posterior predictive's certified radius per grid cell.

Every cell of a level is bisected at once (:func:`jostle.certified_radius` vectorises over
points and members); :func:`radius_map_levels` draws a coarse grid first and refines it, so a
view can show something early and drop the rest when its settings move on. This module
imports no widget library.
"""
from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
import torch

from jostle.certify.verdicts import pair_bounds, predictive_probability_bounds
from jostle.common.checks import check_int
from jostle.live.view_parts import as_input, to_numpy
from jostle.posterior.ensemble import Ensemble

__all__ = ["RadiusMap", "radius_map", "radius_map_levels", "map_levels", "MAP_ITERATIONS"]

# A colour map needs about 1% of the box: 2**-8 of the diameter is finer than the colours show.
MAP_ITERATIONS = 8


@dataclass
class RadiusMap:
    """Certified radius of the predictive on a regular grid.

    xs : (n_x,), ys : (n_y,) grid coordinates; radius : (n_y, n_x) certified budget per cell;
    resolution : width of the final bisection bracket; top : the bracket's upper end.
    """

    xs: np.ndarray
    ys: np.ndarray
    radius: np.ndarray
    resolution: float
    top: float
    norm: str
    method: str
    samples: int


def map_levels(grid: int) -> tuple[int, ...]:
    """Resolutions drawn in turn: a quarter, a half, then ``grid`` (each at least 4, no repeats)."""
    grid = check_int("grid", grid, low=2)
    return tuple(sorted({max(min(4, grid), grid // 4), max(min(4, grid), grid // 2), grid}))


def radius_map(ens: Ensemble, samples: int, grid: int, lo: tuple, hi: tuple, norm: str = "inf",
               method: str = "crown", iterations: int = MAP_ITERATIONS, start: RadiusMap | None = None) -> RadiusMap:
    """Certified radius of the first ``samples`` members' predictive at each cell of a ``grid`` x ``grid`` grid.

    Parameters
    ----------
    ens : Ensemble over 2 input features
    samples : int
        Members used (the first ``samples``).
    grid : int
        Cells per axis.
    lo, hi : pairs of float
        The input box; it is also the data bounds of the certificate.
    norm, method
        As for :func:`jostle.certified_radius`.
    iterations : int
        Bisection steps; the result is within ``top / 2**iterations`` of the bisection's limit.
    start : RadiusMap, optional
        A coarser map of the same box, norm and method: each cell's bracket starts around the
        nearest coarse cell's radius, widened by the distance between the two cells (the
        smallest flipping distance moves by at most that much, a triangle-inequality fact from
        memory); both ends of that guess are checked, so the answer is the same kind of bracket,
        at most ``top / 2**iterations`` wide, in fewer steps.

    Returns
    -------
    RadiusMap
    """
    grid = check_int("grid", grid, low=2)
    xs, ys = np.linspace(lo[0], hi[0], grid), np.linspace(lo[1], hi[1], grid)
    gx, gy = np.meshgrid(xs, ys)
    points = as_input(ens, np.stack([gx.ravel(), gy.ravel()], axis=1))
    box = (as_input(ens, lo), as_input(ens, hi))
    span = box[1] - box[0]
    top = float(span.max() if norm == "inf" else span.norm())
    iterations = check_int("iterations", iterations, low=1)
    guess = None if start is None else _guess_from(start, xs, ys, norm)
    radius = _bisect_predictive(ens[:samples], points, norm, method, box, top, iterations, guess)
    return RadiusMap(xs=xs.astype(np.float32), ys=ys.astype(np.float32),
                     radius=to_numpy(radius.reshape(grid, grid)).astype(np.float32),
                     resolution=top / 2**iterations, top=top, norm=norm, method=method, samples=samples)


def radius_map_levels(ens: Ensemble, samples: int, grid: int, lo: tuple, hi: tuple, norm: str = "inf",
                      method: str = "crown", keep_going: Callable[[], bool] = lambda: True) -> Iterator[RadiusMap]:
    """:func:`radius_map` at each of :func:`map_levels`, coarse first; stops once ``keep_going()`` is False."""
    found = None
    for level in map_levels(grid):
        if not keep_going():
            return
        found = radius_map(ens, samples, level, lo, hi, norm, method, start=found)
        yield found


def _guess_from(coarse: RadiusMap, xs: np.ndarray, ys: np.ndarray, norm: str) -> tuple[torch.Tensor, torch.Tensor]:
    """Per fine cell (row-major, y then x): a low and a high guess from the nearest coarse cell."""
    ix = np.abs(xs[:, None] - coarse.xs[None, :].astype(np.float64)).argmin(1)
    iy = np.abs(ys[:, None] - coarse.ys[None, :].astype(np.float64)).argmin(1)
    dx, dy = np.abs(xs - coarse.xs[ix]), np.abs(ys - coarse.ys[iy])
    gap = np.maximum(dy[:, None], dx[None, :]) if norm == "inf" else np.hypot(dy[:, None], dx[None, :])
    near = coarse.radius[np.ix_(iy, ix)].astype(np.float64)
    slack = gap + coarse.resolution
    low = np.maximum(near - slack, 0.0).ravel()
    high = np.minimum(near + slack, coarse.top).ravel()
    return torch.as_tensor(low), torch.as_tensor(high)


def _bisect_predictive(ens: Ensemble, points: torch.Tensor, norm: str, method: str, box: tuple, top: float,
                       iterations: int, guess: tuple[torch.Tensor, torch.Tensor] | None = None) -> torch.Tensor:
    """The bracket of :func:`jostle.certified_radius` with ``high = top``, for the predictive alone.

    The predictive's label is computed once per cell, and each step bounds only the cells whose
    bracket is still open and wider than ``top / 2**iterations`` (the member radii are not
    needed here, which halves the work of ``certified_radius``); the lower end is certified at
    every step. ``guess`` (low, high per cell) starts each bracket nearer its answer.
    """
    with torch.no_grad():
        label = ens.predict(points).label

    def holds(eps: torch.Tensor, cells: torch.Tensor) -> torch.Tensor:
        if cells.numel() == 0:
            return torch.zeros(0, dtype=torch.bool, device=points.device)
        low, up = predictive_probability_bounds(pair_bounds(ens, points[cells], eps[cells][None], norm, method, box))
        own = label[cells, None]
        return low.gather(1, own).squeeze(1) > up.scatter(1, own, float("-inf")).amax(1)

    every = torch.arange(points.shape[0], device=points.device)
    resolution = top / 2**iterations
    lower = torch.zeros(points.shape[0], dtype=points.dtype, device=points.device)
    upper = torch.full_like(lower, top)

    def narrow() -> None:
        for _ in range(iterations + 2):
            cells = every[torch.isfinite(upper) & (upper - lower > resolution)]
            if cells.numel() == 0:
                return
            mid = 0.5 * (lower + upper)
            ok = holds(mid, cells)
            lower[cells[ok]], upper[cells[~ok]] = mid[cells[ok]], mid[cells[~ok]]

    def whole_box(cells: torch.Tensor) -> None:  # where the ball may cover the box: does it hold there?
        at_top = cells[holds(torch.full_like(upper, top), cells)]
        lower[at_top], upper[at_top] = top, torch.inf

    if guess is None:
        alive = holds(lower, every)
        upper[~alive] = 0.0
        whole_box(every[alive])
        narrow()
        return lower
    # Check the guess's low end; take its high end as the failing end unchecked, and check it
    # only where the bisection never moved off it (there the answer may lie above the guess).
    low_guess, high_guess = (g.to(lower.device, lower.dtype) for g in guess)
    held = holds(low_guess, every)
    lower[held], upper[~held] = low_guess[held], low_guess[~held]
    upper[held] = high_guess[held]
    whole_box(every[held & (upper == top)])
    narrow()
    stuck = every[held & (upper == high_guess) & (upper < top) & (upper > lower)]
    above = stuck[holds(upper, stuck)]
    lower[above], upper[above] = upper[above], top
    whole_box(above)
    narrow()
    return lower
