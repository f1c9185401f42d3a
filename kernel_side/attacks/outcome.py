"""Packing an attack's outcome: the one helper every attack method ends with."""
from __future__ import annotations

from torch import Tensor

from jostle.attacks.problem import AttackProblem, AttackResult, norm_of

__all__ = ["finish"]


def finish(problem: AttackProblem, x_adv: Tensor, path: Tensor | None, loss: Tensor, queries: Tensor,
           method: str, success: Tensor | None = None, norm: str | None = None,
           probs: Tensor | None = None, objective: str | None = None) -> AttackResult:
    """Judge the final inputs on the chosen predictive and pack an :class:`AttackResult`.

    Parameters
    ----------
    problem : AttackProblem
    x_adv : Tensor of shape (n_points, *input_shape)
    path : Tensor of shape (n_iterates, n_points, *input_shape), or None
    loss : Tensor of shape (n_iterates, n_points)
        The ascended objective along the path.
    queries : Tensor of shape (n_points,), int64
    method : str
        The registered name, recorded on the result.
    success : Tensor of shape (n_points,), bool, optional
        Already judged at ``x_adv`` (with ``probs``); judged here when None.
    norm : str, optional
        The norm the attack measured in; defaults to the problem's.
    probs : Tensor of shape (n_points, n_classes), optional
        The judged predictive at ``x_adv`` when the attack already has it.
    objective : str, optional
        What the attack ascended when that is fixed (e.g. ``"margin"``); defaults to the
        problem's objective.
    """
    if probs is None:
        judged, probs = problem.judge(x_adv)
    else:
        judged = success
    return AttackResult(
        x_adv=x_adv.detach(), path=None if path is None else path.detach(), loss=loss.detach(),
        success=judged if success is None else success, label=problem.label, target=problem.target,
        clean_probs=problem.clean_probs, adv_probs=probs, distance=norm_of(x_adv - problem.x, norm or problem.norm),
        queries=queries, method=method, norm=norm or problem.norm, eps=problem.eps,
        objective=objective or problem.objective_name,
    )
