"""A check for masked gradients: do gradient attacks behave as real attacks should?

Signs that a gradient attack's failure says nothing about robustness (common practice;
Athalye et al. 2018, Uesato et al. 2018): a gradient-free attack flips points that PGD
could not; success falls as the budget grows; single-step FGSM beats iterative PGD.
Whatever the verdict, attack results are empirical evidence, not certificates.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch

from jostle.attacks.run import attack, attack_names, attack_spec
from jostle.common.checks import check_float, check_int, show_value

__all__ = ["masking_check", "MaskingReport"]

CAVEAT = ("Attack results are empirical evidence of vulnerability, not certificates of robustness: "
          "a stronger or different attack may still succeed.")


@dataclass
class MaskingReport:
    """The verdict of :func:`masking_check` and the numbers behind it.

    Attributes
    ----------
    masked : bool
        True when any sign of gradient masking exceeds the tolerance.
    verdict : str
        Plain-language summary, ending with the caveat that attacks certify nothing.
    flags : dict of str -> bool
        ``gradient_free_beats_pgd``, ``success_falls_with_budget``, ``fgsm_beats_pgd``,
        ``few_samples_beat_many`` (reported, not counted as masking).
    rates : dict of str -> float
        Success rates of each attack at ``eps``.
    budgets, budget_rates : ndarray of shape (B,)
        PGD success at several budgets.
    free_only : float
        Share of points the gradient-free attack flipped and PGD did not.
    """

    masked: bool
    verdict: str
    flags: dict
    rates: dict
    budgets: np.ndarray
    budget_rates: np.ndarray
    free_only: float
    eps: float
    norm: str
    gradient_free: str
    info: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"masked": self.masked, "verdict": self.verdict, "flags": dict(self.flags), "rates": dict(self.rates),
                "budgets": self.budgets, "budget_rates": self.budget_rates, "free_only": self.free_only,
                "eps": self.eps, "norm": self.norm, "gradient_free": self.gradient_free, "info": dict(self.info)}


def masking_check(ens, x: Any, y: Any = None, eps: float = 0.1, norm: str = "inf", steps: int = 40,
                  few_samples: int | None = None, budget_scales: Any = (0.25, 0.5, 1.0, 2.0, 4.0),
                  gradient_free: str | None = None, free_steps: int | None = None, tolerance: float = 0.05,
                  bounds: Any = None, seed: int = 0) -> MaskingReport:
    """Run gradient and gradient-free attacks at one budget and read the signs of masking.

    Runs PGD with every member and with ``few_samples`` members (a fresh random subset
    each step; default ``max(1, S // 10)``), FGSM, and a gradient-free attack (Square for
    L-inf, SPSA on the margin for L2) at ``eps``; and PGD at ``eps * budget_scales``.

    Parameters
    ----------
    tolerance : float
        Share of points by which an expectation may be missed before it is flagged.
    gradient_free : str, optional
        A registered gradient-free method supporting ``norm`` (built in: ``"square"``,
        ``"spsa"``). Default Square for L-inf and SPSA for L2. It ascends the margin when
        it can (SPSA does), else its default objective.
    free_steps : int, optional
        Iterations of the gradient-free attack (default ``10 * steps`` for Square, whose
        iterations are single queries; ``steps`` for the others).

    Returns
    -------
    MaskingReport
    """
    eps = check_float("eps", eps, low=0.0, low_open=True)
    steps = check_int("steps", steps, low=1)
    tolerance = check_float("tolerance", tolerance, low=0.0, high=1.0)
    scales = _scales(budget_scales)
    if gradient_free is None:
        gradient_free = "square" if norm == "inf" else "spsa"
    free_methods = [name for name in attack_names() if attack_spec(name).gradient_free]
    if not isinstance(gradient_free, str) or gradient_free not in free_methods:
        raise ValueError(f"gradient_free must be one of {', '.join(map(repr, free_methods))} (the registered "
                         f"gradient-free attacks); got {show_value(gradient_free)}")
    if norm not in attack_spec(gradient_free).norms:
        raise ValueError(f"norm must be one of {list(attack_spec(gradient_free).norms)} for method "
                         f"{gradient_free!r}; got {show_value(norm)}")
    few = max(1, len(ens) // 10) if few_samples is None else check_int("few_samples", few_samples, low=1,
                                                                          high=len(ens))
    common = dict(norm=norm, bounds=bounds, seed=seed)
    pgd_full = attack(ens, x, y, method="pgd", eps=eps, steps=steps, record_path=False, **common)
    pgd_few = attack(ens, x, y, method="pgd", eps=eps, steps=steps, samples=few, resample=True,
                     record_path=False, **common)
    fgsm = attack(ens, x, y, method="fgsm", eps=eps, record_path=False, **common)
    free = _free_attack(ens, x, y, gradient_free, eps, steps, free_steps, common)
    budgets = np.asarray([eps * s for s in scales])
    budget_rates = np.asarray([
        pgd_full.success_rate if s == 1.0 else
        attack(ens, x, y, method="pgd", eps=float(b), steps=steps, record_path=False, **common).success_rate
        for s, b in zip(scales, budgets)
    ])
    rates = {"pgd": pgd_full.success_rate, "pgd_few_samples": pgd_few.success_rate, "fgsm": fgsm.success_rate,
             gradient_free: free.success_rate}
    free_only = float((free.success & ~pgd_full.success).float().mean())
    largest_drop = float(np.max(np.maximum.accumulate(budget_rates) - budget_rates))
    flags = {
        "gradient_free_beats_pgd": free_only > tolerance,
        "success_falls_with_budget": largest_drop > tolerance,
        "fgsm_beats_pgd": rates["fgsm"] > rates["pgd"] + tolerance,
        "few_samples_beat_many": rates["pgd_few_samples"] > rates["pgd"] + tolerance,
    }
    masked = flags["gradient_free_beats_pgd"] or flags["success_falls_with_budget"] or flags["fgsm_beats_pgd"]
    verdict = _verdict(flags, rates, free_only, largest_drop, gradient_free, few, masked)
    return MaskingReport(masked=masked, verdict=verdict, flags=flags, rates=rates, budgets=budgets,
                         budget_rates=budget_rates, free_only=free_only, eps=eps, norm=norm,
                         gradient_free=gradient_free,
                         info={"few_samples": few, "steps": steps, "free_queries": int(free.queries.max()),
                               "largest_drop": largest_drop, "tolerance": tolerance})


# ------------------------------------------------------------------ private helpers
def _scales(budget_scales: Any) -> list[float]:
    if isinstance(budget_scales, (int, float, str)) or not hasattr(budget_scales, "__iter__"):
        raise ValueError(f"budget_scales must be a sequence of positive floats; got {show_value(budget_scales)}")
    scales = sorted({check_float("budget_scales entry", _scalar(s), low=0.0, low_open=True)
                     for s in budget_scales})
    if len(scales) < 2:
        raise ValueError(f"budget_scales must hold at least two distinct scales; got {show_value(budget_scales)}")
    return scales


def _scalar(value: Any) -> Any:
    return value.item() if isinstance(value, (np.generic, torch.Tensor)) and value.ndim == 0 else value


def _free_attack(ens, x, y, method, eps, steps, free_steps, common):
    default_steps = 10 * steps if method == "square" else steps
    iterations = default_steps if free_steps is None else check_int("free_steps", free_steps, low=1)
    objectives = attack_spec(method).objectives
    objective = "margin" if "margin" in objectives else objectives[0]
    return attack(ens, x, y, method=method, eps=eps, steps=iterations, objective=objective, record_path=False,
                  **common)


def _verdict(flags, rates, free_only, largest_drop, free_name, few, masked) -> str:
    parts = []
    if flags["gradient_free_beats_pgd"]:
        parts.append(f"the gradient-free attack ({free_name}) flips {free_only:.0%} of points that PGD could not: "
                     f"gradients look masked; do not read PGD's failure as robustness.")
    if flags["success_falls_with_budget"]:
        parts.append(f"PGD's success falls by {largest_drop:.0%} as the budget grows, which a working attack "
                     f"never does: its gradients are misleading it.")
    if flags["fgsm_beats_pgd"]:
        parts.append(f"single-step FGSM ({rates['fgsm']:.0%}) beats iterative PGD ({rates['pgd']:.0%}): the "
                     f"loss surface misleads iterative ascent.")
    if not masked:
        parts.append(f"no sign of gradient masking: FGSM ({rates['fgsm']:.0%}) does not beat PGD "
                     f"({rates['pgd']:.0%}) by more than the tolerance, the gradient-free attack "
                     f"({rates[free_name]:.0%}) flips {free_only:.0%} of points that PGD could not, and PGD's "
                     f"success does not fall as the budget grows.")
    if flags["few_samples_beat_many"]:
        parts.append(f"PGD averaging {few} resampled members ({rates['pgd_few_samples']:.0%}) beats PGD averaging "
                     f"all of them ({rates['pgd']:.0%}): member gradients cancel in the average.")
    text = " ".join(parts)
    return text[0].upper() + text[1:] + " " + CAVEAT
