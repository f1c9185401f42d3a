"""Robustness read-outs built on the attacks: the expected gradient and how it fades as
the attacker averages more posterior samples, the smallest flipping budget per point (an
upper bound, from :mod:`jostle.attacks.flip_budget`, re-exported here), and how far an attack
moves the posterior predictive.

The gradient check for masked gradients lives in :mod:`jostle.masking`.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch import Tensor

from jostle.attacks.flip_budget import MinimalBudget, minimal_budget
from jostle.attacks.problem import build_problem, compute_threads
from jostle.common.checks import check_choice, check_int, check_points, check_seed, show_value

__all__ = ["expected_gradient", "member_gradients", "gradient_fade", "GradientFade", "minimal_budget",
           "MinimalBudget", "softmax_robustness"]

DEFAULT_SAMPLE_COUNTS = (1, 2, 4, 8, 16, 32, 64)
QUANTILE_LEVELS = (0.05, 0.25, 0.5, 0.75, 0.95)
NORM_KINDS = ("l1", "l2", "linf")


def expected_gradient(ens, x: Any, y: Any = None, samples: Any = None, objective: str = "expected_loss",
                      backward: str = "auto") -> Tensor:
    """Input gradient of the attacker's objective, averaged over posterior samples.

    With ``objective="expected_loss"`` this is the gradient of the mean per-sample
    cross-entropy, which equals the mean of the per-sample gradients (Athalye et al. 2018).

    Parameters
    ----------
    ens : Ensemble
    x : Tensor of shape (n_points, *input_shape)
    y : Tensor of shape (n_points,), optional
        Labels; None uses the full ensemble's predicted labels.
    samples : None, int or sequence of int
        Members averaged over (an int ``k``: the first ``k``).
    objective : {"expected_loss", "predictive", "margin"}
    backward : {"auto", "autograd"}
        The gradient engine's switch (see :meth:`jostle.Ensemble.value_and_input_grad`).

    Returns
    -------
    Tensor of shape (n_points, *input_shape)
    """
    problem = build_problem(ens, x, y, eps=0.0, norm="inf", objective=objective, samples=samples,
                            resample=False, target=None, bounds=None, seed=0, use_bounds=False,
                            backward=backward)
    with compute_threads("auto", ens, problem.points):
        return problem.objective_and_grad(problem.x)[1]


def member_gradients(ens, x: Any, y: Any = None, backward: str = "auto") -> Tensor:
    """Each member's input gradient of its own cross-entropy, in one vectorised pass.

    The ensemble's gradient engine (:meth:`jostle.Ensemble.member_input_grads`): the planned
    hand-written passes for Linear + tanh/ReLU/sigmoid stacks, ``torch.func.vmap(grad(...))``
    for any other module or with ``backward="autograd"``.

    Returns
    -------
    Tensor of shape (n_members, n_points, *input_shape)
    """
    problem = build_problem(ens, x, y, eps=0.0, norm="inf", objective="expected_loss", samples=None,
                            resample=False, target=None, bounds=None, seed=0, use_bounds=False,
                            backward=backward)
    with compute_threads("auto", ens, problem.points):
        return ens.member_input_grads(problem.x, problem.label, backward=problem.backward)


@dataclass
class GradientFade:
    """How the expected gradient's size changes with the number of samples averaged.

    Attributes
    ----------
    sample_counts : ndarray of shape (K,)
    norms : dict of kind -> ndarray of shape (K, repeats, n_points)
        ``l1``, ``l2`` and ``linf`` norms of the S-sample expected gradient, for random
        S-subsets of members (without replacement) drawn ``repeats`` times.
    norm_mean, reference : dict of kind -> ndarray of shape (K,)
        Mean norm over repeats and points, and the Monte Carlo reference
        ``norm_mean[0] * sqrt(S_0 / S)`` (1/sqrt(S) scaled to the smallest count).
    norm_quantiles : dict of kind -> ndarray of shape (K, Q)
    component_quantiles : ndarray of shape (K, Q)
        Quantiles of the gradient's components over repeats, points and features.
    component_abs_mean : ndarray of shape (K,)
    error_mean : ndarray of shape (K,)
        Mean L2 distance to the full ensemble's expected gradient (the Monte Carlo error).
    full_norm : dict of kind -> ndarray of shape (n_points,)
        Norms of the expected gradient over every member (the limit the fade tends to).
    """

    sample_counts: np.ndarray
    quantile_levels: np.ndarray
    norms: dict
    norm_mean: dict
    norm_quantiles: dict
    reference: dict
    component_quantiles: np.ndarray
    component_abs_mean: np.ndarray
    error_mean: np.ndarray
    full_norm: dict
    repeats: int
    members: int
    info: dict = field(default_factory=dict)

    def rows(self) -> list[dict]:
        """One plain dict per sample count (for tables and plots)."""
        out = []
        for k, count in enumerate(self.sample_counts):
            row = {"samples": int(count)}
            for kind in NORM_KINDS:
                row[f"{kind}_mean"] = float(self.norm_mean[kind][k])
                row[f"{kind}_reference"] = float(self.reference[kind][k])
                row[f"{kind}_median"] = float(self.norm_quantiles[kind][k, len(self.quantile_levels) // 2])
            row["component_abs_mean"] = float(self.component_abs_mean[k])
            row["error_mean"] = float(self.error_mean[k])
            out.append(row)
        return out

    def to_dict(self) -> dict:
        """Numpy arrays and numbers only."""
        return {
            "sample_counts": self.sample_counts, "quantile_levels": self.quantile_levels,
            "norms": dict(self.norms), "norm_mean": dict(self.norm_mean),
            "norm_quantiles": dict(self.norm_quantiles), "reference": dict(self.reference),
            "component_quantiles": self.component_quantiles, "component_abs_mean": self.component_abs_mean,
            "error_mean": self.error_mean, "full_norm": dict(self.full_norm),
            "repeats": self.repeats, "members": self.members,
        }


def gradient_fade(ens, x: Any, y: Any = None, sample_counts: Any = None, repeats: int = 50,
                  seed: int = 0) -> GradientFade:
    """The expected gradient's norm and components as the attacker averages S samples.

    Per-member gradients are computed once (:func:`member_gradients`); each S-sample
    expected gradient is the mean over a random S-subset of members, drawn ``repeats``
    times without replacement. For independent members the Monte Carlo error shrinks like
    1/sqrt(S); where members disagree in sign, the norm itself fades the same way.

    Parameters
    ----------
    sample_counts : sequence of int, optional
        Default ``(1, 2, 4, 8, 16, 32, 64)``, keeping those <= ``len(ens)``.
    repeats : int
        Random subsets per count.

    Returns
    -------
    GradientFade
    """
    members = len(ens)
    counts = _sample_counts(sample_counts, members)
    repeats = check_int("repeats", repeats, low=1)
    generator = torch.Generator().manual_seed(check_seed(seed))
    per_member = member_gradients(ens, x, y).flatten(2)
    flat = per_member.reshape(members, -1)
    full = per_member.mean(0)
    rows: dict[str, list] = {"norms": [], "components": [], "error": []}
    for count in counts:
        chosen = torch.rand((repeats, members), generator=generator).argsort(dim=1)[:, :count]
        weights = torch.zeros((repeats, members), dtype=flat.dtype).scatter_(1, chosen, 1.0 / count)
        averaged = (weights.to(flat.device) @ flat).view(repeats, *per_member.shape[1:])
        rows["norms"].append(_three_norms(averaged))
        rows["components"].append(averaged.flatten().cpu())
        rows["error"].append(float((averaged - full).norm(dim=-1).mean()))
    return _pack_fade(counts, rows, full, repeats, members)


def softmax_robustness(ens, x: Any, x_adv: Any, kind: str = "max", samples: Any = None,
                       reduce: bool = True) -> float | Tensor:
    """How little an attack moved the posterior predictive: 1 means not at all.

    ``kind="max"``: ``1 - mean_n max_c |p(c|x_n) - p(c|x_adv_n)|``;
    ``kind="tv"``: ``1 - mean_n TV(p(.|x_n), p(.|x_adv_n))`` with total variation
    ``0.5 * sum_c |p - p_adv|``. Identical inputs give exactly 1.

    Parameters
    ----------
    x, x_adv : Tensor of shape (n_points, *input_shape)
    samples : members of the predictive (None: all)
    reduce : bool
        False returns the per-point score, shape (n_points,).
    """
    kind = check_choice("kind", kind, ("max", "tv"))
    if not isinstance(reduce, bool):
        raise ValueError(f"reduce must be True or False; got {show_value(reduce)}")
    x = check_points("x", x, ens, min_points=1, detach=True)
    x_adv = check_points("x_adv", x_adv, ens, min_points=1, detach=True)
    if x.shape != x_adv.shape:
        raise ValueError(f"x_adv must have the shape of x {tuple(x.shape)}; got {tuple(x_adv.shape)}")
    gap = (ens.predict(x, samples=samples).probs - ens.predict(x_adv, samples=samples).probs).abs()
    moved = gap.amax(-1) if kind == "max" else 0.5 * gap.sum(-1)
    score = 1.0 - moved
    return float(score.mean()) if reduce else score


# ------------------------------------------------------------------ private helpers
def _sample_counts(sample_counts: Any, members: int) -> list[int]:
    if sample_counts is None:
        return [c for c in DEFAULT_SAMPLE_COUNTS if c <= members]
    if isinstance(sample_counts, (int, str)) or not hasattr(sample_counts, "__iter__"):
        raise ValueError(f"sample_counts must be a sequence of integers; got {show_value(sample_counts)}")
    counts = [check_int("sample_counts entry", int(c) if isinstance(c, np.integer) else c, low=1, high=members)
              for c in sample_counts]
    if not counts:
        raise ValueError("sample_counts must hold at least one count; got an empty sequence")
    return sorted(set(counts))


def _three_norms(g: Tensor) -> dict[str, Tensor]:
    return {"l1": g.abs().sum(-1).cpu(), "l2": g.norm(dim=-1).cpu(), "linf": g.abs().amax(-1).cpu()}


def _pack_fade(counts, rows, full: Tensor, repeats: int, members: int) -> GradientFade:
    levels = torch.tensor(QUANTILE_LEVELS, dtype=torch.float64)
    norms = {k: np.stack([r[k].numpy() for r in rows["norms"]]) for k in NORM_KINDS}
    norm_mean = {k: v.reshape(len(counts), -1).mean(1) for k, v in norms.items()}
    first = float(counts[0])
    reference = {k: v[0] * np.sqrt(first / np.asarray(counts, dtype=float)) for k, v in norm_mean.items()}
    quantiles = {k: np.quantile(v.reshape(len(counts), -1), QUANTILE_LEVELS, axis=1).T for k, v in norms.items()}
    components = np.stack([np.quantile(c.double().numpy(), levels.numpy()) for c in rows["components"]])
    return GradientFade(
        sample_counts=np.asarray(counts), quantile_levels=levels.numpy(), norms=norms, norm_mean=norm_mean,
        norm_quantiles=quantiles, reference=reference, component_quantiles=components,
        component_abs_mean=np.asarray([float(c.abs().mean()) for c in rows["components"]]),
        error_mean=np.asarray(rows["error"]), full_norm={k: v.numpy() for k, v in _three_norms(full).items()},
        repeats=repeats, members=members,
    )
