"""Robustness against accuracy across the runs of a sweep, linked to an explorer per run."""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import ipywidgets as ipw
import traitlets as t

from jostle.common.ticks import share_axis
from jostle.posterior.loading import load
from jostle.sweeps.chart_data import (
    GRADIENT_MEASURES,
    ROBUSTNESS_MEASURES,
    limit_grid,
    limit_sample_options,
    sweep_view,
)
from jostle.sweeps.one_run import load_run_data
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.sweep import Sweep

from . import _shown
from ._wire import to_wire
from .explorer import Explorer
from .image_explorer import ImageExplorer
from .limit_chart import LimitChart
from .sweep_chart import SweepChart

_SYNCED = ("methods", "budget", "attack", "measure", "selected_key")
# the limit chart's choices, as (its trait, the explorer's trait)
_LIMIT_SYNCED = (("method", "limit_method"), ("samples", "limit_samples"), ("measure", "limit_measure"),
                 ("view", "limit_view"), ("selected_key", "selected_key"))
_LIMIT_VIEWS = ("grid", "curves")


class SweepExplorer(ipw.HBox):
    """Every finished run of a sweep as one mark: test accuracy against robustness.

    Deterministic runs are rose triangles, Bayesian runs indigo circles. Filters choose
    the methods, the attack and the budget; a table gives Pearson and Spearman
    correlations of robustness with accuracy per family, with the number of runs n and
    two-sided p-values (none below 4 runs, exact permutation p-values up to 8).
    Hovering a mark shows the run's configuration; clicking a run whose ensemble was
    saved (``save_ensembles=True``) opens it in an Explorer, or an ImageExplorer for
    image data, beside the chart.

    Beside it, the limit chart (``limit_chart``) shows the expected-gradient read-out for
    one method and one sample count: a cell per network width (across) and training size
    (up), coloured on a log scale by the chosen statistic, empty where no run was made; or
    that statistic against S per cell with the 1/sqrt(S) reference. Clicking a cell opens
    its run like a mark.

    Parameters
    ----------
    source : str, Path, RunStore or Sweep
        The store file, an open store, or a sweep whose store to read (only its runs).

    Examples
    --------
    >>> SweepExplorer("runs.sqlite")  # doctest: +SKIP
    """

    methods = t.List(t.Unicode(), help="posterior methods shown (a subset of those in the results)")
    budget = t.Float(0.0, help="attack budget eps whose results are shown")
    attack = t.Unicode("", help="label of the attack whose results are shown")
    measure = t.Unicode(
        "robustness", help="y axis: 'robustness' (softmax robustness) or 'unflipped' (1 - success rate)"
    )
    selected_key = t.Unicode("", help="key of the run opened beside the chart ('' for none)")
    limit_method = t.Unicode("", help="posterior method shown in the limit chart")
    limit_samples = t.Unicode("all", help="sample count S of the limit chart: a stored count as text, or 'all'")
    limit_measure = t.Unicode("l2_median", help="read-out statistic colouring the limit chart's cells")
    limit_view = t.Unicode("grid", help="limit chart view: 'grid' (width by training size) or 'curves' (against S)")

    def __init__(self, source: Any, **kwargs: Any):
        self._store_path, self._configs, self._frame, self._gradients = _read_source(source)
        self.chart = SweepChart(layout=ipw.Layout(flex="1 1 auto"))
        self.limit_chart = LimitChart(layout=ipw.Layout(flex="1 1 auto"))
        self._limit_methods = sorted(self._gradients["method"].unique().tolist()) if len(self._gradients) else []
        self._sample_options = limit_sample_options(list(self._configs.values()))
        self.detail = ipw.VBox(layout=ipw.Layout(flex="1 1 auto", min_width="0"))
        self.detail.add_class("jostle-tid-sweep-detail")
        self.detail_title = ipw.Label("Click a run to open it here.")
        self.detail.children = (self.detail_title,)
        self.opened = None
        frame = self._frame
        self._method_options = sorted(frame["method"].unique().tolist()) if len(frame) else []
        self._attack_options = list(dict.fromkeys(frame["attack"].tolist())) if len(frame) else []
        charts = ipw.VBox(children=(self.chart, self.limit_chart),
                          layout=ipw.Layout(flex="0 1 auto", min_width="380px"))
        super().__init__(children=(charts, self.detail), **kwargs)
        _shown.remember(self)
        self.add_class("jostle-sweep-explorer")
        self.add_class("jostle-tid-sweep-explorer")
        with self.hold_trait_notifications():
            self.methods = list(self._method_options)
            self.attack = self._attack_options[0] if self._attack_options else ""
            options = self._budget_options()
            self.budget = options[0] if options else 0.0
            preferred = [m for m in ("hmc", *self._limit_methods) if m in self._limit_methods]
            self.limit_method = preferred[0] if preferred else ""
        self.chart.observe(self._from_view, names=list(_SYNCED))
        self.limit_chart.observe(self._from_limit_view, names=[name for name, _ in _LIMIT_SYNCED])
        self._refresh()
        self._refresh_limit()

    # ------------------------------------------------------------------ validation
    @t.validate("methods")
    def _check_methods(self, proposal):
        unknown = [m for m in proposal["value"] if m not in self._method_options]
        if unknown:
            raise t.TraitError(f"methods must be among {self._method_options}; got {unknown[0]!r}")
        return [m for m in self._method_options if m in proposal["value"]]

    @t.validate("attack")
    def _check_attack(self, proposal):
        if self._attack_options and proposal["value"] not in self._attack_options:
            raise t.TraitError(f"attack must be one of {self._attack_options}; got {proposal['value']!r}")
        return proposal["value"]

    @t.validate("budget")
    def _check_budget(self, proposal):
        options = self._budget_options()
        value = float(proposal["value"])
        if options and not any(abs(value - b) < 1e-12 for b in options):
            raise t.TraitError(
                f"budget must be one of {options} (the budgets of attack {self.attack!r}); got {value:g}"
            )
        return value

    @t.validate("measure")
    def _check_measure(self, proposal):
        if proposal["value"] not in ROBUSTNESS_MEASURES:
            raise t.TraitError(f"measure must be one of {list(ROBUSTNESS_MEASURES)}; got {proposal['value']!r}")
        return proposal["value"]

    @t.validate("selected_key")
    def _check_selected(self, proposal):
        key = proposal["value"]
        if key and key not in self._configs:
            raise t.TraitError(f"selected_key must be '' or the key of a stored run; got {key!r}")
        return key

    @t.validate("limit_method")
    def _check_limit_method(self, proposal):
        value = proposal["value"]
        if self._limit_methods and value not in self._limit_methods:
            raise t.TraitError(f"limit_method must be one of {self._limit_methods} (methods with a gradient "
                               f"read-out); got {value!r}")
        return value

    @t.validate("limit_samples")
    def _check_limit_samples(self, proposal):
        value = str(proposal["value"])
        if self._sample_options and value not in self._sample_options:
            raise t.TraitError(f"limit_samples must be one of {self._sample_options}; got {value!r}")
        return value

    @t.validate("limit_measure")
    def _check_limit_measure(self, proposal):
        if proposal["value"] not in GRADIENT_MEASURES:
            raise t.TraitError(f"limit_measure must be one of {list(GRADIENT_MEASURES)}; got {proposal['value']!r}")
        return proposal["value"]

    @t.validate("limit_view")
    def _check_limit_view(self, proposal):
        if proposal["value"] not in _LIMIT_VIEWS:
            raise t.TraitError(f"limit_view must be one of {list(_LIMIT_VIEWS)}; got {proposal['value']!r}")
        return proposal["value"]

    # ------------------------------------------------------------------ reactions
    @t.observe("limit_method", "limit_samples", "limit_measure", "limit_view")
    def _on_limit_filter(self, change) -> None:
        self._refresh_limit()

    def _from_limit_view(self, change) -> None:
        own = dict(_LIMIT_SYNCED)[change["name"]]
        if change["new"] == getattr(self, own):
            return
        try:
            setattr(self, own, change["new"])
        except t.TraitError as err:
            with self.limit_chart.hold_sync():
                setattr(self.limit_chart, change["name"], getattr(self, own))
                self.limit_chart.note = str(err)

    @t.observe("methods", "budget", "attack", "measure")
    def _on_filter(self, change) -> None:
        if change["name"] == "attack":
            options = self._budget_options()
            if options and not any(abs(self.budget - b) < 1e-12 for b in options):
                self.budget = options[0]
        self._refresh()

    @t.observe("selected_key")
    def _on_select(self, change) -> None:
        self.chart.selected_key = change["new"]
        self.limit_chart.selected_key = change["new"]
        self._open(change["new"])

    def _from_view(self, change) -> None:
        name, value = change["name"], change["new"]
        if value == getattr(self, name):
            return
        try:
            setattr(self, name, value)
        except t.TraitError as err:
            with self.chart.hold_sync():
                setattr(self.chart, name, getattr(self, name))
                self.chart.note = str(err)

    # ------------------------------------------------------------------ view data
    def _refresh(self) -> None:
        self.points, self.correlations = (
            sweep_view(self._frame, self.methods, self.budget, self.attack, self.measure)
            if len(self._frame) else (None, []))
        with self.chart.hold_sync():
            for name in ("methods", "budget", "attack", "measure"):
                setattr(self.chart, name, getattr(self, name))
            self.chart.method_options = self._method_options
            self.chart.attack_options = self._attack_options
            self.chart.budget_options = self._budget_options()
            self.chart.measure_options = list(ROBUSTNESS_MEASURES)
            self.chart.measure_titles = list(ROBUSTNESS_MEASURES.values())
            self.chart.y_title = ROBUSTNESS_MEASURES[self.measure]
            points = self.points
            self.chart.accuracy = to_wire(points.accuracy if points else [], "float64")
            self.chart.value = to_wire(points.value if points else [], "float64")
            self.chart.family = to_wire(points.family if points else [], "uint8")
            self.chart.x_axis = _axis(points.accuracy if points else [])
            self.chart.y_axis = _axis(points.value if points else [])
            self.chart.point_keys = points.keys if points else []
            self.chart.point_notes = points.descriptions if points else []
            self.chart.correlations = [_correlation_row(c) for c in self.correlations]
            self.chart.note = _summary(points)
            self.chart.revision += 1

    def _refresh_limit(self) -> None:
        chart = self.limit_chart
        grid = None
        if self.limit_method:
            frame = self._frame
            saved = set(frame.loc[frame["ensemble_path"].notna(), "key"]) if len(frame) else set()
            grid = limit_grid(self._gradients, self.limit_method, self.limit_samples, self.limit_measure, saved)
        self.limit = grid
        with chart.hold_sync():
            for name, own in _LIMIT_SYNCED:
                setattr(chart, name, getattr(self, own))
            chart.method_options = self._limit_methods
            chart.sample_options = self._sample_options
            chart.measure_options = list(GRADIENT_MEASURES)
            chart.measure_titles = list(GRADIENT_MEASURES.values())
            chart.widths = grid.widths if grid else []
            chart.train_sizes = grid.train_sizes if grid else []
            chart.values = to_wire(grid.values if grid else [], "float64")
            chart.saved = to_wire(grid.saved if grid else [], "uint8")
            chart.cell_keys = [k for row in grid.keys for k in row] if grid else []
            chart.cell_notes = [n for row in grid.notes for n in row] if grid else []
            chart.curves = [{"row": int(i), "column": int(j), "samples": counts.tolist(), "values": values.tolist()}
                            for i, j, counts, values in grid.curves] if grid else []
            chart.reference = ({"samples": grid.reference_counts.tolist(), "values": grid.reference.tolist()}
                               if grid else {"samples": [], "values": []})
            chart.colour_scale = _colour_scale(grid)
            chart.note = _limit_summary(grid, self.limit_method, self.limit_samples)
            chart.revision += 1

    def _budget_options(self) -> list[float]:
        frame = self._frame
        if not len(frame):
            return []
        rows = frame[frame["attack"] == self.attack] if self.attack else frame
        return sorted({float(b) for b in rows["budget"].dropna()})

    def _open(self, key: str) -> None:
        if self.opened is not None:
            self.opened.close()  # stops its background computation
        self.opened = None
        if not key:
            self.detail_title.value = "Click a run to open it here."
            self.detail.children = (self.detail_title,)
            return
        path = self._ensemble_path(key)
        config = self._configs[key]
        label = f"{config['method']['name']}, seed {config['seed']}, run {key[:12]}"
        if path is None or not path.is_file():
            self.detail_title.value = f"{label}: its ensemble was not saved (run the sweep with save_ensembles=True)."
            self.detail.children = (self.detail_title,)
            return
        explorer = _explorer_for(path, config, self._attack_settings(config))
        self.opened = explorer
        self.detail_title.value = label
        self.detail.children = (self.detail_title, explorer)

    def _attack_settings(self, config: dict) -> dict:
        """The chart's attack and budget, to open the run's explorer where the chart points."""
        for attack in config["evaluation"]["attacks"]:
            if attack["label"] == self.attack:
                settings = {"budget": self.budget, "norm": attack["norm"], "steps": attack["steps"],
                            "objective": attack["objective"], "method": attack["method"]}
                if attack["samples"] is not None:
                    settings["samples"] = attack["samples"]
                return settings
        return {}

    def _ensemble_path(self, key: str) -> Path | None:
        if self._store_path is None:
            return None
        with RunStore(self._store_path, readonly=True) as db:
            return db.ensemble_file(key)

    # ------------------------------------------------------------------ sharing
    def report(self, path: Any, title: str | None = None, timeout: float = 60.0) -> Any:
        """Write the chart as filtered now (and the opened run's explorer, if any) as one
        self-contained HTML file; see :meth:`Explorer.report`."""
        from . import report as _report

        return _report.sweep_report(self, path, title or "jostle sweep report", timeout)

    def figure(self, name: str, path: Any, timeout: float = 60.0) -> Any:
        """Write the chart (``"sweep"``) or a view of the opened run's explorer as ``.svg`` or ``.png``."""
        from jostle.report import save_drawing
        from jostle.report.charts import sweep_drawing

        if name == "sweep":
            if self.points is None:
                raise ValueError("the sweep explorer has no finished runs to draw")
            return save_drawing(sweep_drawing(self.points, ROBUSTNESS_MEASURES[self.measure]), path)
        if self.opened is None:
            raise ValueError(f"name must be 'sweep' while no run is opened; got {name!r}")
        return self.opened.figure(name, path, timeout)

    @classmethod
    def from_report(cls, path: Any, source: Any, **kwargs: Any) -> SweepExplorer:
        """A SweepExplorer over ``source`` with the report's filters and opened run."""
        from . import report as _report

        entry = _report.entries_of(path, ("sweep_chart",), ("sweep_explorer",))[0]
        explorer = cls(source, **kwargs)
        try:
            with explorer.hold_trait_notifications():
                explorer.methods, explorer.attack = entry["methods"], entry["attack"]
                explorer.budget, explorer.measure = entry["budget"], entry["measure"]
            explorer.selected_key = entry.get("selected_key", "")
        except t.TraitError as err:
            explorer.close()
            raise ValueError(f"source must hold the runs the report {str(path)!r} shows: {err}") from None
        return explorer


def _read_source(source: Any):
    keys = None
    if isinstance(source, Sweep):
        keys = source.keys()
        source = source.store
        if source is None:
            raise ValueError("source must be a sweep that has a store; run it first or pass store= to Sweep")
    if isinstance(source, RunStore):
        source = source.path
    if not isinstance(source, (str, Path)):
        raise TypeError(f"source must be a store path, a RunStore or a Sweep; got {type(source).__name__}")
    with RunStore(source, readonly=True) as db:
        configs = {r["key"]: r["config"] for r in db.runs(keys)}
        frame = db.results(keys)
        gradients = db.gradients(keys)
    return Path(source), configs, frame, gradients


def _explorer_for(path: Path, config: dict, settings: dict):
    """An Explorer (ImageExplorer for image data) over the saved run.

    It opens on the chart's attack and budget; settings it refuses (a budget beyond its
    slider, say) fall back to its own defaults.
    """
    data = load_run_data(config["data"])
    widget = ImageExplorer if data.image_shape else Explorer
    ens = load(path)
    if settings.get("samples", 0) > len(ens):
        settings.pop("samples")
    try:
        return widget(ens, data, **settings)
    except (ValueError, t.TraitError):
        return widget(ens, data)


def _axis(values) -> dict:
    axis = share_axis(values)
    return {"low": axis.low, "high": axis.high, "ticks": axis.ticks.tolist(), "labels": axis.labels}


def _colour_scale(grid) -> dict:
    if grid is None:
        return {"low": 1.0, "high": 10.0, "ticks": [], "labels": []}
    ticks = [float(v) for v in grid.legend]
    return {"low": grid.colour_low, "high": grid.colour_high, "ticks": ticks, "labels": [f"{v:.3g}" for v in ticks]}


def _limit_summary(grid, method: str, samples: str) -> str:
    if grid is None:
        return "No run in this store has a gradient read-out (stores written before it have none)."
    filled = int((grid.runs > 0).sum())
    cells = grid.values.size
    saved = int(grid.saved.sum())
    return (f"{method}, S = {samples}: {filled} of {cells} cells have a run; {saved} with a saved ensemble "
            "(click to open). Dashed line in the S view: 1/sqrt(S).")


def _correlation_row(c) -> list[str]:
    """family, n, r, p, rho, p, how p was found; "n too small" where n allows no value."""
    def show(v: float) -> str:
        if math.isnan(v):
            return "n too small" if c.p_method == "n too small" else "n/a"
        return f"{v:.3f}"

    return [c.family, str(c.n), show(c.pearson_r), show(c.pearson_p), show(c.spearman_rho), show(c.spearman_p),
            c.p_method]


def _summary(points) -> str:
    if points is None:
        return "No finished runs in this store yet."
    saved = int(points.saved.sum())
    return f"{len(points.keys)} runs shown; {saved} with a saved ensemble (click to open)."
