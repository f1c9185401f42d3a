"""Shared machinery of the attacks: the attack problem, objectives, projections, results.

An attack perturbs inputs ``x`` to push the posterior predictive away from a label (or
towards a target). The attacker may see only some posterior samples; success is judged
on the whole ensemble's posterior predictive unless the caller asks otherwise.

Objectives (ascended by the attacker):

``expected_loss``
    mean over the attacker's samples of the per-sample cross-entropy,
    ``mean_s -log p_s(y | x)``; its gradient is the mean of per-sample gradients
    (expectation over transformation, Athalye et al. 2018).
``predictive``
    cross-entropy of the averaged predictive, ``-log mean_s p_s(y | x)``, computed with
    ``logsumexp`` over samples.
``margin``
    ``max_{c != y} log p(c | x) - log p(y | x)`` on the attacker's averaged predictive
    (the negative of the margin of Carlini & Wagner 2017, f_6, in log-probability space;
    with one sample it equals their logit margin). Positive once the label has flipped.

For a targeted attack the attacker ascends the negative of the same quantity for the
target label: it pulls the target's probability up.
"""
from __future__ import annotations

import contextlib
from collections.abc import Iterator
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import torch
from torch import Tensor

from jostle.common.checks import (
    as_label_tensor,
    check_choice,
    check_float,
    check_int,
    check_points,
    check_representable,
    check_seed,
    resolve_bounds,
    show_value,
)
from jostle.common.threads import threads_for, torch_threads
from jostle.posterior.gradients import BACKWARDS, OBJECTIVES, objective_values

__all__ = ["AttackResult", "OBJECTIVES", "NORMS", "AttackProblem", "build_problem", "compute_threads"]

NORMS = ("inf", "2")
JUDGES = ("ensemble", "attacker")




@dataclass
class AttackResult:
    """What an attack found, point by point.

    Attributes
    ----------
    x_adv : Tensor of shape (n_points, *input_shape)
        The adversarial inputs (inside the eps-ball and the bounds).
    path : Tensor of shape (n_recorded, n_points, *input_shape) or None
        The iterates, ``path[0]`` the start; ``n_recorded = steps + 1`` for iterative
        attacks. None when ``record_path=False``.
    loss : Tensor of shape (n_recorded, n_points)
        The attack's objective at each recorded iterate, in the direction it ascends.
    success : Tensor of shape (n_points,), bool
        Whether the judged predictive at ``x_adv`` no longer predicts ``label``
        (untargeted) or predicts ``target`` (targeted).
    label : Tensor of shape (n_points,)
        The attacked label: ``y`` if given, else the judged predictive's prediction at
        ``x`` (the full ensemble's, or the attacker's samples' with ``judge="attacker"``).
    clean_probs, adv_probs : Tensor of shape (n_points, n_classes)
        The judged posterior predictive at ``x`` and at ``x_adv``.
    distance : Tensor of shape (n_points,)
        ``|x_adv - x|`` in the attack's norm.
    eps : Tensor of shape (n_points,)
        The budget of each point.
    queries : Tensor of shape (n_points,), int64
        Model evaluations spent on each point (forward passes of the attacker's samples;
        a gradient evaluation counts as one).
    margin : Tensor of shape (n_recorded, n_points) or None
        For margin attacks (``cw``, ``square``): the attacker's margin
        ``log p(y) - max_{c != y} log p(c)`` at each recorded iterate (negative once flipped).
    """

    x_adv: Tensor
    path: Tensor | None
    loss: Tensor
    success: Tensor
    label: Tensor
    target: Tensor | None
    clean_probs: Tensor
    adv_probs: Tensor
    distance: Tensor
    queries: Tensor
    method: str
    norm: str
    eps: Tensor
    objective: str
    margin: Tensor | None = None
    info: dict = field(default_factory=dict)

    @property
    def success_rate(self) -> float:
        """Share of points whose judged prediction the attack flipped."""
        return float(self.success.float().mean()) if self.success.numel() else 0.0

    @property
    def adv_label(self) -> Tensor:
        return self.adv_probs.argmax(-1)

    def to_dict(self) -> dict[str, Any]:
        """Plain numpy arrays and numbers (for widgets, plots and JSON)."""
        out: dict[str, Any] = {"method": self.method, "norm": self.norm, "objective": self.objective}
        for name in ("x_adv", "path", "loss", "success", "label", "target", "clean_probs",
                     "adv_probs", "distance", "queries", "eps", "margin"):
            value = getattr(self, name)
            out[name] = None if value is None else value.detach().cpu().numpy()
        out["success_rate"] = self.success_rate
        out["info"] = dict(self.info)
        return out

    def __repr__(self) -> str:
        return (
            f"AttackResult(method={self.method!r}, norm={self.norm!r}, points={self.x_adv.shape[0]}, "
            f"success_rate={self.success_rate:.3f})"
        )


@dataclass(frozen=True, eq=False)
class AttackProblem:
    """Inputs, labels, budget, bounds and the attacker's view of one attack (immutable).

    Built by :func:`build_problem`, which validates everything; the attack functions use
    :meth:`objective`, :meth:`objective_and_grad`, :meth:`project` and :meth:`judge`.
    :meth:`subset` makes the problem of some of its points; a problem and its subsets
    share no mutable state (unless told otherwise, each keeps its own copy of the random
    stream). ``backward`` is the gradient engine's switch (``"auto"`` or ``"autograd"``,
    see :meth:`jostle.Ensemble.value_and_input_grad`).
    """

    ens: Any
    x: Tensor
    label: Tensor
    target: Tensor | None
    eps: Tensor
    norm: str
    objective_name: str
    bounds: tuple[Tensor, Tensor] | None
    samples: Any
    resample: bool
    judge_samples: Any
    generator: torch.Generator
    clean_probs: Tensor
    backward: str = "auto"
    eps_b: Tensor = field(init=False, repr=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "eps_b", self.eps.view((-1,) + (1,) * (self.x.ndim - 1)))

    @property
    def points(self) -> int:
        return int(self.x.shape[0])

    def subset(self, index: Any = None, eps: Tensor | None = None,
               generator: torch.Generator | None = None) -> AttackProblem:
        """The problem of points ``index`` (indices or a bool mask; None: all points).

        ``eps`` [k] replaces their budgets. ``generator`` continues a given random stream
        (pass ``problem.generator`` to share it on purpose); by default the subset gets a
        copy of this problem's stream in its current state.
        """
        where = slice(None) if index is None else torch.as_tensor(index, device=self.x.device)
        if isinstance(where, Tensor) and where.dtype == torch.bool:
            where = where.nonzero().flatten()
        x = self.x[where]
        if eps is None:
            eps = self.eps[where]
        elif eps.numel() != x.shape[0]:
            raise ValueError(f"eps must hold one budget per chosen point ({x.shape[0]}); got {eps.numel()}")
        if generator is None:
            generator = torch.Generator(device=self.generator.device)
            generator.set_state(self.generator.get_state())
        return replace(self, x=x, label=self.label[where],
                       target=None if self.target is None else self.target[where],
                       eps=eps.to(device=self.x.device, dtype=self.x.dtype).flatten(),
                       clean_probs=self.clean_probs[where], generator=generator)

    # -------------------------------------------------------------- attacker's objective
    def members(self) -> Any:
        """The attacker's member selection for one evaluation (fresh when resampling)."""
        if not self.resample:
            return self.samples
        order = torch.randperm(len(self.ens), generator=self.generator)[: self.samples]
        return order.to(self.ens.device)

    def objective(self, x_adv: Tensor, objective: str | None = None, index: Tensor | None = None,
                  members: Any = "draw") -> Tensor:
        """The ascended objective at ``x_adv`` [n, ...] -> [n] (labels of points ``index``)."""
        name = objective or self.objective_name
        labels = self.target if self.target is not None else self.label
        if index is not None:
            labels = labels[index]
        sign = -1.0 if self.target is not None else 1.0
        chosen = self.members() if isinstance(members, str) else members

        def reduce(logits: Tensor, where: slice) -> Tensor:
            return sign * objective_values(logits, labels[where], name)

        return self.ens.map_logits(x_adv, reduce, samples=chosen)

    def objective_and_grad(self, x_adv: Tensor, objective: str | None = None) -> tuple[Tensor, Tensor]:
        """Objective [n] and its input gradient, from the ensemble's gradient engine
        (:meth:`jostle.Ensemble.value_and_input_grad`) with this problem's ``backward``."""
        labels = self.target if self.target is not None else self.label
        return self.ens.value_and_input_grad(x_adv.detach(), labels, objective or self.objective_name,
                                             members=self.members(), targeted=self.target is not None,
                                             backward=self.backward)

    def margin(self, x_adv: Tensor, index: Tensor | None = None, members: Any = "draw") -> Tensor:
        """The attacker's margin [n]: negative once the attack succeeds on the attacker's view
        (``members``: a selection from :meth:`members`, or ``"draw"`` for a fresh one)."""
        with torch.no_grad():
            return -self.objective(x_adv, "margin", index=index, members=members)

    # -------------------------------------------------------------- geometry
    def project(self, x_adv: Tensor, eps_b: Tensor | None = None, x: Tensor | None = None) -> Tensor:
        """Nearest-in-budget input: onto the eps-ball around ``x``, then into the bounds.

        Clamping into the box after the ball only moves coordinates towards ``x`` (which
        lies in the box), so the result stays inside both. A last pass undoes float
        rounding so that ``|x_adv - x| <= eps`` holds as computed, not only in exact
        arithmetic.
        """
        x = self.x if x is None else x
        eps_b = self.eps_b if eps_b is None else eps_b
        delta = x_adv - x
        if self.norm == "inf":
            delta = torch.maximum(torch.minimum(delta, eps_b), -eps_b)
        else:
            delta = delta * _shrink_factor(delta, eps_b)
        out = self.clip(x + delta)
        return _tighten(out, x, eps_b, self.norm, self.clip)

    def clip(self, x_adv: Tensor) -> Tensor:
        if self.bounds is None:
            return x_adv
        return torch.maximum(torch.minimum(x_adv, self.bounds[1]), self.bounds[0])

    def distance(self, x_adv: Tensor) -> Tensor:
        return norm_of(x_adv - self.x, self.norm)

    def random_start(self) -> Tensor:
        """A uniform draw from the eps-ball (L-inf: the cube; L2: the ball), clipped."""
        shape = self.x.shape
        if self.norm == "inf":
            noise = (torch.rand(shape, generator=self.generator, dtype=self.x.dtype) * 2 - 1)
            delta = noise.to(self.x.device) * self.eps_b
        else:
            direction = torch.randn(shape, generator=self.generator, dtype=self.x.dtype).to(self.x.device)
            direction = direction / norm_of(direction, "2").clamp_min(1e-30).view_as(self.eps_b)
            features = self.x[0].numel()
            radius = torch.rand(self.points, generator=self.generator, dtype=self.x.dtype) ** (1.0 / features)
            delta = direction * radius.to(self.x.device).view_as(self.eps_b) * self.eps_b
        return self.project(self.x + delta)

    def step_direction(self, grad: Tensor) -> Tensor:
        """Steepest ascent direction of unit norm: sign (L-inf) or normalised gradient (L2)."""
        if self.norm == "inf":
            return grad.sign()
        size = norm_of(grad, "2").view((-1,) + (1,) * (grad.ndim - 1))
        return torch.where(size > 0, grad / size.clamp_min(1e-30), torch.zeros_like(grad))

    # -------------------------------------------------------------- judgement
    def judge(self, x_adv: Tensor) -> tuple[Tensor, Tensor]:
        """Success [n] and judged predictive probabilities [n, C] at ``x_adv``."""
        probs = self.ens.predict(x_adv, samples=self.judge_samples).probs
        predicted = probs.argmax(-1)
        success = predicted == self.target if self.target is not None else predicted != self.label
        return success, probs


@contextlib.contextmanager
def compute_threads(threads: Any, ens, points: int) -> Iterator[None]:
    """Run the enclosed attack with ``threads`` torch threads, then restore the setting.

    The work of one evaluation is members x points x activations per pair; the rule is
    :func:`jostle.common.threads.threads_for`'s (one thread for small CPU work under
    ``"auto"``, ``None`` leaves torch's setting alone).
    """
    work = len(ens) * points * ens._plan.floats_per_pair
    with torch_threads(threads_for(threads, work, ens.device)):
        yield


def norm_of(delta: Tensor, norm: str) -> Tensor:
    """Per-point norm of ``delta`` [n, ...] -> [n]."""
    flat = delta.flatten(1)
    return flat.abs().amax(1) if norm == "inf" else flat.norm(dim=1)


def build_problem(ens, x: Any, y: Any, *, eps: Any, norm: str, objective: str, samples: Any,
                  resample: bool, target: Any, bounds: Any, seed: int, judge: str = "ensemble",
                  per_point_eps: bool = False, use_bounds: bool = True, backward: str = "auto") -> AttackProblem:
    """Validate an attack call and gather what every attack needs."""
    from jostle.posterior.ensemble import Ensemble

    if not isinstance(ens, Ensemble):
        raise TypeError(f"ens must be a jostle.Ensemble; got {type(ens).__name__}")
    norm = check_choice("norm", norm, NORMS)
    objective = check_choice("objective", objective, OBJECTIVES)
    judge = check_choice("judge", judge, JUDGES)
    backward = check_choice("backward", backward, BACKWARDS)
    seed = check_seed(seed)
    if not isinstance(resample, bool):
        raise ValueError(f"resample must be True or False; got {show_value(resample)}")
    x = check_points("x", x, ens, min_points=1, detach=True)
    n = int(x.shape[0])
    eps_t = _as_eps(eps, n, x, per_point_eps)
    samples = _check_samples(ens, samples, resample)
    box = resolve_bounds(ens, bounds, x) if use_bounds else None
    if box is not None:
        # Points within rounding slack of the box are moved onto it, so that clipping an
        # iterate never moves it farther from x than the budget allows.
        x = torch.maximum(torch.minimum(x, box[1]), box[0])
    judge_samples = samples if judge == "attacker" and not resample else None
    if judge == "attacker" and resample:
        raise ValueError("judge='attacker' needs a fixed member selection; got resample=True")
    clean_probs = ens.predict(x, samples=judge_samples).probs
    classes = int(clean_probs.shape[-1])
    label = clean_probs.argmax(-1) if y is None else as_label_tensor("y", y, n_points=n, classes=classes)
    tgt = None
    if target is not None:
        tgt = as_label_tensor("target", target, n_points=n, classes=classes).to(x.device)
    generator = torch.Generator().manual_seed(seed)
    return AttackProblem(ens, x, label.to(x.device), tgt, eps_t, norm, objective, box, samples, resample,
                         judge_samples, generator, clean_probs, backward)


# ------------------------------------------------------------------ private helpers
def _shrink_factor(delta: Tensor, eps_b: Tensor) -> Tensor:
    size = norm_of(delta, "2").view_as(eps_b)
    return torch.where(size > eps_b, eps_b / size.clamp_min(1e-30), torch.ones_like(size))


def _tighten(x_adv: Tensor, x: Tensor, eps_b: Tensor, norm: str, clip) -> Tensor:
    """Remove the last ulp by which rounding of ``x + delta`` may overshoot the budget."""
    for _ in range(3):
        delta = x_adv - x
        if norm == "inf":
            over = delta.abs() > eps_b
            if not bool(over.any()):
                return x_adv
            x_adv = torch.where(over, torch.nextafter(x_adv, x), x_adv)
        else:
            size = norm_of(delta, "2").view_as(eps_b)
            over = size > eps_b
            if not bool(over.any()):
                return x_adv
            shrunk = clip(x + delta * (eps_b / size.clamp_min(1e-30)) * (1 - 1e-6))
            x_adv = torch.where(over, shrunk, x_adv)
    return x_adv


def _as_eps(eps: Any, n: int, x: Tensor, per_point: bool) -> Tensor:
    if per_point and isinstance(eps, (Tensor, np.ndarray, list, tuple)):
        values = torch.as_tensor(np.asarray(eps.detach().cpu() if isinstance(eps, Tensor) else eps),
                                 dtype=x.dtype).flatten()
        if values.numel() != n:
            raise ValueError(f"eps must be a float or hold one budget per point ({n}); got {values.numel()}")
        if not bool(torch.isfinite(values).all()) or bool((values < 0).any()):
            raise ValueError(f"eps must hold finite floats >= 0; got {show_value(values)}")
        return values.to(x.device)
    value = check_representable("eps", check_float("eps", eps, low=0.0), x.dtype)
    return torch.full((n,), value, dtype=x.dtype, device=x.device)


def _check_samples(ens, samples: Any, resample: bool) -> Any:
    size = len(ens)
    if samples is None:
        if resample:
            raise ValueError("resample=True needs samples=k (the number of members drawn each step); got None")
        return None
    if isinstance(samples, bool):
        raise ValueError(f"samples must be None, an int or a sequence of member indices; got {samples!r}")
    if isinstance(samples, (int, np.integer)):
        return check_int("samples", int(samples), low=1, high=size)
    if resample:
        raise ValueError(f"resample=True needs samples to be an int k; got {show_value(samples)}")
    index = ens._indices(samples)
    if index.numel() == 0:
        raise ValueError("samples must select at least one member; got an empty selection")
    return index
