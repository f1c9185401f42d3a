"""The attack registry: one record per attack method, read by everything that offers a choice.

Each method module registers its attacks with :func:`register_attack`; :func:`jostle.attack`
dispatches through the registry and checks ``norm`` and ``objective`` against the method's
record, and the live engine, the sweep definitions, the command line and the widgets take
their method, norm and objective choices from it. Adding an attack is one module::

    @register_attack("random_sign", norms=("inf",), objectives=("expected_loss",),
                     gradient_free=True, description="one random corner of the eps-ball")
    def random_sign(problem, steps=1, record_path=True):
        ...

An attack function takes an :class:`~jostle.attacks.problem.AttackProblem` and ``steps``
(plus keyword options, which :func:`jostle.attack` passes on and checks by name) and
returns an :class:`~jostle.attacks.problem.AttackResult`, usually through
:func:`jostle.attacks.outcome.finish`.

Readers should import :mod:`jostle.attacks.run`, which imports the built-in method modules,
so the built-in attacks are registered before anyone reads the registry.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from jostle.attacks.problem import NORMS, OBJECTIVES
from jostle.common.checks import check_choice, show_value

__all__ = ["AttackSpec", "register_attack", "unregister_attack", "attack_spec", "attack_names",
           "registered_norms", "registered_objectives", "attack_choices", "resolve_settings"]


@dataclass(frozen=True)
class AttackSpec:
    """What the registry knows about one attack method.

    Attributes
    ----------
    name : str
        The ``method`` argument of :func:`jostle.attack`.
    function : callable
        ``function(problem, steps, **options) -> AttackResult``.
    norms : tuple of str
        Norms the method supports, from ``("inf", "2")``; the first is its default.
    objectives : tuple of str
        Objectives it ascends, from ``("expected_loss", "predictive", "margin")``; the
        first is its default (a method with a fixed objective lists just that one).
    gradient_free : bool
        True when it only queries the predictive (never its gradient).
    description : str
        One line for help texts and the widgets.
    per_point_eps : bool
        Whether it accepts one budget per point (``eps`` of shape (n_points,)).
    """

    name: str
    function: Callable[..., Any]
    norms: tuple[str, ...]
    objectives: tuple[str, ...]
    gradient_free: bool
    description: str
    per_point_eps: bool = False


_REGISTRY: dict[str, AttackSpec] = {}


def register_attack(name: str, *, norms: Any, objectives: Any, gradient_free: bool, description: str,
                    per_point_eps: bool = False, function: Callable[..., Any] | None = None):
    """Register an attack method; use as a decorator, or pass ``function``.

    Parameters
    ----------
    name : str
        Method name, a non-empty identifier not yet registered.
    norms : sequence of {"inf", "2"}
        Supported norms, default first.
    objectives : sequence of {"expected_loss", "predictive", "margin"}
        Supported objectives, default first.
    gradient_free : bool
    description : str
        One non-empty line.
    per_point_eps : bool
    function : callable, optional
        The attack; without it the call returns a decorator that registers its argument.

    Returns
    -------
    callable
        The function itself (or the decorator).

    Raises
    ------
    ValueError
        On a name already registered or not an identifier, an empty or unknown norm or
        objective list, a non-bool flag, or an empty or multi-line description.

    Examples
    --------
    >>> from jostle.attacks.registry import register_attack, unregister_attack
    >>> _ = register_attack("noop", norms=("inf",), objectives=("margin",), gradient_free=True,
    ...                     description="does nothing", function=lambda problem, steps: None)
    >>> unregister_attack("noop").norms
    ('inf',)
    """
    if not isinstance(name, str) or not name.isidentifier():
        raise ValueError(f"name must be a Python identifier; got {show_value(name)}")
    if name in _REGISTRY:
        raise ValueError(f"name must not be registered already; got {name!r} (unregister_attack it first)")
    spec_norms = _subset("norms", norms, NORMS)
    spec_objectives = _subset("objectives", objectives, OBJECTIVES)
    for flag, value in (("gradient_free", gradient_free), ("per_point_eps", per_point_eps)):
        if not isinstance(value, bool):
            raise ValueError(f"{flag} must be True or False; got {show_value(value)}")
    if not isinstance(description, str) or not description.strip() or "\n" in description:
        raise ValueError(f"description must be one non-empty line; got {show_value(description)}")

    def register(fn: Callable[..., Any]) -> Callable[..., Any]:
        if not callable(fn):
            raise ValueError(f"function must be callable; got {show_value(fn)}")
        if name in _REGISTRY:
            raise ValueError(f"name must not be registered already; got {name!r} (unregister_attack it first)")
        _REGISTRY[name] = AttackSpec(name, fn, spec_norms, spec_objectives, gradient_free, description.strip(),
                                     per_point_eps)
        return fn

    return register if function is None else register(function)


def unregister_attack(name: str) -> AttackSpec:
    """Remove a registered method and return its record (e.g. at the end of a test)."""
    spec = attack_spec(name)
    del _REGISTRY[name]
    return spec


def attack_spec(name: Any) -> AttackSpec:
    """The record of method ``name``.

    Raises
    ------
    ValueError
        ``method must be one of 'fgsm', ...; got 'boil'`` for an unregistered name.
    """
    return _REGISTRY[check_choice("method", name, attack_names())]


def attack_names() -> tuple[str, ...]:
    """Registered method names, in registration order."""
    return tuple(_REGISTRY)


def registered_norms() -> tuple[str, ...]:
    """Every norm some registered method supports, in the order of ``NORMS``."""
    return tuple(n for n in NORMS if any(n in s.norms for s in _REGISTRY.values()))


def registered_objectives() -> tuple[str, ...]:
    """Every objective some registered method ascends, in the order of ``OBJECTIVES``."""
    return tuple(o for o in OBJECTIVES if any(o in s.objectives for s in _REGISTRY.values()))


def attack_choices() -> dict[str, dict[str, Any]]:
    """Per method (registration order): ``norms``, ``objectives`` (default first),
    ``gradient_free`` and ``description``, as plain JSON-able values for front ends."""
    return {s.name: {"norms": list(s.norms), "objectives": list(s.objectives), "gradient_free": s.gradient_free,
                     "description": s.description} for s in _REGISTRY.values()}


def resolve_settings(method: Any, norm: Any = None, objective: Any = None) -> tuple[AttackSpec, str, str]:
    """Check ``norm`` and ``objective`` against ``method``'s record; None takes its default.

    Returns
    -------
    (AttackSpec, str, str)
        The record, the norm and the objective.

    Raises
    ------
    ValueError
        E.g. ``norm must be one of ['2'] for method 'cw'; got 'inf'``.
    """
    spec = attack_spec(method)
    norm = spec.norms[0] if norm is None else norm
    objective = spec.objectives[0] if objective is None else objective
    for what, value, allowed in (("norm", norm, spec.norms), ("objective", objective, spec.objectives)):
        if not isinstance(value, str) or value not in allowed:
            raise ValueError(f"{what} must be one of {list(allowed)} for method {spec.name!r}; got {show_value(value)}")
    return spec, norm, objective


def _subset(name: str, values: Any, known: tuple[str, ...]) -> tuple[str, ...]:
    if isinstance(values, str) or not isinstance(values, (list, tuple)) or not values:
        raise ValueError(f"{name} must be a non-empty sequence drawn from {list(known)}; got {show_value(values)}")
    unknown = [v for v in values if v not in known]
    if unknown or len(set(values)) != len(values):
        raise ValueError(f"{name} must be distinct values drawn from {list(known)}; got {show_value(values)}")
    return tuple(values)
