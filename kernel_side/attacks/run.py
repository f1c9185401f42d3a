"""The attack entry point: :func:`attack` looks the method up in the attack registry.

Importing this module registers the built-in attacks (the gradient methods and the
gradient-free ones), so it is the door through which the rest of jostle reads the
registry: the names below are re-exported from :mod:`jostle.attacks.registry`.
"""
from __future__ import annotations

import inspect
from typing import Any

# The method modules register their attacks on import (this order is the order offered).
import jostle.attacks.gradient_methods  # noqa: F401

# isort: split
import jostle.attacks.gradient_free  # noqa: F401
from jostle.attacks.problem import AttackResult, build_problem, compute_threads
from jostle.attacks.registry import (
    AttackSpec,
    attack_choices,
    attack_names,
    attack_spec,
    register_attack,
    registered_norms,
    registered_objectives,
    resolve_settings,
    unregister_attack,
)
from jostle.common.checks import check_int

__all__ = ["attack", "AttackSpec", "attack_choices", "attack_names", "attack_spec", "register_attack",
           "registered_norms", "registered_objectives", "resolve_settings", "unregister_attack"]


def attack(ens, x: Any, y: Any = None, method: str = "pgd", eps: Any = 0.1, norm: str | None = None,
           steps: int = 40, samples: Any = None, objective: str | None = None, seed: int = 0, *,
           target: Any = None, bounds: Any = None, resample: bool = False, judge: str = "ensemble",
           threads: Any = "auto", backward: str = "auto", **options: Any) -> AttackResult:
    """Attack the posterior predictive of ``ens`` at inputs ``x``.

    Parameters
    ----------
    ens : Ensemble
    x : Tensor of shape (n_points, *input_shape)
    y : Tensor of shape (n_points,), optional
        Labels to push away from. None attacks the label that the judged predictive
        predicts at ``x``: the full ensemble's prediction with ``judge="ensemble"`` (the
        default), the attacker's samples' prediction with ``judge="attacker"``.
    method : str
        A registered method (:func:`jostle.attacks.registry.attack_names`); built in:
        ``"fgsm"``, ``"pgd"``, ``"cw"``, ``"spsa"``, ``"square"``.
    eps : float >= 0, or Tensor of shape (n_points,) for ``pgd`` and ``fgsm``
        Budget in the chosen norm. Every method returns ``x_adv`` inside the eps-ball and
        the bounds. ``cw`` searches for the smallest flipping perturbation at any distance;
        its closest flip beyond the ball is reported in ``info["closest_flip"]`` and
        ``info["closest_flip_distance"]``, and ``x_adv`` is its best point inside the ball.
    norm : {"inf", "2"}, optional
        One of the method's norms; None takes its default (``"inf"``, except ``"2"`` for
        ``cw``, which has no other).
    steps : int
        Iterations (``pgd``, ``spsa``, ``square``), Adam steps per binary-search round
        (``cw``); ``fgsm`` takes one step whatever ``steps`` is.
    samples : None, int or sequence of int
        The posterior samples the attacker averages over: None all, an int ``k`` the
        first ``k`` members (or, with ``resample=True``, a fresh random k-subset at every
        evaluation: an expectation over the posterior), a sequence those members.
    objective : {"expected_loss", "predictive", "margin"}, optional
        What the attack ascends (see :mod:`jostle.attacks.problem`), one of the method's
        objectives; None takes its default (``"expected_loss"`` for ``fgsm``, ``pgd`` and
        ``spsa``; ``cw`` and ``square`` take only ``"margin"``).
    seed : int
        Seeds every random draw (random starts, member subsets, search directions).
    target : Tensor of shape (n_points,), optional
        Make the predictive choose these labels (targeted attack).
    bounds : pair (lo, hi), optional
        The input box; defaults to ``ens.meta["bounds"]``, else unbounded.
    judge : {"ensemble", "attacker"}
        Judge success on the whole ensemble (default) or on the attacker's samples; the
        same predictive supplies the default label when ``y`` is None.
    threads : "auto", int or None
        Torch threads while the attack runs (restored afterwards): ``"auto"`` uses one for
        small evaluations, where thread barriers cost more than they save; None leaves
        torch's setting.
    backward : {"auto", "autograd"}
        The gradient engine's switch (see :meth:`jostle.Ensemble.value_and_input_grad`).
    **options
        Method options. ``pgd``: ``step_size`` (default ``2.5 * eps / steps``),
        ``random_start`` (True), ``restarts`` (1), ``record_path`` (True).
        ``fgsm``: ``record_path``. ``cw``: ``kappa`` (0), ``search_steps`` (6), ``c_init`` (1),
        ``learning_rate`` (0.01), ``record_path``. ``spsa``: ``step_size``, ``delta`` (0.01),
        ``directions`` (32), ``random_start`` (False), ``record_path``. ``square``:
        ``p_init`` (0.05), ``image_shape`` (from ``ens.meta``, or the fit's ``meta["data"]``),
        ``record_path``.

    Returns
    -------
    AttackResult
        ``x_adv`` (n_points, ...), ``path`` (steps + 1, n_points, ...), ``loss``
        (steps + 1, n_points), ``success`` (n_points,), ``queries`` and more.

    Raises
    ------
    ValueError
        On an unknown method, a norm or objective the method lacks, a negative eps, mismatched shapes, points
        outside the bounds, more samples than members, or an option the method lacks.

    Examples
    --------
    >>> import jostle, torch
    >>> ens = jostle.Ensemble.from_modules([jostle.mlp(2, 2, hidden=(8,)) for _ in range(3)])
    >>> adv = jostle.attack(ens, torch.zeros(4, 2), eps=0.1, steps=5)
    >>> tuple(adv.path.shape), bool((adv.x_adv.abs() <= 0.1 + 1e-7).all())
    ((6, 4, 2), True)
    """
    spec, norm, objective = resolve_settings(method, norm, objective)
    allowed = [p for p in inspect.signature(spec.function).parameters if p not in ("problem", "steps")]
    unknown = sorted(set(options) - set(allowed))
    if unknown:
        raise ValueError(f"method {spec.name!r} takes options {allowed}; got unknown {unknown}")
    steps = check_int("steps", steps, low=1)
    problem = build_problem(ens, x, y, eps=eps, norm=norm, objective=objective, samples=samples,
                            resample=resample, target=target, bounds=bounds, seed=seed, judge=judge,
                            per_point_eps=spec.per_point_eps, backward=backward)
    with compute_threads(threads, ens, problem.points):
        result = spec.function(problem, steps, **options)
    result.method = spec.name
    return result
