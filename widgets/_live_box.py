"""Shared plumbing of the live widgets: attack traits, their checks, the worker and the status line.

Threads: the kernel's main thread only writes the control traits (and the controls view);
the worker thread is the only writer of view traits (map, charts, status), so no widget
is ever inside ``hold_sync`` on two threads at once.
"""
from __future__ import annotations

import threading
from typing import Any

import ipywidgets as w
import traitlets as t

import jostle.live.engine as live
from jostle import Ensemble

from . import _shown
from .attack_controls import AttackControls
from .status_line import StatusLine

CONTROL_NAMES = ("budget", "samples", "method", "norm", "steps", "objective")
# Traits of ipywidgets' own (layout, children, ...) that set_state passes on unchecked.
_PLAIN = frozenset(w.VBox.class_trait_names())


class LiveBox(w.VBox):
    """Base of :class:`Explorer` and :class:`ImageExplorer`: attack settings in, views out."""

    budget = t.Float(0.1, help="attack budget eps (>= 0) in input units").tag(sync=True)
    samples = t.Int(1, help="posterior samples the attacker averages over, 1..len(ens)").tag(sync=True)
    method = t.Unicode(
        "pgd", help="attack method: a registered attack (fgsm, pgd, cw, spsa, square built in)"
    ).tag(sync=True)
    norm = t.Unicode("inf", help="perturbation norm: inf (L-inf) or 2 (L2)").tag(sync=True)
    steps = t.Int(40, help="attack iterations").tag(sync=True)
    objective = t.Unicode("expected_loss", help="expected_loss (mean of member losses), predictive or margin; "
                                                "cw and square take only margin").tag(sync=True)

    def _setup_live(self, ens: Any, settings: dict, budget_max: float, n_features: int | None = None) -> None:
        """Call before ``super().__init__``: validators need the ensemble.

        Constructor arguments are checked here and raise; later values set from the page
        or from code are reported in the status line instead.
        """
        if not isinstance(ens, Ensemble):
            raise ValueError(f"ens must be a jostle.Ensemble; got {type(ens).__name__}")
        for name, value in settings.items():
            if value is not None:
                live.check_field(ens, name, value, n_features=n_features)
        self._ens = ens
        _shown.remember(self)
        self._point_features = n_features
        self._cache = live.ViewCache()
        self._result: live.ViewData | None = None
        self._error: str | None = None
        self._error_generation = -1
        self._last_state: live.ExplorerState | None = None
        self._syncing = False
        self._ready = False
        self._accepted: dict[str, Any] = {}
        # Held by the worker while it writes view traits and by the main thread while it
        # mirrors a control into a view widget, so no widget's pending-sync set is shared.
        self._view_lock = threading.RLock()
        self._controls = AttackControls(budget_max=budget_max, samples_max=len(ens),
                                        steps_max=max(200, int(settings.get("steps", 40))))
        self._status = StatusLine(message="starting", state="busy")
        self._worker = live.LiveWorker(self._compute, self._deliver, on_start=self._started)

    def _start_live(self) -> None:
        """Call after ``super().__init__``: mirror the controls and queue the first view."""
        for name in CONTROL_NAMES:
            setattr(self._controls, name, getattr(self, name))
        self._controls.observe(self._from_control, names=list(CONTROL_NAMES))
        self._ready = True
        self._request()

    # ---------------------------------------------------------------- public
    @property
    def result(self) -> live.ViewData | None:
        """The latest view data the widget shows (read-only; None before the first one)."""
        return self._result

    @property
    def worker(self) -> live.LiveWorker:
        """The background worker (its ``runs`` and ``dropped`` counters are useful in tests)."""
        return self._worker

    @property
    def status(self) -> tuple[str, str]:
        """``(state, message)`` of the status line: state is idle, busy or error."""
        return self._status.state, self._status.message

    def wait(self, timeout: float = 30.0) -> bool:
        """Block until every queued update is computed and shown; False on timeout."""
        return self._worker.wait(timeout)

    def close(self) -> None:
        if hasattr(self, "_worker"):
            self._worker.close()
            self._controls.close()
            self._status.close()
        super().close()

    def set_state(self, sync_data: dict) -> None:
        """Apply values from the page (or from code). A value of the wrong type or out of its
        range is reported in the status line and dropped, like any rejected value, instead of
        raising out of the comm handler."""
        accepted = {}
        for name, value in sync_data.items():
            error = self._refusal(name, value) if name in self.traits() and name not in _PLAIN else None
            if error is not None:
                self._worker.notify(error)
                continue
            accepted[name] = value
        super().set_state(accepted)

    def _refusal(self, name: str, value: Any) -> ValueError | None:
        if name in live.ExplorerState.__dataclass_fields__:
            try:
                live.check_field(self._ens, name, value, n_features=self._point_features)
            except ValueError as err:
                return err
        trait = self.traits()[name]
        try:
            trait.validate(self, value)
        except t.TraitError:
            return ValueError(f"{name} must be {trait.info()}; got {value!r}")
        return None

    # ---------------------------------------------------------------- main thread
    @t.validate(*CONTROL_NAMES)
    def _validate_control(self, proposal: Any) -> Any:
        return self._check(proposal)

    @t.observe(*CONTROL_NAMES)
    def _on_control(self, change: Any) -> None:
        # A rejected value inside hold_trait_notifications (set_state) ends as a change whose
        # old and new are equal; it must not queue a view that would clear the error.
        if change.old == change.new:
            return
        self._mirror(self._controls, change.name)
        self._request()

    def _request(self) -> None:
        if self._ready:
            self._worker.submit(self._state())

    def _state(self) -> live.ExplorerState:
        raise NotImplementedError

    def _check(self, proposal: Any, n_features: int | None = None) -> Any:
        """Accept a clean value, or report why not and keep the last good one."""
        name = proposal.trait.name
        try:
            value = live.check_field(self._ens, name, proposal.value, n_features=n_features)
        except ValueError as err:
            self._worker.notify(err)
            # Not getattr(self, name): inside hold_trait_notifications (as in set_state) the
            # trait already holds the rejected value when cross-validation runs.
            return self._accepted.get(name, proposal.trait.default_value)
        value = list(value) if isinstance(value, tuple) else value
        self._accepted[name] = value
        return value

    def _from_control(self, change: Any) -> None:
        if self._syncing:
            return
        setattr(self, change.name, change.new)
        accepted = getattr(self, change.name)
        if accepted != change.new:
            setattr(change.owner, change.name, accepted)

    def _mirror(self, target: Any, name: str, value: Any = None) -> None:
        self._syncing = True
        try:
            with self._view_lock:
                setattr(target, name, getattr(self, name) if value is None else value)
        finally:
            self._syncing = False

    # ---------------------------------------------------------------- worker thread
    #: draw each view before its certified read-out, then the read-out (the image explorer)
    _panels_first = False
    #: the view being drawn early, while its certified read-out is computed (else None)
    _early = None
    _running = 0

    def _compute(self, state: live.ExplorerState) -> live.ViewData:
        early = self._show_early if self._panels_first else None
        return live.compute_view(self._ens, state, bounds=self._bounds, cache=self._cache, on_panels=early)

    def _show_early(self, view: live.ViewData) -> None:
        """Worker thread: draw ``view`` (its certified read-out still to come) and say so."""
        with self._view_lock:
            self._early = view
            try:
                self._apply(view)
            finally:
                self._early = None
        self._show_status(self._running, "busy", "computing the certificate")

    def _started(self, generation: int, state: live.ExplorerState) -> None:
        self._running = generation
        changed = _changed(self._last_state, state)
        message = f"computing after a change of {changed}" if changed else "computing the view"
        self._show_status(generation, "busy", message)

    def _deliver(self, outcome: live.Outcome) -> None:
        if outcome.error is not None:
            self._error = _readable(outcome.error)
            self._error_generation = outcome.generation
            self._show_status(outcome.generation, "error", self._error)
            return
        view = outcome.result
        with self._view_lock:
            self._apply(view)
        self._result = view
        self._last_state = view.state
        if view.errors:
            self._error = "; ".join(view.errors)
            self._error_generation = outcome.generation
            self._show_status(outcome.generation, "error", self._error)
            return
        parts = ", ".join(view.recomputed) if view.recomputed else "nothing new"
        text = f"updated in {outcome.elapsed * 1000:.0f} ms (computed: {parts})"
        self._show_status(outcome.generation, "idle", "; ".join([text] + view.notes))

    def _show_status(self, generation: int, state: str, text: str) -> None:
        if self._error is not None and generation <= self._error_generation and state != "error":
            state, text = "error", f"{self._error} (showing the last accepted settings)"
        elif state != "error" and generation > self._error_generation:
            self._error = None
        with self._status.hold_sync():
            self._status.state = state
            self._status.message = text

    def _apply(self, view: live.ViewData) -> None:
        raise NotImplementedError


def _changed(old: live.ExplorerState | None, new: live.ExplorerState) -> str:
    if old is None:
        return ""
    names = [name for name in new.__dataclass_fields__ if getattr(old, name) != getattr(new, name)]
    return ", ".join(names)


def _readable(error: BaseException) -> str:
    text = str(error) or type(error).__name__
    return text if isinstance(error, ValueError) else f"{type(error).__name__}: {text}"
