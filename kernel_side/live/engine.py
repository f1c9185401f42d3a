"""The live engine behind the explorer widgets: explorer state in, view data out.

:func:`compute_view` is a pure function of an ensemble and an :class:`ExplorerState`; it
returns a :class:`ViewData` of numpy arrays. A :class:`ViewCache` memoises the parts that
do not depend on the control that moved (the background layer is keyed by the sample
count, not by the budget), so a budget change reruns only the attack. The
:class:`~jostle.live.worker.LiveWorker` runs it on one thread, latest request wins.
This module imports no widget library.
"""
from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import torch

from jostle.attacks.run import attack_names, registered_norms, registered_objectives
from jostle.common.checks import check_choice, check_float, check_int, check_representable, show_value
from jostle.live.certified_parts import (
    BudgetCertificateView,
    RadiusView,
    budget_certificate_part,
    radius_part,
    radius_words,
)
from jostle.live.view_parts import (
    AttackView,
    FadeView,
    GridView,
    PointView,
    SpreadView,
    attack_part,
    fade_part,
    grid_part,
    grid_prediction,
    point_part,
    spread_part,
)
from jostle.live.worker import LiveWorker, Outcome
from jostle.posterior.ensemble import Ensemble

__all__ = [
    "ExplorerState", "ViewData", "ViewCache", "compute_view", "check_field", "check_state",
    "LiveWorker", "Outcome", "PointView", "GridView", "AttackView", "FadeView", "SpreadView",
    "LAYERS", "CERTIFICATES", "RadiusView", "BudgetCertificateView",
]

LAYERS = ("predictive", "epistemic", "entropy", "certified")
CERTIFICATES = ("crown", "ibp", "off")


@dataclass(frozen=True)
class ExplorerState:
    """Everything one view depends on.

    Attributes
    ----------
    point : tuple of float, length n_features
        The picked input.
    budget : float
        Attack budget eps (>= 0).
    samples : int or None
        Posterior samples the attacker averages over (first ``samples`` members); None = all.
        The background layer shows the predictive of the same members.
    method, norm, steps, objective, seed
        Passed to :func:`jostle.attack`. ``method`` is a registered attack, ``norm`` and
        ``objective`` are each some registered attack's; a pair the method lacks (``cw``
        with ``inf``) is reported in :attr:`ViewData.errors`, the other parts still shown.
    layer : str
        Background layer: ``predictive`` (class mix), ``epistemic`` (mutual information),
        ``entropy`` (total predictive entropy) or ``certified`` (the predictive's certified
        radius per cell, computed apart by :func:`jostle.live.certified_map.radius_map`; the grid
        part then carries the class mix).
    grid : int
        Background resolution per axis (2-D inputs only); 0 skips the map.
    boundaries : int
        How many members' decision boundaries to trace (0 for none).
    fade_repeats : int
        Random member subsets averaged per sample count in the fading-gradient chart.
    certificate : str
        Bound method of the certified read-outs: ``crown``, ``ibp`` or ``off`` (the default,
        so a plain view costs what it did; the explorer widgets ask for ``crown``).
    radius : bool
        Compute the certified radius and the attack's flip budget at ``point`` (kept per point,
        norm and samples); False computes the certificate at the current budget instead.
    path_probs : bool
        Compute the whole ensemble's probability of the label at every step of the attack path
        (the 2-D explorer's path chart); False leaves ``AttackView.label_prob`` NaN and saves
        one prediction of ``steps + 1`` inputs per attack.
    """

    point: tuple[float, ...]
    budget: float = 0.1
    samples: int | None = None
    method: str = "pgd"
    norm: str = "inf"
    steps: int = 40
    objective: str = "expected_loss"
    seed: int = 0
    layer: str = "predictive"
    grid: int = 64
    boundaries: int = 6
    fade_repeats: int = 16
    certificate: str = "off"
    radius: bool = True
    path_probs: bool = True


@dataclass
class ViewData:
    """What the widgets draw for one state (numpy arrays, float32 where large).

    Attributes
    ----------
    state : ExplorerState
        The state computed, with ``samples`` resolved to an int.
    label : int
        The class attacked: the whole ensemble's predicted label at ``point``.
    classes : list of str
    before : PointView
        Posterior predictive (whole ensemble) at the input.
    after : PointView or None
        The same at the attacked input (None when attacks are unavailable).
    attack : AttackView or None
    grid : GridView or None
        Background layer and member boundaries (2-D inputs with ``grid > 0``).
    fade : FadeView or None
        Expected-gradient norm against the number of samples.
    spread : SpreadView
        Histogram over members of the attacked label's probability.
    radius : RadiusView or None
        Certified radius beside the attack's flip budget, in numbers and words (``state.radius``).
    budget_certificate : BudgetCertificateView or None
        Members certified at the budget and the posterior-mass bound (``state.radius`` False).
    recomputed : tuple of str
        Parts computed for this call rather than taken from the cache.
    timings : dict of str to float
        Seconds spent per recomputed part.
    notes : list of str
        Readable notes, e.g. why a part is missing.
    errors : list of str
        Why a part was refused (e.g. an attack that does not support the chosen norm); the
        other parts are still computed.
    """

    state: ExplorerState
    label: int
    classes: list[str]
    before: PointView
    after: PointView | None
    attack: AttackView | None
    grid: GridView | None
    fade: FadeView | None
    spread: SpreadView
    radius: RadiusView | None = None
    budget_certificate: BudgetCertificateView | None = None
    recomputed: tuple[str, ...] = ()
    timings: dict[str, float] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)

    @property
    def elapsed(self) -> float:
        return float(sum(self.timings.values()))


class ViewCache:
    """Least-recently-used memo of view parts, one table per part.

    Parameters
    ----------
    size : int
        Entries kept per part (old budgets and points stay instant to revisit).
    """

    def __init__(self, size: int = 16):
        self.size = check_int("size", size, low=1)
        self._tables: dict[str, dict[Any, Any]] = {}

    def get(self, part: str, key: Any, make: Any, recomputed: list[str], timings: dict[str, float]) -> Any:
        table = self._tables.setdefault(part, {})
        if key in table:
            table[key] = table.pop(key)
            return table[key]
        started = time.perf_counter()
        value = make()
        timings[part] = timings.get(part, 0.0) + time.perf_counter() - started
        recomputed.append(part)
        table[key] = value
        while len(table) > self.size:
            table.pop(next(iter(table)))
        return value

    def clear(self) -> None:
        self._tables.clear()


def compute_view(ens: Ensemble, state: ExplorerState, bounds: Any = None, cache: ViewCache | None = None,
                 on_panels: Callable[[ViewData], None] | None = None) -> ViewData:
    """Compute every panel's data for ``state``.

    Parameters
    ----------
    ens : Ensemble
    state : ExplorerState
    bounds : (array, array) of shape (n_features,) each, optional
        Input box for the background grid; defaults to ``ens.meta["bounds"]``, else the
        point +- 1.
    cache : ViewCache, optional
        Reuse parts across calls; a fresh cache makes the call independent.
    on_panels : callable, optional
        Called with the view before its certified read-out (``radius`` and
        ``budget_certificate`` still None) when the state asks for one, so a widget can draw
        everything else first: a certificate can take longer than the attack.

    Returns
    -------
    ViewData

    Raises
    ------
    ValueError
        If a field of ``state`` breaks its rule (the message names it).
    """
    state = check_state(ens, state)
    cache = cache if cache is not None else ViewCache()
    lo, hi = _bounds(ens, state, bounds)
    recomputed: list[str] = []
    timings: dict[str, float] = {}
    notes: list[str] = []
    errors: list[str] = []
    s = state

    def get(part, key, make):
        return cache.get(part, key, make, recomputed, timings)

    before = get("point", (s.point,), lambda: point_part(ens, s.point))
    label = int(np.argmax(before.probs))
    grid = None
    if s.grid > 0 and len(s.point) == 2:
        gridded = get("grid_prediction", (s.samples, s.grid, lo, hi),
                      lambda: grid_prediction(ens, s.samples, s.grid, lo, hi))
        shown = "predictive" if s.layer == "certified" else s.layer
        grid = get("grid", (s.samples, s.grid, lo, hi, shown, s.boundaries),
                   lambda: grid_part(gridded, shown, s.boundaries))
    attack = after = fade = None
    try:
        attack, after = get("attack", (s.point, label, s.budget, s.samples, s.method, s.norm, s.steps,
                                       s.objective, s.seed, s.path_probs),
                            lambda: attack_part(ens, s, label))
    except ValueError as refused:  # settings the attack refuses (e.g. cw with norm inf): keep the rest
        errors.append(str(refused))
    fade = get("fade", (s.point, label, s.fade_repeats, s.seed),
               lambda: fade_part(ens, s.point, label, s.fade_repeats, s.seed))
    view = ViewData(state=s, label=label, classes=_classes(ens, before), before=before, after=after,
                    attack=attack, grid=grid, fade=fade, spread=spread_part(before, after, label),
                    recomputed=tuple(recomputed), timings=dict(timings), notes=list(notes), errors=list(errors))
    if s.certificate == "off":
        return view
    if on_panels is not None:
        on_panels(view)
    radius, budget_certificate = _certified(ens, s, (lo, hi), get, notes, attack)
    return replace(view, radius=radius, budget_certificate=budget_certificate, recomputed=tuple(recomputed),
                   timings=timings, notes=notes)


def check_field(ens: Ensemble, name: str, value: Any, n_features: int | None = None) -> Any:
    """Validate one explorer field the way :func:`compute_view` does; returns the clean value.

    Raises
    ------
    ValueError
        Naming the field, the rule and the value, e.g.
        ``budget must be a finite float >= 0; got -0.1``.
    """
    if name == "point":
        point = _check_point(value, n_features)
        for coordinate in point:
            check_representable("point", coordinate, ens.dtype)
        return point
    if name == "budget":
        return check_representable("budget", check_float("budget", value, low=0.0), ens.dtype)
    if name == "samples":
        return None if value is None else check_int("samples", value, low=1, high=len(ens))
    if name == "steps":
        return check_int("steps", value, low=1, high=10_000)
    if name in ("grid", "boundaries"):
        return check_int(name, value, low=0, high=512 if name == "grid" else 64)
    if name in ("radius", "path_probs"):
        if not isinstance(value, bool):
            raise ValueError(f"{name} must be True or False; got {show_value(value)}")
        return value
    if name in ("fade_repeats", "seed"):
        return check_int(name, value, low=1 if name == "fade_repeats" else 0)
    # read at call time, so an attack registered after import is accepted
    choices = {"method": attack_names, "norm": registered_norms, "objective": registered_objectives,
               "layer": lambda: LAYERS, "certificate": lambda: CERTIFICATES}
    if name in choices:
        return check_choice(name, value, choices[name]())
    raise ValueError(f"name must be a field of ExplorerState; got {name!r}")


def check_state(ens: Ensemble, state: ExplorerState) -> ExplorerState:
    """The state with every field checked and ``samples`` resolved to an int."""
    if not isinstance(state, ExplorerState):
        raise ValueError(f"state must be an ExplorerState; got {show_value(state)}")
    clean = {name: check_field(ens, name, getattr(state, name)) for name in state.__dataclass_fields__}
    if clean["samples"] is None:
        clean["samples"] = len(ens)
    return replace(state, **clean)


def _certified(ens: Ensemble, s: ExplorerState, box: tuple, get: Any, notes: list[str], attack: Any) -> tuple:
    """The certified read-out of ``s``; a network the bounds do not cover gets a note, the rest still shown."""
    if s.certificate == "off":
        return None, None
    try:
        if s.radius:
            flipped = attack is not None and attack.success
            found = get("radius", (s.point, s.norm, s.samples, s.certificate, box),
                        lambda: radius_part(ens, s.point, s.norm, s.samples, s.certificate, box))
            words = radius_words(found.radius, found.flip, s.norm, s.certificate, found.search_top, s.budget,
                                 flipped)
            return replace(found, words=words), None
        return None, get("budget_certificate", (s.point, s.budget, s.norm, s.samples, s.certificate, box),
                         lambda: budget_certificate_part(ens, s.point, s.budget, s.norm, s.samples, s.certificate,
                                                         box))
    except ValueError as refused:  # a layer the bounds do not cover: not a wrong setting, so a note
        notes.append(f"no certificate: {refused}")
        return None, None


def _check_point(value: Any, n_features: int | None) -> tuple[float, ...]:
    try:
        flat = [float(v) for v in (value.tolist() if hasattr(value, "tolist") else value)]
    except (TypeError, ValueError):
        raise ValueError(f"point must be a sequence of finite floats; got {show_value(value)}") from None
    if n_features is not None and len(flat) != n_features:
        raise ValueError(f"point must have {n_features} coordinates; got {len(flat)}")
    if not flat or not all(math.isfinite(v) for v in flat):
        raise ValueError(f"point must hold only finite floats; got {show_value(value)}")
    return tuple(flat)


def _bounds(ens: Ensemble, state: ExplorerState, bounds: Any) -> tuple[tuple[float, ...], tuple[float, ...]]:
    if bounds is None:
        bounds = ens.meta.get("bounds")
    if bounds is None:
        point = np.asarray(state.point)
        return tuple((point - 1.0).tolist()), tuple((point + 1.0).tolist())
    lo, hi = (torch.as_tensor(b, dtype=torch.float64).flatten().tolist() for b in bounds)
    if len(lo) != len(state.point) or len(hi) != len(state.point) or any(a >= b for a, b in zip(lo, hi)):
        raise ValueError(
            f"bounds must be two arrays of {len(state.point)} values with lo < hi; got {show_value(bounds)}"
        )
    return tuple(lo), tuple(hi)


def _classes(ens: Ensemble, before: PointView) -> list[str]:
    names = ens.classes
    count = int(before.probs.shape[0])
    if names is None or len(names) != count:
        return [str(c) for c in range(count)]
    return [str(c) for c in names]
