"""Gradient-free attacks: SPSA and Square. They only query the predictive, so a model
that hides or breaks its gradients cannot fool them the way it fools PGD.

SPSA (Spall 1992), used against gradient masking by Uesato et al. (2018), estimates the
gradient from paired evaluations along random Rademacher directions and then takes the
same projected steps as PGD. Square Attack (Andriushchenko et al. 2020) is a random
search that accepts a proposal only when the margin falls: over the corners of the L-inf
ball, or over the surface of the L2 ball with energy moved between square windows.
"""
from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import torch
from torch import Tensor

from jostle.attacks.outcome import finish
from jostle.attacks.problem import AttackProblem, AttackResult
from jostle.attacks.registry import register_attack
from jostle.common.checks import check_float, check_int, show_value

__all__ = ["spsa", "square", "spsa_gradient", "square_fraction"]


def spsa_gradient(fn: Callable[[Tensor], Tensor], x: Tensor, delta: float, directions: int,
                  generator: torch.Generator) -> Tensor:
    """SPSA estimate of the gradient of ``fn`` [m, ...] -> [m] at each point of ``x``.

    For Rademacher directions ``v`` (entries +-1), the estimate is the mean over
    ``directions`` draws of ``(fn(x + delta v) - fn(x - delta v)) / (2 delta) * v``.
    All ``2 * directions`` evaluations go through ``fn`` in one batch.

    Parameters
    ----------
    fn : callable
        Evaluates a batch of inputs [m, *input_shape] -> [m]. Batch item ``i`` belongs to
        point ``i % n_points``.
    x : Tensor of shape (n_points, *input_shape)
    delta : float
        Finite-difference radius.
    directions : int
        Number of random directions (each costs two evaluations per point).
    generator : torch.Generator

    Returns
    -------
    Tensor of shape (n_points, *input_shape)
    """
    signs = torch.randint(0, 2, (directions,) + tuple(x.shape), generator=generator)
    v = (signs * 2 - 1).to(device=x.device, dtype=x.dtype)
    batch = torch.cat([x + delta * v, x - delta * v]).flatten(0, 1)
    values = fn(batch).view(2, directions, x.shape[0])
    slope = (values[0] - values[1]) / (2 * delta)
    return (slope.view(slope.shape + (1,) * (x.ndim - 1)) * v).mean(0)


@register_attack("spsa", norms=("inf", "2"), objectives=("expected_loss", "predictive", "margin"),
                 gradient_free=True, description="projected ascent on SPSA gradient estimates (queries only)")
def spsa(problem: AttackProblem, steps: int = 40, step_size: Any = None, delta: float = 0.01,
         directions: int = 32, random_start: bool = False, record_path: bool = True) -> AttackResult:
    """Projected ascent on SPSA gradient estimates: PGD's steps with queries only.

    Each step costs ``2 * directions`` queries per point, plus one to record the objective.
    With ``resample=True`` each step's paired evaluations share one member draw.
    """
    delta = check_float("delta", delta, low=0.0, low_open=True)
    directions = check_int("directions", directions, low=1)
    if not isinstance(random_start, bool):
        raise ValueError(f"random_start must be True or False; got {show_value(random_start)}")
    if step_size is None:
        step_b = 2.5 * problem.eps_b / steps
    else:
        step_b = torch.full_like(problem.eps_b, check_float("step_size", step_size, low=0.0, low_open=True))
    repeat_index = torch.arange(problem.points, device=problem.x.device).repeat(2 * directions)
    x_t = problem.random_start() if random_start else problem.x.clone()
    path, values = [x_t], []
    with torch.no_grad():
        for _ in range(steps):
            values.append(problem.objective(x_t))
            grad = spsa_gradient(lambda z: problem.objective(z, index=repeat_index), x_t, delta, directions,
                                 problem.generator)
            x_t = problem.project(x_t + step_b * problem.step_direction(grad))
            if record_path:
                path.append(x_t)
        values.append(problem.objective(x_t))
    queries = torch.full((problem.points,), steps * (2 * directions + 1) + 1, dtype=torch.long)
    result = finish(problem, x_t, torch.stack(path) if record_path else None, torch.stack(values), queries, "spsa")
    result.info.update(delta=delta, directions=directions)
    return result


@register_attack("square", norms=("inf", "2"), objectives=("margin",), gradient_free=True,
                 description="Square Attack: random search that only keeps a lower margin")
def square(problem: AttackProblem, steps: int = 40, p_init: float = 0.05, image_shape: Any = None,
           record_path: bool = True) -> AttackResult:
    """Square Attack (Andriushchenko et al. 2020): random search that keeps a proposal only
    if the attacker's margin falls, so the margin never increases.

    L-inf: every coordinate of the perturbation sits at +-eps (before clipping to the
    bounds). Each iteration re-draws the signs inside one window (an h x h square of an
    image), or flips a random set of ``round(p * D)`` features of a plain vector.

    L2: the perturbation keeps ``|delta|_2 = eps`` exactly (before clipping). It starts as a
    tiling of square bumps with random signs. Each iteration picks two h x h windows per
    image and channel, adds a bump (largest at its centre, falling off ring by ring) with a
    random sign to the first, and moves all the energy of both windows into the first (the
    second is emptied), so the norm is unchanged; a window pair holding no energy borrows
    its share from the rest of the perturbation. A plain vector (no image shape) takes a
    random step on a random ``round(p * D)``-feature subset instead and is rescaled back
    onto the sphere; its step shrinks with ``p`` on the same schedule.

    A point stops being queried once its margin is negative. One query per active point per
    iteration. ``loss`` is the negative margin; ``margin`` holds the margin itself.

    With ``resample=True`` every iteration draws one member subset and compares the current
    point's margin with the proposal's under that same draw (two queries per active point
    and iteration); ``margin`` then records each iteration's margin under its own draw, so
    it falls only within an iteration, not necessarily from one iteration to the next.
    """
    p_init = check_float("p_init", p_init, low=0.0, high=1.0, low_open=True)
    shape = _image_shape(problem, image_shape)
    initial, propose = (_initial_signs, _propose) if problem.norm == "inf" else (_initial_sphere, _propose_sphere)
    with torch.no_grad():
        delta = problem.eps_b * initial(problem, shape)
        x_best = problem.project(problem.x + delta)
        margin = problem.margin(x_best)
        queries = torch.ones(problem.points, dtype=torch.long, device=problem.x.device)
        path, margins = [x_best], [margin]
        for i in range(steps):
            active = (margin >= 0).nonzero().flatten()
            if active.numel():
                fraction = square_fraction(p_init, i, steps)
                proposal = propose(problem, delta[active], active, shape, fraction, p_init)
                x_new = problem.project(problem.x[active] + proposal, problem.eps_b[active], problem.x[active])
                members = problem.members()
                if problem.resample:
                    # Both margins under this iteration's draw, so the draw cannot decide.
                    margin = margin.clone()
                    margin[active] = problem.margin(x_best[active], index=active, members=members)
                    queries[active] += 1
                new_margin = problem.margin(x_new, index=active, members=members)
                better = new_margin < margin[active]
                chosen = active[better]
                delta[chosen] = proposal[better]
                x_best = x_best.clone()
                x_best[chosen] = x_new[better]
                margin = margin.clone()
                margin[chosen] = new_margin[better]
                queries[active] += 1
            margins.append(margin)
            if record_path:
                path.append(x_best)
    margins_t = torch.stack(margins)
    result = finish(problem, x_best, torch.stack(path) if record_path else None, -margins_t, queries.cpu(),
                    "square", objective="margin")
    result.margin = margins_t
    result.info.update(p_init=p_init, image_shape=list(shape) if shape else None)
    return result


def square_fraction(p_init: float, iteration: int, steps: int) -> float:
    """Share of features re-drawn at ``iteration``: ``p_init`` halved on the published
    schedule (iterations 10, 50, 200, 500, 1000, 2000, 4000, 6000, 8000 of 10,000),
    stretched to ``steps`` iterations."""
    scaled = int(iteration / max(steps, 1) * 10_000)
    halvings = sum(scaled > mark for mark in (10, 50, 200, 500, 1000, 2000, 4000, 6000, 8000))
    return p_init / 2 ** halvings


# ------------------------------------------------------------------ private helpers
def _image_shape(problem: AttackProblem, image_shape: Any) -> tuple[int, ...] | None:
    if image_shape is None:
        # set on the ensemble, or recorded by a fit from its data set's description
        data = problem.ens.meta.get("data")
        image_shape = problem.ens.meta.get("image_shape")
        if image_shape is None and isinstance(data, dict):
            image_shape = data.get("image_shape")
    if image_shape is None:
        return None
    try:
        shape = tuple(int(s) for s in image_shape)
    except (TypeError, ValueError):
        raise ValueError(f"image_shape must be (H, W) or (C, H, W); got {show_value(image_shape)}") from None
    features = int(problem.x[0].numel())
    if len(shape) not in (2, 3) or int(np.prod(shape)) != features:
        raise ValueError(f"image_shape must be (H, W) or (C, H, W) multiplying to {features} features; "
                         f"got {shape}")
    return shape if len(shape) == 3 else (1,) + shape


def _rademacher(shape: tuple[int, ...], problem: AttackProblem) -> Tensor:
    signs = torch.randint(0, 2, shape, generator=problem.generator) * 2 - 1
    return signs.to(device=problem.x.device, dtype=problem.x.dtype)


def _initial_signs(problem: AttackProblem, shape: tuple[int, ...] | None) -> Tensor:
    """Vertical stripes for images (one sign per channel and column), else one per feature."""
    n = problem.points
    if shape is None:
        return _rademacher(tuple(problem.x.shape), problem)
    channels, height, width = shape
    stripes = _rademacher((n, channels, 1, width), problem).expand(n, channels, height, width)
    return stripes.reshape(problem.x.shape)


def _propose(problem: AttackProblem, delta: Tensor, active: Tensor, shape, fraction: float,
             p_init: float) -> Tensor:
    """``delta`` with one window per point re-drawn at +-eps."""
    n = int(active.numel())
    eps_b = problem.eps_b[active]
    if shape is None:
        features = int(delta[0].numel())
        count = max(1, min(features, int(round(fraction * features))))
        order = torch.rand((n, features), generator=problem.generator).argsort(dim=1)[:, :count]
        mask = torch.zeros((n, features), dtype=torch.bool).scatter_(1, order, True)
        mask = mask.to(delta.device).view_as(delta)
        # Flipping the chosen corners (rather than re-drawing them) guarantees that every
        # query tries a new corner; for plain vectors a window has no spatial meaning.
        return torch.where(mask, -delta, delta)
    channels, height, width = shape
    side = _window_side(fraction, height, width)
    window = _window_masks(n, height, width, side, problem.generator)[0].to(delta.device)
    signs = _rademacher((n, channels, 1, 1), problem)
    image = delta.reshape(n, channels, height, width)
    scale = eps_b.reshape(n, 1, 1, 1)
    return torch.where(window, scale * signs, image).reshape(delta.shape)


# ------------------------------------------------------------------ L2 square search
def _bump(side: int, dtype) -> Tensor:
    """A square bump [side, side] of unit L2 norm: ring ``r`` (counted from the outside in
    by Chebyshev distance to the centre) carries ``sum_{k >= r} 1 / (k + 1)^2``, so the
    centre is largest and each ring outward smaller."""
    centre = (side - 1) / 2
    index = torch.arange(side, dtype=torch.float64)
    ring_out = torch.maximum((index[:, None] - centre).abs(), (index[None, :] - centre).abs())
    ring = torch.floor(ring_out + 1e-9).long()  # 0 at the centre
    rings = int(ring.max()) + 1
    weight = (1.0 / (torch.arange(rings, dtype=torch.float64) + 1) ** 2).flip(0).cumsum(0).flip(0)
    bump = weight[ring]
    return (bump / bump.norm()).to(dtype)


def _window_side(fraction: float, height: int, width: int) -> int:
    """Side of a square window holding about ``fraction`` of an image's pixels."""
    return max(1, min(height - 1, int(round((fraction * height * width) ** 0.5))))


def _onto_sphere(v: Tensor, radius) -> Tensor:
    """Each point's ``v`` [n, ...] rescaled to L2 norm ``radius`` (a number or [n, 1, ...])."""
    return v / v.flatten(1).norm(dim=1).clamp_min(1e-30).view((-1,) + (1,) * (v.ndim - 1)) * radius


def _window_masks(
    n: int, height: int, width: int, side: int, generator: torch.Generator
) -> tuple[Tensor, Tensor, Tensor]:
    """Random h x h windows, one per point: a mask [n, 1, H, W] and their corners [n]."""
    top = torch.randint(0, height - side + 1, (n, 1), generator=generator)
    left = torch.randint(0, width - side + 1, (n, 1), generator=generator)
    rows = (torch.arange(height) >= top) & (torch.arange(height) < top + side)
    cols = (torch.arange(width) >= left) & (torch.arange(width) < left + side)
    return (rows[:, :, None] & cols[:, None, :]).unsqueeze(1), top.view(-1), left.view(-1)


def _initial_sphere(problem: AttackProblem, shape: tuple[int, ...] | None) -> Tensor:
    """A unit-L2 direction per point: a tiling of random-sign bumps for images, else a
    Gaussian direction (uniform on the sphere)."""
    n = problem.points
    if shape is None:
        direction = torch.randn(tuple(problem.x.shape), generator=problem.generator, dtype=problem.x.dtype)
    else:
        channels, height, width = shape
        side = max(1, min(height, width) // 4)
        tiles_h, tiles_w = -(-height // side), -(-width // side)
        bump = _bump(side, problem.x.dtype).repeat(tiles_h, tiles_w)[:height, :width]
        signs = _rademacher((n, channels, tiles_h, tiles_w), problem).cpu()
        signs = signs.repeat_interleave(side, 2).repeat_interleave(side, 3)[:, :, :height, :width]
        direction = (signs * bump).reshape(problem.x.shape)
    return _onto_sphere(direction.to(problem.x.device), 1.0)


def _propose_sphere(problem: AttackProblem, delta: Tensor, active: Tensor, shape, fraction: float,
                    p_init: float) -> Tensor:
    """``delta`` moved on the sphere ``|delta|_2 = eps`` (see :func:`square`)."""
    n = int(active.numel())
    eps_b = problem.eps_b[active]
    dims = (-1,) + (1,) * (delta.ndim - 1)
    if shape is None:
        features = int(delta[0].numel())
        count = max(1, min(features, int(round(fraction * features))))
        order = torch.rand((n, features), generator=problem.generator).argsort(dim=1)[:, :count]
        step = torch.zeros((n, features), dtype=delta.dtype).scatter_(
            1, order, torch.randn((n, count), generator=problem.generator, dtype=delta.dtype))
        step = step.to(delta.device).view_as(delta)
        # A step of half the radius at p_init, shrinking as sqrt(p) along the schedule.
        scale = 0.5 * (fraction / p_init) ** 0.5
        return _onto_sphere(delta + _onto_sphere(step, eps_b * scale), eps_b)
    channels, height, width = shape
    side = _window_side(fraction, height, width)
    image = delta.reshape(n, channels, height, width)
    into, top, left = _window_masks(n, height, width, side, problem.generator)
    out_of, _, _ = _window_masks(n, height, width, side, problem.generator)
    into, out_of = into.to(delta.device), out_of.to(delta.device)
    both = into | out_of
    energy = (image * both).flatten(2).norm(dim=2).view(n, channels, 1, 1)  # per point and channel
    # the bump placed at each point's first window
    bump = _bump(side, delta.dtype).to(delta.device)
    placed = torch.zeros((n, 1, height, width), dtype=delta.dtype, device=delta.device)
    rows = top.to(delta.device).view(n, 1, 1) + torch.arange(side, device=delta.device).view(1, side, 1)
    cols = left.to(delta.device).view(n, 1, 1) + torch.arange(side, device=delta.device).view(1, 1, side)
    placed[torch.arange(n, device=delta.device).view(n, 1, 1), 0, rows, cols] = bump
    signs = _rademacher((n, channels, 1, 1), problem)
    empty = energy <= 1e-12 * eps_b.view(n, 1, 1, 1)
    # An empty pair borrows the share a uniform perturbation would give the window.
    share = eps_b.view(n, 1, 1, 1) * (side * side / (height * width * channels)) ** 0.5
    amount = torch.where(empty, share, energy)
    bumped = signs * amount * placed
    grown = image * into + bumped
    size = grown.flatten(2).norm(dim=2).view(n, channels, 1, 1)
    # the window's old content cancelled by the bump: take the bump alone
    cancelled = size <= 1e-6 * amount
    grown = torch.where(cancelled, bumped, grown)
    size = torch.where(cancelled, amount, size).clamp_min(1e-30)
    moved = torch.where(both, grown * (amount / size), image).reshape(delta.shape)
    # Only a borrowed share changes the norm: put those points back on their sphere.
    borrowed = empty.flatten(1).any(1).view(dims)
    return torch.where(borrowed, _onto_sphere(moved, eps_b), moved)
