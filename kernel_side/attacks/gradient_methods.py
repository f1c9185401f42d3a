"""The gradient attacks: FGSM, PGD and Carlini-Wagner L2, each registered in
:mod:`jostle.attacks.registry` (the entry point :func:`jostle.attack` is in :mod:`jostle.attacks.run`).

Gradients come from the ensemble's gradient engine
(:meth:`jostle.Ensemble.value_and_input_grad`, through
:meth:`AttackProblem.objective_and_grad`): one pass over all members and points on the
summed per-point objective (points are independent, so each point receives its own
gradient).
"""
from __future__ import annotations

import math
from typing import Any

import torch
from torch import Tensor

from jostle.attacks.outcome import finish
from jostle.attacks.problem import AttackProblem, AttackResult, norm_of
from jostle.attacks.registry import register_attack
from jostle.common.checks import check_float, check_int, show_value

__all__ = ["fgsm", "pgd", "cw"]

_GRADIENT_OBJECTIVES = ("expected_loss", "predictive", "margin")


@register_attack("fgsm", norms=("inf", "2"), objectives=_GRADIENT_OBJECTIVES, gradient_free=False,
                 per_point_eps=True, description="fast gradient sign method: one step of size eps")
def fgsm(problem: AttackProblem, steps: int = 1, record_path: bool = True) -> AttackResult:
    """Fast gradient sign method (Goodfellow et al. 2015): one step of size eps.

    L-inf: ``x + eps * sign(grad)``; L2: ``x + eps * grad / |grad|``; clipped to the bounds.
    """
    start_value, grad = problem.objective_and_grad(problem.x)
    x_adv = problem.project(problem.x + problem.eps_b * problem.step_direction(grad))
    with torch.no_grad():
        end_value = problem.objective(x_adv)
    path = torch.stack([problem.x, x_adv]) if record_path else None
    queries = torch.full((problem.points,), 2, dtype=torch.long)
    return finish(problem, x_adv, path, torch.stack([start_value, end_value]), queries, "fgsm")


@register_attack("pgd", norms=("inf", "2"), objectives=_GRADIENT_OBJECTIVES, gradient_free=False,
                 per_point_eps=True, description="projected gradient ascent inside the eps-ball")
def pgd(problem: AttackProblem, steps: int = 40, step_size: Any = None, random_start: bool = True,
        restarts: int = 1, record_path: bool = True) -> AttackResult:
    """Projected gradient ascent (Madry et al. 2018) in L-inf or L2.

    Every iterate is projected onto the eps-ball and into the bounds. With several
    restarts each point keeps its best run: successful first, then highest final objective.
    The returned ``x_adv`` is the last iterate of that run.
    """
    restarts = check_int("restarts", restarts, low=1)
    if not isinstance(random_start, bool):
        raise ValueError(f"random_start must be True or False; got {show_value(random_start)}")
    if restarts > 1 and not random_start:
        raise ValueError(f"restarts > 1 needs random_start=True (otherwise every run is the same); got {restarts}")
    if step_size is None:
        step_b = 2.5 * problem.eps_b / steps
    else:
        step_b = torch.full_like(problem.eps_b, check_float("step_size", step_size, low=0.0, low_open=True))
    best = None
    for _ in range(restarts):
        run = _pgd_run(problem, steps, step_b, random_start, record_path)
        best = run if best is None else _better_of(best, run)
    x_adv, path, loss, success, probs = best
    queries = torch.full((problem.points,), (steps + 1) * restarts, dtype=torch.long)
    return finish(problem, x_adv, path, loss, queries, "pgd", success=success, probs=probs)


@register_attack("cw", norms=("2",), objectives=("margin",), gradient_free=False,
                 description="Carlini-Wagner L2: the smallest flipping perturbation, kept inside the ball")
def cw(problem: AttackProblem, steps: int = 40, kappa: float = 0.0, search_steps: int = 6,
       c_init: float = 1.0, learning_rate: float = 0.01, record_path: bool = True) -> AttackResult:
    """Carlini & Wagner (2017) L2 attack on the attacker's averaged predictive.

    Minimises ``|x' - x|^2 + c * max(margin(x'), -kappa)`` with Adam, where
    ``x' = mid + half * tanh(w)`` keeps every iterate inside the bounds (unbounded inputs
    are optimised directly). A per-point binary search over ``c`` (x10 until a success,
    then bisection) drives the search towards the smallest flipping perturbation, at any
    distance.

    ``x_adv`` always lies inside the eps-ball: every iterate is projected onto the ball
    (the identity for iterates already inside), and each point keeps the best projected
    iterate: a flip (judged predictive changed and attacker margin <= -kappa) at the
    smallest distance, else the lowest attacker margin; ``x`` itself where nothing beats
    it. ``success`` is judged at ``x_adv``. The closest flip found at any distance goes in
    ``info``: ``closest_flip`` (NaN where none), ``closest_flip_distance`` (inf where
    none), ``flipped`` (found at all) and ``beyond_budget`` (found, but only outside the
    ball). ``path`` holds the in-ball best after each round, ``path[0] = x``.
    """
    kappa = check_float("kappa", kappa, low=0.0)
    search_steps = check_int("search_steps", search_steps, low=1)
    c = torch.full((problem.points,), check_float("c_init", c_init, low=0.0, low_open=True),
                   dtype=problem.x.dtype, device=problem.x.device)
    learning_rate = check_float("learning_rate", learning_rate, low=0.0, low_open=True)
    encode, decode = _tanh_box(problem)
    c_low, c_high = torch.zeros_like(c), torch.full_like(c, math.inf)
    search = _CWSearch.start(problem, kappa)
    path = [problem.x]
    for _ in range(search_steps):
        found = _cw_round(problem, encode, decode, c, kappa, steps, learning_rate, search)
        c_high = torch.where(found, torch.minimum(c_high, c), c_high)
        c_low = torch.where(found, c_low, torch.maximum(c_low, c))
        c = torch.where(torch.isfinite(c_high), (c_low + c_high) / 2, c * 10)
        path.append(search.inside_x)
    margins = torch.stack([problem.margin(p) for p in path])
    queries = search.queries.cpu() + steps * search_steps + len(path)
    result = finish(problem, search.inside_x, torch.stack(path) if record_path else None, -margins, queries,
                    "cw", norm="2", objective="margin")
    result.margin = margins
    result.info.update(search.report(problem), c=c.cpu().numpy(), kappa=kappa)
    return result


# ------------------------------------------------------------------ private helpers
def _pgd_run(problem: AttackProblem, steps: int, step_b: Tensor, random_start: bool, record_path: bool):
    x_t = problem.random_start() if random_start else problem.x.clone()
    path, values = [], []
    for _ in range(steps):
        value, grad = problem.objective_and_grad(x_t)
        values.append(value)
        if record_path:
            path.append(x_t)
        x_t = problem.project(x_t + step_b * problem.step_direction(grad))
    with torch.no_grad():
        values.append(problem.objective(x_t))
    if record_path:
        path.append(x_t)
    success, probs = problem.judge(x_t)
    return x_t, torch.stack(path) if record_path else None, torch.stack(values), success, probs


def _better_of(old, new):
    """Per point, keep the successful run, else the one with the higher final objective."""
    old_x, old_path, old_loss, old_ok, old_probs = old
    new_x, new_path, new_loss, new_ok, new_probs = new
    take = (new_ok & ~old_ok) | ((new_ok == old_ok) & (new_loss[-1] > old_loss[-1]))
    view = take.view((-1,) + (1,) * (old_x.ndim - 1))
    x = torch.where(view, new_x, old_x)
    path = None if old_path is None else torch.where(view.unsqueeze(0), new_path, old_path)
    loss = torch.where(take.unsqueeze(0), new_loss, old_loss)
    probs = torch.where(take.unsqueeze(1), new_probs, old_probs)
    return x, path, loss, torch.where(take, new_ok, old_ok), probs


def _tanh_box(problem: AttackProblem):
    """Change of variables ``x = mid + half * tanh(w)``: every w maps inside the box."""
    if problem.bounds is None:
        return (lambda x: x.clone()), (lambda w: w)
    lo, hi = problem.bounds
    mid, half = (lo + hi) / 2, (hi - lo) / 2
    safe = torch.where(half > 0, half, torch.ones_like(half))

    def encode(x: Tensor) -> Tensor:
        return torch.atanh(((x - mid) / safe).clamp(-1 + 1e-6, 1 - 1e-6))

    def decode(w: Tensor) -> Tensor:
        return torch.where(half > 0, mid + half * torch.tanh(w), mid)

    return encode, decode


class _CWSearch:
    """What C&W keeps per point: the closest flip at any distance, and the best point
    inside the eps-ball (a flip at the smallest distance, else the lowest margin)."""

    def __init__(self, kappa: float, flip_x: Tensor, flip_distance: Tensor, inside_x: Tensor, inside_ok: Tensor,
                 inside_margin: Tensor, inside_distance: Tensor, queries: Tensor):
        self.kappa = kappa
        self.flip_x, self.flip_distance = flip_x, flip_distance
        self.inside_x, self.inside_ok = inside_x, inside_ok
        self.inside_margin, self.inside_distance = inside_margin, inside_distance
        self.queries = queries

    @classmethod
    def start(cls, problem: AttackProblem, kappa: float) -> _CWSearch:
        x = problem.x
        ok, _ = problem.judge(x)
        margin = problem.margin(x)
        if kappa > 0:
            ok = ok & (margin <= -kappa)
        none = torch.full((problem.points,), math.inf, dtype=x.dtype, device=x.device)
        return cls(kappa, torch.full_like(x, math.nan), none, x.clone(), ok, margin, torch.zeros_like(none),
                   torch.zeros(problem.points, dtype=torch.long, device=x.device))

    def offer(self, problem: AttackProblem, candidate: Tensor, ok: Tensor, margin: Tensor) -> None:
        """Consider one iterate (``ok``: it flips; ``margin``: the attacker's, at ``candidate``)."""
        distance = norm_of(candidate - problem.x, "2")
        closer = ok & (distance < self.flip_distance)
        self.flip_distance = torch.where(closer, distance, self.flip_distance)
        self.flip_x = torch.where(_per_point(closer, candidate), candidate, self.flip_x)
        beyond = distance > problem.eps
        if bool(beyond.any()):
            # Outside the ball: judge its projection instead (one more attacker query).
            candidate = problem.project(candidate)
            distance = norm_of(candidate - problem.x, "2")
            projected_ok, _ = problem.judge(candidate)
            projected_margin = problem.margin(candidate)
            if self.kappa > 0:
                projected_ok = projected_ok & (projected_margin <= -self.kappa)
            ok = torch.where(beyond, projected_ok, ok)
            margin = torch.where(beyond, projected_margin, margin)
            self.queries += beyond.long()
        better = (ok & ~self.inside_ok) | (ok & self.inside_ok & (distance < self.inside_distance)) | \
            (~ok & ~self.inside_ok & (margin < self.inside_margin))
        self.inside_x = torch.where(_per_point(better, candidate), candidate, self.inside_x)
        self.inside_ok = torch.where(better, ok, self.inside_ok)
        self.inside_margin = torch.where(better, margin, self.inside_margin)
        self.inside_distance = torch.where(better, distance, self.inside_distance)

    def report(self, problem: AttackProblem) -> dict:
        flipped = torch.isfinite(self.flip_distance)
        return {"flipped": flipped.cpu().numpy(),
                "beyond_budget": (flipped & (self.flip_distance > problem.eps)).cpu().numpy(),
                "closest_flip": self.flip_x.detach().cpu().numpy(),
                "closest_flip_distance": self.flip_distance.detach().cpu().numpy()}


def _per_point(mask: Tensor, like: Tensor) -> Tensor:
    return mask.view((-1,) + (1,) * (like.ndim - 1))


def _cw_round(problem, encode, decode, c, kappa, steps, learning_rate, search: _CWSearch) -> Tensor:
    """One round of Adam at fixed ``c``; offers every iterate to ``search`` and returns
    which points flipped (at any distance) in this round."""
    w = encode(problem.x).detach().requires_grad_(True)
    optimiser = torch.optim.Adam([w], lr=learning_rate)
    found = torch.zeros(problem.points, dtype=torch.bool, device=problem.x.device)
    for _ in range(steps):
        with torch.enable_grad():
            x_adv = decode(w)
            margin = -problem.objective(x_adv, "margin")
            distance2 = (x_adv - problem.x).flatten(1).pow(2).sum(1)
            total = (distance2 + c * margin.clamp_min(-kappa)).sum()
            optimiser.zero_grad(set_to_none=True)
            total.backward()
        candidate, margin = x_adv.detach(), margin.detach()
        success, _ = problem.judge(candidate)
        if kappa > 0:
            success = success & (margin <= -kappa)
        found |= success
        search.offer(problem, candidate, success, margin)
        optimiser.step()
    return found
