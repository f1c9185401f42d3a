"""Certified robustness beside the empirical attacks: ``certify`` and ``certified_radius``.

A certificate is a proof, up to floating-point rounding, that no input in the stated set
changes a prediction. It covers the members that were sampled and the ball that was asked
about, and nothing else: read :data:`CAUTION`.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import Tensor

from jostle.certify.linear_bounds import METHODS
from jostle.certify.network import read_chain
from jostle.certify.verdicts import (
    clopper_pearson_lower,
    member_margins,
    pair_bounds,
    predictive_probability_bounds,
)
from jostle.common.checks import as_float_tensor, check_choice, check_float, check_int, check_points, resolve_bounds
from jostle.common.threads import threads_for, torch_threads

__all__ = ["CAUTION", "Certificate", "CertifiedRadius", "certify", "certified_radius"]

NORMS = ("inf", "2")

CAUTION = ("Caution: a certificate holds for the sampled members and the stated ball (within the data bounds) "
           "only, not for the true posterior, other kinds of perturbation or the deployed system. The share of the "
           "posterior certified is a statistical bound (Clopper-Pearson, treating members as independent draws). "
           "Safety decisions follow the standards and regulation of your domain.")


@dataclass
class Certificate:
    """What is certified at each point for one budget (see :func:`certify`).

    Attributes
    ----------
    members : Tensor of shape (S, n_points), bool
        Member s keeps its own label at x everywhere in the set.
    share : Tensor of shape (n_points,)
        Fraction of members certified.
    share_lower : Tensor of shape (n_points,)
        One-sided Clopper-Pearson lower confidence bound (level ``confidence``) on the posterior
        mass that is certified, treating the members as independent draws from the posterior.
    predictive : Tensor of shape (n_points,), bool
        The posterior predictive (the mean of member probabilities) keeps its label everywhere in the set.
    label, member_label : Tensor of shape (n_points,) and (S, n_points)
        The labels certified: the predictive's and each member's at x.
    margin_lower : Tensor of shape (S, n_points)
        Lower bound of each member's logit margin (own label minus every other class).
    probability_lower, other_upper : Tensor of shape (n_points,)
        Lower bound of the predictive probability of ``label``, and the largest upper bound of another class's.
    eps : Tensor of shape (n_points,)
    norm, method : str
    confidence : float
    caution : str
    """

    members: Tensor
    share: Tensor
    share_lower: Tensor
    predictive: Tensor
    label: Tensor
    member_label: Tensor
    margin_lower: Tensor
    probability_lower: Tensor
    other_upper: Tensor
    eps: Tensor
    norm: str
    method: str
    confidence: float
    caution: str = field(default=CAUTION, repr=False)

    def summary(self) -> str:
        """A few lines: what is certified over all points, then the caution."""
        return (f"{self.method.upper()} certificate, L-{self.norm} ball, eps up to {float(self.eps.max()):.4g}: "
                f"predictive certified at {int(self.predictive.sum())} of {self.predictive.numel()} points; "
                f"members certified {float(self.share.mean()):.1%} on average "
                f"(lower {self.confidence:.0%} bound {float(self.share_lower.mean()):.1%}).\n{self.caution}")

    def __str__(self) -> str:
        return self.summary()


@dataclass
class CertifiedRadius:
    """Largest certified budget per point, found by bisection (see :func:`certified_radius`).

    Attributes
    ----------
    eps : Tensor of shape (n_points,)
        A budget at which the predictive is certified (0 where it is not even at x itself).
    upper : Tensor of shape (n_points,)
        The smallest budget tried at which the certificate failed (``inf`` where none failed).
    members : Tensor of shape (S, n_points)
        The same for each member on its own label.
    norm, method : str
    caution : str
    """

    eps: Tensor
    upper: Tensor
    members: Tensor
    norm: str
    method: str
    caution: str = field(default=CAUTION, repr=False)

    def summary(self) -> str:
        return (f"{self.method.upper()} certified L-{self.norm} radius: median {float(self.eps.median()):.4g}, "
                f"smallest {float(self.eps.min()):.4g} over {self.eps.numel()} points.\n{self.caution}")

    def __str__(self) -> str:
        return self.summary()


def certify(ens, x: Any, eps: Any = 0.1, norm: str = "inf", method: str = "crown", bounds: Any = None,
            confidence: float = 0.95, threads: Any = "auto") -> Certificate:
    """Certify each point's predictions over an L-inf or L2 ball intersected with the data bounds.

    For each member, the label it predicts at ``x`` is certified when the lower bound of its
    logit margin over the set is above 0. The posterior predictive is certified when the lower
    bound of the mean probability of its label is above the upper bound of every other
    class's mean probability; the member probability bounds come from pairwise logit-difference
    bounds and are averaged over members, which is sound but loose (it ignores that the members
    see the same input), so the predictive can fail where every member is certified.

    Parameters
    ----------
    ens : Ensemble
        Its template must be an ``nn.Sequential`` of Linear, Conv2d, ReLU, Tanh, Sigmoid,
        MaxPool2d, AvgPool2d and Flatten layers (``jostle.mlp`` with relu, tanh or sigmoid).
    x : Tensor of shape (n_points, *input_shape)
    eps : float or array of shape (n_points,)
        Radius of the ball, >= 0.
    norm : {"inf", "2"}
    method : {"crown", "ibp"}
        Interval bound propagation (Gowal et al. 2018) or linear relaxation bounds (Zhang et al.
        2018), intersected with the interval bounds at every layer (never looser than IBP).
    bounds : pair (lo, hi), optional
        Data bounds; default ``ens.meta["bounds"]``, or no bounds when that is absent.
    confidence : float in (0, 1)
        Level of the one-sided Clopper-Pearson bound ``share_lower``.
    threads : "auto", int or None

    Returns
    -------
    Certificate

    Notes
    -----
    Bounds are computed in the ensemble's floating dtype without outward rounding, so a margin
    within rounding of 0 is not a proof. The certificate covers the sampled members and the
    stated set only; see :data:`CAUTION`.

    Examples
    --------
    >>> import jostle, torch
    >>> ens = jostle.Ensemble.from_modules([jostle.mlp(2, 2, hidden=(8,), activation="relu") for _ in range(3)])
    >>> cert = jostle.certify(ens, torch.zeros(4, 2), eps=0.0)
    >>> cert.members.shape, cert.share.shape
    (torch.Size([3, 4]), torch.Size([4]))
    """
    x, eps, norm, method, box = _checked(ens, x, eps, norm, method, bounds)
    confidence = check_float("confidence", confidence, low=0.0, high=1.0, low_open=True, high_open=True)
    with torch_threads(threads_for(threads, len(ens) * x.numel(), ens.device)), torch.no_grad():
        member_label = ens.logits(x).argmax(-1)
        label = ens.predict(x).label.to(x.device)
        pairs = pair_bounds(ens, x, eps[None], norm, method, box)
    margins = member_margins(pairs, member_label)
    members = margins > 0
    low, high = predictive_probability_bounds(pairs)
    probability_lower = low.gather(1, label[:, None]).squeeze(1)
    other_upper = high.scatter(1, label[:, None], float("-inf")).amax(1)
    certified = members.sum(0).cpu().numpy()
    share_lower = clopper_pearson_lower(certified, len(ens), confidence)
    return Certificate(members=members, share=members.to(x.dtype).mean(0),
                       share_lower=torch.as_tensor(share_lower, dtype=x.dtype, device=x.device),
                       predictive=probability_lower > other_upper, label=label, member_label=member_label,
                       margin_lower=margins, probability_lower=probability_lower, other_upper=other_upper,
                       eps=eps, norm=norm, method=method, confidence=confidence)


def certified_radius(ens, x: Any, norm: str = "inf", method: str = "crown", bounds: Any = None,
                     high: float | None = None, iterations: int = 20, threads: Any = "auto") -> CertifiedRadius:
    """Largest budget at which each point's prediction is certified, by bisection per point.

    The bracket starts at ``[0, high]``; ``high`` defaults to the diameter of the data bounds in
    the chosen norm (the ball then covers the whole box), else it doubles from 1 while the point
    stays certified (at most 30 times). The lower end is certified at every step, so ``eps`` is
    always a certified budget even where the certificate is not monotone in the budget (CROWN's
    relaxations change with it); a ball certified at ``eps`` certifies every smaller ball.

    Parameters
    ----------
    ens, x, norm, method, bounds, threads
        As for :func:`certify`.
    high : float, optional
        Upper end of the starting bracket, > 0.
    iterations : int
        Bisection steps; the bracket shrinks to ``high / 2**iterations``.

    Returns
    -------
    CertifiedRadius
        ``eps`` for the predictive [n_points], ``members`` for each member [S, n_points].
    """
    x, _, norm, method, box = _checked(ens, x, 0.0, norm, method, bounds)
    iterations = check_int("iterations", iterations, low=1)
    if high is not None:
        high = check_float("high", high, low=0.0, low_open=True)
    elif box is not None:
        span = (box[1] - box[0]).flatten()
        high = float(span.max() if norm == "inf" else span.norm())
    with torch_threads(threads_for(threads, len(ens) * x.numel(), ens.device)), torch.no_grad():
        member_label = ens.logits(x).argmax(-1)
        label = ens.predict(x).label.to(x.device)

        def members_hold(eps: Tensor) -> Tensor:
            return member_margins(pair_bounds(ens, x, eps, norm, method, box), member_label) > 0

        def predictive_holds(eps: Tensor) -> Tensor:
            low, up = predictive_probability_bounds(pair_bounds(ens, x, eps[None], norm, method, box))
            return low.gather(1, label[:, None]).squeeze(1) > up.scatter(1, label[:, None], float("-inf")).amax(1)

        shape = (len(ens), x.shape[0])
        members, _ = _bisect(members_hold, torch.zeros(shape, dtype=x.dtype, device=x.device), high, iterations)
        eps, upper = _bisect(predictive_holds, torch.zeros(x.shape[0], dtype=x.dtype, device=x.device), high,
                             iterations)
    return CertifiedRadius(eps=eps, upper=upper, members=members, norm=norm, method=method)


def _bisect(holds: Callable[[Tensor], Tensor], zero: Tensor, high: float | None, iterations: int
            ) -> tuple[Tensor, Tensor]:
    """Per entry, a certified budget ``lower`` and a failed one ``upper`` (inf if none failed)."""
    alive = holds(zero)
    lower = zero.clone()
    upper = torch.where(alive, torch.inf, 0.0).to(zero.dtype)
    if high is None:
        probe = torch.ones_like(zero)
        for _ in range(30):
            ok = holds(probe) & alive & torch.isinf(upper)
            lower = torch.where(ok, probe, lower)
            upper = torch.where(alive & ~ok & torch.isinf(upper), probe, upper)
            if not bool(ok.any()):
                break
            probe = torch.where(ok, probe * 2, probe)
    else:
        top = torch.full_like(zero, high)
        ok = holds(top) & alive
        lower = torch.where(ok, top, lower)
        upper = torch.where(alive & ~ok, top, upper)
    for _ in range(iterations):
        open_ = torch.isfinite(upper) & alive
        if not bool(open_.any()):
            break
        mid = torch.where(open_, 0.5 * (lower + upper), lower)
        ok = holds(mid)
        lower = torch.where(open_ & ok, mid, lower)
        upper = torch.where(open_ & ~ok, mid, upper)
    return lower, upper


def _checked(ens, x: Any, eps: Any, norm: str, method: str, bounds: Any):
    norm = check_choice("norm", norm, NORMS)
    method = check_choice("method", method, METHODS)
    x = check_points("x", x, ens, min_points=1, detach=True)
    read_chain(ens.template, {name: value[:1] for name, value in ens.params.items()}, tuple(x.shape[1:]))
    eps = _checked_eps(eps, x)
    return x, eps, norm, method, resolve_bounds(ens, bounds, x, finite=True)


def _checked_eps(eps: Any, x: Tensor) -> Tensor:
    if isinstance(eps, (int, float)) and not isinstance(eps, bool):
        value = check_float("eps", eps, low=0.0)
        return torch.full((x.shape[0],), value, dtype=x.dtype, device=x.device)
    if isinstance(eps, bool):
        raise ValueError(f"eps must be a finite float >= 0 or an array of shape ({x.shape[0]},); got {eps!r}")
    tensor = as_float_tensor("eps", eps.detach().cpu() if isinstance(eps, Tensor) else eps, ndim=1,
                             dtype=x.dtype).to(x.device)
    if tensor.shape[0] != x.shape[0]:
        raise ValueError(f"eps must have shape ({x.shape[0]},) (one budget per point); got shape {tuple(tensor.shape)}")
    if bool((tensor < 0).any()):
        raise ValueError(f"eps must be >= 0 at every point; got {float(tensor.min()):g}")
    return tensor
