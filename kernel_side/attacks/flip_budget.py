"""The smallest flipping budget an attack finds: an upper bound, beside the certified lower bound.

:func:`minimal_budget` bisects each point's budget. At every budget it tries, in turn and
only on the points not flipped yet: PGD from ``x`` on each objective, PGD from seeded random
starts (``restarts`` runs per objective), and a registered gradient-free attack (``square`` by
default), so that a point where the gradients mislead is still searched. Every flip found is
then pulled back along the segment towards ``x`` as long as it stays flipped, and the point's
bracket closes on the flip's own distance, not on the budget it was found at.

Whatever it reports is a witness: an input at that distance whose judged prediction differs.
The true smallest flipping distance can only be smaller; :func:`jostle.certified_radius`
gives a radius below it (no flip is possible within it), and between the two nobody knows.
"""
from __future__ import annotations

import inspect
import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import torch
from torch import Tensor

from jostle.attacks.gradient_methods import pgd
from jostle.attacks.problem import AttackProblem, build_problem, compute_threads, norm_of
from jostle.attacks.run import attack_names, attack_spec
from jostle.common.checks import check_float, check_int, show_value

__all__ = ["minimal_budget", "MinimalBudget"]

SEGMENT_POINTS = 32
SHRINK_TRIES = 6
NOT_FOUND = "not found"
ALREADY = "already flipped"


@dataclass
class MinimalBudget:
    """Per point, an upper bound on the smallest budget that flips its judged prediction.

    Attributes
    ----------
    eps : Tensor of shape (n_points,)
        The upper bound: the distance of the closest flipping input found (``x_adv``), in
        ``norm``; ``inf`` where none was found, 0 where the label was already flipped at ``x``.
        The smallest flipping budget lies in ``[certified radius, eps]``.
    upper : Tensor of shape (n_points,)
        The same tensor as ``eps``, under the name of what it is.
    lower : Tensor of shape (n_points,)
        Lower end of the final bracket: the largest budget below ``eps`` at which every
        method tried failed. Evidence, not proof (a stronger attack may flip there);
        the proved lower bound is :func:`jostle.certified_radius`.
    x_adv : Tensor of shape (n_points, *input_shape)
        The flipping input at distance ``eps`` (``x`` where none was found).
    adv_probs : Tensor of shape (n_points, n_classes)
        The judged predictive at ``x_adv``.
    success : Tensor of shape (n_points,), bool
    label : Tensor of shape (n_points,)
    found_by : tuple of str, one per point
        Which method found the reported flip: ``"pgd expected_loss"``, ``"pgd margin"``,
        ``"pgd <objective> restarts"``, the fallback's name (``"square"``), ``"already flipped"``
        or ``"not found"``.
    """

    eps: Tensor
    lower: Tensor
    x_adv: Tensor
    adv_probs: Tensor
    success: Tensor
    label: Tensor
    norm: str
    info: dict = field(default_factory=dict)
    found_by: tuple = ()

    @property
    def upper(self) -> Tensor:
        """The upper bound on the smallest flipping budget (``eps``)."""
        return self.eps

    def to_dict(self) -> dict:
        out = {k: getattr(self, k).detach().cpu().numpy()
               for k in ("eps", "lower", "x_adv", "adv_probs", "success", "label")}
        out.update(upper=out["eps"], found_by=list(self.found_by), norm=self.norm, info=dict(self.info))
        return out


def minimal_budget(ens, x: Any, y: Any = None, norm: str = "inf", samples: Any = None, steps: int = 40,
                   iterations: int = 16, high: float | None = None, random_start: bool = False,
                   bounds: Any = None, target: Any = None, seed: int = 0, threads: Any = "auto", *,
                   restarts: int = 2, objectives: Any = ("expected_loss", "margin"), fallback: Any = "square",
                   fallback_steps: int | None = None, backward: str = "auto") -> MinimalBudget:
    """An upper bound on the smallest budget that flips each point's judged prediction.

    Every point keeps its own bracket ``[lower, upper]``; each of ``iterations`` rounds
    tries the midpoints of all open brackets at once. At a budget, the methods below run in
    turn, each only on the points not flipped yet:

    1. PGD (Madry et al. 2018) from ``x`` (from a random start with ``random_start=True``),
       once per objective in ``objectives``;
    2. PGD from ``restarts`` seeded random starts per objective;
    3. ``fallback``, a registered gradient-free attack (Square, Andriushchenko et al. 2020,
       by default), for points where the gradients found nothing.

    A flip found at budget ``b`` is moved back along the segment to ``x`` to the nearest of
    32 evenly spaced points that still flips, and ``upper`` becomes that input's distance
    (at most ``b``). So ``eps`` is always the distance of a real flipping input,
    ``x_adv``: an upper bound on the smallest flipping budget, never below it. The
    certified lower bound is :func:`jostle.certified_radius`; the smallest budget lies
    between the two.

    The first bracket's upper end is ``high``, else the diameter of the bounds in the
    chosen norm (every point of the box is within reach), else it doubles from 1 until a
    flip is found (at most 20 times); where that budget finds no flip, 6 halvings of it are
    tried before the point is reported unflipped (``eps = inf``).

    Parameters
    ----------
    ens : Ensemble
    x : Tensor of shape (n_points, *input_shape)
    y : Tensor of shape (n_points,), optional
        Labels; None takes the ensemble's predictions at ``x``.
    norm : {"inf", "2"}
    samples : None, int or sequence of int
        The attacker's members (see :func:`jostle.attack`); success is judged on all.
    steps : int
        PGD steps per run.
    iterations : int
        Bisection rounds.
    high : float > 0, optional
    random_start : bool
        Start the first PGD runs at a random point of the ball instead of ``x``.
    bounds, target, seed, threads, backward
        As in :func:`jostle.attack`; ``seed`` seeds every random start and search.
    restarts : int >= 0
        Random-start PGD runs per objective at budgets where the first runs fail (0: none).
    objectives : sequence of {"expected_loss", "predictive", "margin"}
        PGD's objectives, tried in this order.
    fallback : str or None
        A registered gradient-free method supporting ``norm`` (built in: ``"square"``,
        ``"spsa"``), run where PGD found nothing; None runs none.
    fallback_steps : int, optional
        Its iterations; default ``5 * steps`` (Square spends one query per step).

    Returns
    -------
    MinimalBudget
        ``eps`` (alias ``upper``) of shape (n_points,), the bracket, the flipping inputs and
        ``found_by``.
    """
    settings = _settings(norm, steps, iterations, restarts, objectives, fallback, fallback_steps, random_start)
    problem = build_problem(ens, x, y, eps=0.0, norm=settings["norm"], objective=settings["objectives"][0],
                            samples=samples, resample=False, target=target, bounds=bounds, seed=seed,
                            backward=backward)
    with compute_threads(threads, ens, problem.points):
        return _search(problem, high, settings)


# ------------------------------------------------------------------ private helpers
def _settings(norm, steps, iterations, restarts, objectives, fallback, fallback_steps, random_start) -> dict:
    pgd_spec = attack_spec("pgd")
    if norm not in pgd_spec.norms:
        listed = ", ".join(repr(n) for n in pgd_spec.norms)
        raise ValueError(f"norm must be one of {listed}; got {show_value(norm)}")
    steps = check_int("steps", steps, low=1)
    iterations = check_int("iterations", iterations, low=1)
    restarts = check_int("restarts", restarts, low=0)
    if not isinstance(random_start, bool):
        raise ValueError(f"random_start must be True or False; got {show_value(random_start)}")
    if (isinstance(objectives, str) or not isinstance(objectives, (list, tuple)) or not objectives
            or any(o not in pgd_spec.objectives for o in objectives) or len(set(objectives)) != len(objectives)):
        raise ValueError(f"objectives must be a non-empty sequence of distinct values from "
                         f"{list(pgd_spec.objectives)}; got {show_value(objectives)}")
    if fallback is not None:
        spec = attack_spec(fallback) if isinstance(fallback, str) and fallback in attack_names() else None
        if spec is None or not spec.gradient_free or norm not in spec.norms:
            raise ValueError(f"fallback must be None or a registered gradient-free method supporting norm "
                             f"{norm!r} (built in: 'square', 'spsa'); got {show_value(fallback)}")
    fallback_steps = 5 * steps if fallback_steps is None else check_int("fallback_steps", fallback_steps, low=1)
    return {"norm": norm, "steps": steps, "iterations": iterations, "restarts": restarts,
            "objectives": tuple(objectives), "fallback": fallback, "fallback_steps": fallback_steps,
            "random_start": random_start}


def _stages(settings: dict) -> list[tuple[str, Callable[[AttackProblem], Any]]]:
    """The methods tried at one budget, in order, each as (name, run on a sub-problem)."""
    steps, objectives = settings["steps"], settings["objectives"]

    def first(objective):
        return lambda sub: pgd(replace(sub, objective_name=objective), steps,
                               random_start=settings["random_start"], record_path=False)

    def restarted(objective):
        return lambda sub: pgd(replace(sub, objective_name=objective), steps, random_start=True,
                               restarts=settings["restarts"], record_path=False)

    stages = [(f"pgd {o}", first(o)) for o in objectives]
    if settings["restarts"]:
        stages += [(f"pgd {o} restarts", restarted(o)) for o in objectives]
    if settings["fallback"] is not None:
        spec = attack_spec(settings["fallback"])
        quiet = {"record_path": False} if "record_path" in inspect.signature(spec.function).parameters else {}
        objective = next((o for o in objectives if o in spec.objectives), spec.objectives[0])
        stages.append((spec.name, lambda sub: spec.function(replace(sub, objective_name=objective),
                                                            settings["fallback_steps"], **quiet)))
    return stages


class _Closest:
    """The closest flip found so far per point: input, judged probabilities, distance, method."""

    def __init__(self, problem: AttackProblem, names: list[str]):
        self.problem, self.names = problem, names
        self.x_adv = problem.x.clone()
        self.probs = problem.clean_probs.clone()
        self.distance = torch.full_like(problem.eps, math.inf)
        self.stage = torch.full((problem.points,), -1, dtype=torch.long, device=problem.x.device)

    def offer(self, where: Tensor, x_adv: Tensor, probs: Tensor, stage: int) -> None:
        """Flipping inputs ``x_adv`` of points ``where``: pulled towards x, kept if closer."""
        x_adv, probs = _pull_back(self.problem, where, x_adv, probs)
        distance = norm_of(x_adv - self.problem.x[where], self.problem.norm)
        closer = distance < self.distance[where]
        chosen = where[closer]
        self.x_adv[chosen] = x_adv[closer]
        self.probs[chosen] = probs[closer]
        self.distance[chosen] = distance[closer]
        self.stage[chosen] = stage

    def found_by(self, already: Tensor) -> tuple[str, ...]:
        named = [self.names[int(s)] if s >= 0 else NOT_FOUND for s in self.stage.tolist()]
        return tuple(ALREADY if a else n for n, a in zip(named, already.tolist()))


def _search(problem: AttackProblem, high, settings: dict) -> MinimalBudget:
    """Per-point bisection that closes each bracket on the distance of the closest flip found."""
    stages = _stages(settings)
    closest = _Closest(problem, [name for name, _ in stages])
    already, _ = problem.judge(problem.x)
    closest.distance[already] = 0.0
    upper = torch.where(already, torch.zeros_like(problem.eps), _initial_upper(problem, high))
    ok = _try_flip(problem, upper, ~already, stages, closest) | already
    if high is None and problem.bounds is None:
        for _ in range(20):
            if bool(ok.all()):
                break
            upper = torch.where(ok, upper, upper * 2)
            ok = ok | _try_flip(problem, upper, ~ok, stages, closest)
    # A ball that covers the whole box may still hide a small flipping region from the
    # attacks (large steps overshoot it): smaller balls around x are searched before giving up.
    for halving in range(1, SHRINK_TRIES + 1):
        if bool(ok.all()):
            break
        ok = ok | _try_flip(problem, upper * 0.5**halving, ~ok, stages, closest)
    upper = torch.where(ok, closest.distance, upper)
    failed = []
    for _ in range(settings["iterations"]):
        todo = ok & ~already
        lower = _largest_below(failed, upper)
        middle = (lower + upper) / 2
        flipped = _try_flip(problem, middle, todo, stages, closest)
        failed.append(torch.where(todo & ~flipped, middle, torch.zeros_like(middle)))
        upper = torch.where(ok, closest.distance, upper)
    eps = torch.where(ok, closest.distance, torch.full_like(upper, math.inf))
    info = {k: settings[k] for k in ("steps", "iterations", "restarts", "fallback", "fallback_steps")}
    info.update(objectives=list(settings["objectives"]), bound="upper")
    return MinimalBudget(eps=eps, lower=_largest_below(failed, eps), x_adv=closest.x_adv, adv_probs=closest.probs,
                         success=ok, label=problem.label, norm=problem.norm, info=info,
                         found_by=closest.found_by(already))


def _largest_below(failed: list[Tensor], upper: Tensor) -> Tensor:
    """Per point, the largest failed budget below ``upper`` (0 where none)."""
    if not failed:
        return torch.zeros_like(upper)
    tried = torch.stack(failed)
    return torch.where(tried < upper, tried, torch.zeros_like(tried)).amax(0)


def _try_flip(problem: AttackProblem, eps: Tensor, active: Tensor, stages, closest: _Closest) -> Tensor:
    """Run the stages in turn at per-point budgets ``eps`` on the ``active`` points not yet flipped."""
    remaining = active.clone()
    for stage, (_, run) in enumerate(stages):
        if not bool(remaining.any()):
            break
        where = remaining.nonzero().flatten()
        # One random stream across stages and rounds: each random start is new.
        result = run(problem.subset(where, eps=eps[where], generator=problem.generator))
        hit = result.success.to(where.device)
        if bool(hit.any()):
            closest.offer(where[hit], result.x_adv[hit], result.adv_probs[hit], stage)
            remaining[where[hit]] = False
    return active & ~remaining


def _pull_back(problem: AttackProblem, where: Tensor, x_adv: Tensor, probs: Tensor) -> tuple[Tensor, Tensor]:
    """The point nearest ``x`` among ``x + t (x_adv - x)``, t = 1/K, ..., 1, that still flips,
    and its judged probabilities (``x_adv`` itself, t = 1, was judged flipped by the attack)."""
    x = problem.x[where]
    k, spread = x.shape[0], (1,) * (x.ndim - 1)
    t = torch.arange(1, SEGMENT_POINTS, dtype=x.dtype, device=x.device) / SEGMENT_POINTS
    # A convex combination of two points of the box lies in the box; the clip only undoes rounding.
    line = problem.clip(x + t.view((-1, 1) + spread) * (x_adv - x))
    line_probs = problem.ens.predict(line.flatten(0, 1), samples=problem.judge_samples).probs.view(len(t), k, -1)
    line = torch.cat([line, x_adv.unsqueeze(0)])
    line_probs = torch.cat([line_probs, probs.unsqueeze(0)])
    predicted = line_probs.argmax(-1)
    flips = predicted == problem.target[where] if problem.target is not None else predicted != problem.label[where]
    flips[-1] = True
    first = flips.to(torch.uint8).argmax(0)  # the first True along t
    pick = torch.arange(k, device=x.device)
    return line[first, pick], line_probs[first, pick]


def _initial_upper(problem: AttackProblem, high: float | None) -> Tensor:
    if high is not None:
        value = check_float("high", high, low=0.0, low_open=True)
        return torch.full_like(problem.eps, value)
    if problem.bounds is None:
        return torch.ones_like(problem.eps)
    span = (problem.bounds[1] - problem.bounds[0]).unsqueeze(0)
    return norm_of(span, problem.norm).expand_as(problem.eps).clone()
