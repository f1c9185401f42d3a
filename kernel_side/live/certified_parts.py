"""Certified read-outs for the live views: the proved radius beside the attack's flip budget.

The certified radius (:func:`jostle.certified_radius`) is a lower bound on the smallest flipping
budget of the posterior predictive; the attack's smallest flipping budget
(:func:`jostle.minimal_budget`) is an upper bound. Between the two, nobody knows. This module
imports no widget library.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from jostle.attacks.readouts import minimal_budget
from jostle.certify.certificate import CAUTION, certified_radius, certify
from jostle.live.view_parts import as_input, to_numpy
from jostle.posterior.ensemble import Ensemble

__all__ = ["RadiusView", "BudgetCertificateView", "radius_part", "budget_certificate_part", "radius_words",
           "budget_words", "CAUTION", "RADIUS_ITERATIONS", "default_certificate"]

RADIUS_ITERATIONS = 20


def default_certificate(ens: Ensemble) -> str:
    """The bound method a live view uses unless told: ``crown`` (the tightest) for networks
    without convolutions, ``ibp`` for convolutional ones, where CROWN's back-substitution
    through every pixel's feature map took about 20 s per member of ``jostle.cnn((1, 28, 28),
    10)`` on 2 cores against 1.5-2.3 ms per member for IBP
    (``benchmarks/bench_image_browser.py``): too slow to follow a budget slider."""
    convolutional = any(isinstance(layer, torch.nn.Conv2d) for layer in ens.template.modules())
    return "ibp" if convolutional else "crown"


@dataclass
class RadiusView:
    """Certified radius and attack flip budget of the posterior predictive at one input.

    radius : certified budget (0 where none); resolution : width of the final bisection bracket;
    member_radii : (samples,) each member's certified radius on its own label;
    flip : smallest budget at which the attack flipped the predictive (``inf`` when it found none);
    search_top : the largest budget the attack tried; words : the read-out in words.
    """

    radius: float
    resolution: float
    member_radii: np.ndarray
    flip: float
    search_top: float
    norm: str
    method: str
    samples: int
    words: str
    caution: str = CAUTION


@dataclass
class BudgetCertificateView:
    """Members certified at the current budget, and the posterior-mass lower bound.

    certified : members certified; samples : members checked; share_lower : one-sided 95%
    Clopper-Pearson lower bound on the posterior mass certified; predictive : the predictive is certified.
    """

    certified: int
    samples: int
    share_lower: float
    predictive: bool
    budget: float
    norm: str
    method: str
    words: str
    caution: str = CAUTION


def radius_part(ens: Ensemble, point: Any, norm: str, samples: int, method: str, bounds: Any,
                budget: float | None = None) -> RadiusView:
    """The certified radius over the first ``samples`` members at ``point``, and the attack's flip budget."""
    members = ens[:samples]
    x = as_input(ens, [point])
    box = _box(bounds, ens)
    found = certified_radius(members, x, norm=norm, method=method, bounds=box, iterations=RADIUS_ITERATIONS)
    radius = float(found.eps[0])
    top = _diameter(box, norm)
    resolution = top / 2**RADIUS_ITERATIONS if top is not None else float(found.upper[0] - found.eps[0])
    flipping = minimal_budget(members, x, norm=norm, bounds=box)
    flip = float(flipping.eps[0])
    search_top = top if top is not None else flip
    return RadiusView(radius=radius, resolution=resolution,
                      member_radii=to_numpy(found.members[:, 0]).astype(np.float64),
                      flip=flip, search_top=float(search_top), norm=norm, method=method, samples=samples,
                      words=radius_words(radius, flip, norm, method, search_top, budget))


def budget_certificate_part(ens: Ensemble, point: Any, budget: float, norm: str, samples: int, method: str,
                            bounds: Any) -> BudgetCertificateView:
    """:func:`jostle.certify` over the first ``samples`` members at ``point`` and the current budget."""
    x = as_input(ens, [point])
    cert = certify(ens[:samples], x, eps=float(budget), norm=norm, method=method, bounds=_box(bounds, ens))
    certified = int(cert.members[:, 0].sum())
    share_lower = float(cert.share_lower[0])
    predictive = bool(cert.predictive[0])
    return BudgetCertificateView(certified=certified, samples=samples, share_lower=share_lower,
                                 predictive=predictive, budget=float(budget), norm=norm, method=method,
                                 words=budget_words(certified, samples, share_lower, predictive, budget, norm, method))


def radius_words(radius: float, flip: float, norm: str, method: str, search_top: float,
                 budget: float | None = None, flipped_at_budget: bool = False) -> str:
    """The two radii in words; says plainly when nothing is certified or no flip was found.

    ``budget`` adds what is known at the current budget; ``flipped_at_budget`` says the view's own
    attack flipped there.
    """
    name, ball = method.upper(), _ball(norm)
    if radius > 0:
        proved = f"No flip is possible within r = {radius:.3g} ({ball}, certified, {name})"
    else:
        proved = (f"Nothing is certified here (r = 0, {name}): no {ball} around this input could be proved "
                  f"to keep the label, which proves nothing either way")
    if math.isfinite(flip):
        found = f"the attack flipped at e = {flip:.3g}"
        between = "; between them, unknown." if radius > 0 else "; below it, unknown."
    else:
        found = (f"the attack found no flip up to e = {search_top:.3g}, which is evidence, not proof")
        between = "; beyond r, unknown." if radius > 0 else "."
    text = f"{proved}; {found}{between}"
    if budget is not None:
        text += " " + _at_budget(radius, flip, budget, flipped_at_budget)
    return text


def budget_words(certified: int, samples: int, share_lower: float, predictive: bool, budget: float, norm: str,
                 method: str) -> str:
    """Members certified at the budget, and the posterior-mass bound, in words."""
    mass = f"posterior mass certified >= {share_lower:.1%} (95% Clopper-Pearson lower bound)"
    verdict = "certified" if predictive else "not certified"
    return (f"At eps = {budget:.3g} ({_ball(norm)}, {method.upper()}): {certified} of {samples} members certified; "
            f"{mass}; the posterior predictive is {verdict}.")


def _at_budget(radius: float, flip: float, budget: float, flipped: bool) -> str:
    if budget <= radius:
        return f"At the current budget eps = {budget:.3g}: certified, no flip is possible."
    if flipped or (math.isfinite(flip) and budget >= flip):
        return f"At the current budget eps = {budget:.3g}: a flip exists (the attack found one)."
    return f"At the current budget eps = {budget:.3g}: unknown."


def _ball(norm: str) -> str:
    return "L-inf ball" if norm == "inf" else "L2 ball"


def _box(bounds: Any, ens: Ensemble) -> Any:
    if bounds is None:
        return None
    lo, hi = bounds
    return as_input(ens, lo), as_input(ens, hi)


def _diameter(box: Any, norm: str) -> float | None:
    if box is None:
        return None
    span = (box[1] - box[0]).flatten()
    return float(span.max() if norm == "inf" else span.norm())
