"""The 2-D explorer: pick an input, see the posterior predictive, attack it, all live."""
from __future__ import annotations

from typing import Any

import ipywidgets as w
import numpy as np
import traitlets as t

import jostle.live.engine as live
from jostle.live.certified_map import radius_map_levels
from jostle.live.certified_parts import CAUTION as CERTIFICATE_CAUTION

from . import _charts
from ._live_box import LiveBox
from ._wire import empty_wire, to_wire
from .explorer_map import ExplorerMap

# IBP for the map layer: per-cell CROWN bounds with tanh relaxations were measured many times
# slower than IBP (benchmarks/bench_certify.py); the read-out at the picked input uses CROWN.
RADIUS_MAP_METHOD = "ibp"


class Explorer(LiveBox):
    """Linked live views of one posterior ensemble on 2-D data.

    Layout follows the data flow: input map, then the posterior predictive at the picked
    input, then the attack from it. Every control is a trait, so code can drive it and
    ``traitlets.link`` / ``ipywidgets.jslink`` can tie explorers together.

    Parameters
    ----------
    ens : jostle.Ensemble
        A posterior over a classifier of 2 input features.
    data : jostle.Dataset
        Its training points are drawn; ``data.bounds`` sets the map's box.
    point : sequence of 2 floats, optional
        Starting input; defaults to the first test point.
    budget, samples, method, norm, steps, objective
        Attack settings (``samples=None`` uses every member).
    layer : str
        Background layer: ``predictive``, ``epistemic``, ``entropy`` or ``certified`` (the
        predictive's certified radius per cell, computed on its own thread, coarse grid first).
    grid : int
        Background resolution per axis.
    boundaries : int
        Members whose decision boundaries are drawn.
    seed : int
        Seed of the attack's random start and of the fading-gradient subsets.

    Examples
    --------
    >>> ex = Explorer(ens, data)          # doctest: +SKIP
    >>> ex.budget = 0.3; ex.wait(); ex.result.attack.success   # doctest: +SKIP
    """

    point = t.List([0.0, 0.0], help="picked input (x, y) in data units").tag(sync=True)
    layer = t.Unicode(
        "predictive", help="background layer: predictive, epistemic, entropy or certified"
    ).tag(sync=True)

    def __init__(self, ens: Any, data: Any, point: Any = None, budget: float = 0.1, samples: int | None = None,
                 method: str = "pgd", norm: str = "inf", steps: int = 40, objective: str = "expected_loss",
                 layer: str = "predictive", grid: int = 64, boundaries: int = 6, seed: int = 0, **kwargs: Any):
        if data.n_features != 2:
            raise ValueError(f"data must have 2 features for Explorer; got {data.n_features} "
                             f"(use ImageExplorer for images)")
        lo, hi = (np.asarray(b, dtype=float) for b in data.bounds)
        self._bounds = (lo.tolist(), hi.tolist())
        start = data.x_test[0].tolist() if point is None else point
        self._setup_live(ens, {"point": start, "budget": budget, "samples": samples, "method": method, "norm": norm,
                               "steps": steps, "objective": objective, "layer": layer, "grid": grid,
                               "boundaries": boundaries, "seed": seed},
                         budget_max=round(0.5 * float(np.min(hi - lo)), 3), n_features=2)
        self._fixed = {"grid": grid, "boundaries": boundaries, "seed": seed, "certificate": "crown"}
        self._map = ExplorerMap(bounds=[lo[0], hi[0], lo[1], hi[1]], classes=[str(c) for c in data.classes],
                                train_points=to_wire(data.x_train.numpy()),
                                train_labels=to_wire(data.y_train.numpy(), "uint8"))
        self._last_grid = None
        self._certified_text = _charts.caption("certified radius: computing")
        self._certified_text.add_class("jostle-tid-certified-text")
        self._certified_caution = _charts.caption(CERTIFICATE_CAUTION)
        self._certified_caution.add_class("jostle-tid-certified-caution")
        self._radius_maps: dict = {}
        self._map_worker = live.LiveWorker(self._compute_radius_map, self._deliver_radius_map,
                                           on_start=self._radius_map_started, name="jostle-radius-map")
        self._map_generation = 0
        self._map_closed = False
        predictive, self._draw_predictive = _charts.predictive_chart()
        spread, spread_text, self._draw_spread = _charts.spread_chart()
        path, self._draw_path = _charts.path_chart()
        fade, self._draw_fade = _charts.fade_chart()
        super().__init__(children=_layout(data, ens, self._map, [predictive, spread, spread_text],
                                          [self._controls, self._certified_text, self._certified_caution, path,
                                           fade, _charts.caption(_charts.FADE_CAPTION)],
                                          self._status), **kwargs)
        self.add_class("jostle-root")
        for name in ("jostle-explorer", "jostle-tag-scope", "jostle-tid-explorer"):
            self.add_class(name)
        with self.hold_trait_notifications():
            self.point, self.layer, self.budget, self.method = start, layer, budget, method
            self.samples = len(ens) if samples is None else samples
            self.norm, self.steps, self.objective = norm, steps, objective
        self._mirror(self._map, "point")
        self._mirror(self._map, "layer")
        self._map.observe(self._from_control, names=["point", "layer"])
        self._radius_map_shown = None
        self._start_live()
        self._request_radius_map()

    def _show_certified(self, view: live.ViewData) -> None:
        radius = view.radius
        self._map.certified_radius = radius.radius if radius is not None else -1.0
        self._map.flip_budget = radius.flip if radius is not None and np.isfinite(radius.flip) else -1.0
        if radius is not None:
            self._certified_text.value = radius.words
        elif view.state.certificate == "off":
            self._certified_text.value = "certified radius: off"
        else:
            self._certified_text.value = "certified radius: unavailable for this network (see the status line)"

    # ------------------------------------------------ certified-radius layer, on its own thread
    def _request_radius_map(self) -> None:
        if self.layer == "certified" and self._fixed["grid"] > 0:
            lo, hi = self._bounds
            self._map_worker.submit((self.samples, self._fixed["grid"], tuple(lo), tuple(hi), self.norm))

    def _radius_map_started(self, generation: int, request: Any) -> None:
        self._map_generation = generation

    def _compute_radius_map(self, request: Any) -> Any:
        generation = self._map_generation
        if request in self._radius_maps:
            self._show_radius_map(self._radius_maps[request], request[1])
            return self._radius_maps[request]
        samples, grid, lo, hi, norm = request
        found = None
        for found in radius_map_levels(self._ens, samples, grid, lo, hi, norm, RADIUS_MAP_METHOD,
                                       keep_going=lambda: self._map_current(generation)):
            if not self._map_current(generation):
                return None
            self._show_radius_map(found, grid)
        if found is not None and found.radius.shape[0] == grid:
            self._radius_maps = {request: found}
        return found

    def _map_current(self, generation: int) -> bool:
        return not self._map_closed and self._map_worker.generation == generation

    def _show_radius_map(self, found: Any, grid: int) -> None:
        with self._view_lock, self._map.hold_sync():
            self._map.radius_layer = to_wire(found.radius)
            self._map.radius_layer_max = float(max(found.radius.max(), found.resolution))
            size = found.radius.shape[0]
            self._map.radius_layer_note = (f"{size} x {size} of {grid} x {grid}, {found.method.upper()}, "
                                           f"L-{found.norm}, S = {found.samples}")
        self._radius_map_shown = found

    def _deliver_radius_map(self, outcome: live.Outcome) -> None:
        if outcome.error is not None:
            self._error = f"certified-radius layer: {outcome.error}"
            self._error_generation = self._worker.generation
            with self._view_lock:
                self._show_status(self._worker.generation, "error", self._error)

    @t.validate("point")
    def _validate_point(self, proposal: Any) -> Any:
        return self._check(proposal, n_features=2)

    @t.validate("layer")
    def _validate_layer(self, proposal: Any) -> Any:
        return self._check(proposal)

    @t.observe("point", "layer")
    def _on_view_control(self, change: Any) -> None:
        if change.old == change.new:  # a rejected value, see LiveBox._on_control
            return
        self._mirror(self._map, change.name)
        self._request()
        if change.name == "layer":
            self._request_radius_map()

    @t.observe("samples", "norm")
    def _on_radius_map_control(self, change: Any) -> None:
        if change.old != change.new:
            self._request_radius_map()

    @property
    def radius_map(self) -> Any:
        """The finest certified-radius map drawn so far (a ``RadiusMap``; None before the layer is shown)."""
        return self._radius_map_shown

    def wait(self, timeout: float = 30.0) -> bool:
        """Block until the views and the certified-radius layer are computed and shown; False on timeout."""
        return super().wait(timeout) and self._map_worker.wait(timeout)

    def _state(self) -> live.ExplorerState:
        return live.ExplorerState(point=tuple(self.point), budget=self.budget, samples=self.samples,
                                  method=self.method, norm=self.norm, steps=self.steps, objective=self.objective,
                                  layer=self.layer, **self._fixed)

    def close(self) -> None:
        if hasattr(self, "_map_worker"):
            self._map_closed = True  # a layer being computed stops at its next level
            self._map_worker.close()
        if hasattr(self, "_map"):
            self._map.close()
        super().close()

    def _apply(self, view: live.ViewData) -> None:
        state = view.state
        with self._map.hold_sync():
            if view.grid is not None and view.grid is not self._last_grid:
                grid = view.grid
                self._map.background = to_wire(grid.probs)
                self._map.layer_values = to_wire(grid.values)
                self._map.layer_shown, self._map.layer_max = grid.layer, grid.value_max
                self._map.segments = to_wire(grid.segments)
                self._map.members_drawn = len(grid.members_drawn)
                self._last_grid = grid
            self._map.path = to_wire(view.attack.path) if view.attack is not None else empty_wire(2)
            self._map.success = bool(view.attack is not None and view.attack.success)
            self._map.ball_budget, self._map.ball_norm = state.budget, state.norm
            self._map.ball_centre = list(state.point)
            self._map.predicted = f"{view.classes[view.label]} (p = {float(view.before.probs[view.label]):.2f})"
            self._map.view_revision += 1
        self._show_certified(view)
        self._draw_predictive(view)
        self._draw_spread(view)
        self._draw_path(view)
        self._draw_fade(view)

    # ---------------------------------------------------------------- sharing
    def report(self, path: Any, title: str | None = None, timeout: float = 60.0) -> Any:
        """Write the current view as one self-contained HTML file (opens offline, no kernel).

        The map, predictive, spread, path and fading charts as inline SVG, the settings,
        the posterior's provenance (with the sha256 of its parameters) and the cautions;
        the state is embedded as JSON for :meth:`from_report`. Written atomically.
        Returns the path.
        """
        from . import report as _report

        return _report.explorers_report([self], ["explorer"], path, title or "jostle explorer report", "explorer",
                                        timeout)

    def figure(self, name: str, path: Any, timeout: float = 60.0) -> Any:
        """Write one view (``map``, ``predictive``, ``spread``, ``path``, ``fade``) as ``.svg`` or ``.png``."""
        from . import report as _report

        return _report.figure(self, name, path, timeout)

    @classmethod
    def from_report(cls, path: Any, ens: Any, data: Any, **kwargs: Any) -> Explorer:
        """An Explorer restored to the settings a report was made with.

        ``ens`` must be the report's posterior (the sha256 of its parameters is checked);
        ``data`` supplies the training points the map draws. The report is parsed as JSON,
        never run.
        """
        from . import report as _report

        entry = _report.entries_of(path, ("explorer",), ("explorer", "comparison", "sweep_explorer"))[0]
        _report.check_same_posterior(ens, entry, path)
        return cls(ens, data, **{**_report.explorer_settings(entry), **kwargs})


def _layout(data: Any, ens: Any, map_view: w.Widget, predictive: list, attack: list, status: w.Widget) -> list:
    method = ens.meta.get("method", "posterior")
    title = w.Label(f"{data.name}: {method}, S = {len(ens)} posterior samples")
    title.add_class("jostle-column-title")
    columns = []
    for heading, children in (("1 - input", [map_view]), ("2 - posterior predictive", predictive),
                              ("3 - attack", attack)):
        label = w.Label(heading)
        label.add_class("jostle-column-title")
        columns.append(w.VBox([label, *children], layout=w.Layout(flex="1 1 300px", min_width="260px",
                                                                    padding="0 6px")))
    row = w.HBox(columns, layout=w.Layout(flex_flow="row wrap", width="100%", align_items="flex-start"))
    return [title, row, status]
