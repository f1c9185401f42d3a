"""The chart view of :class:`jostle.widgets.SweepExplorer`: marks, filters, correlation table."""
from __future__ import annotations

import anywidget
import traitlets as t

from ._assets import canvas_module, read_asset
from ._wire import empty_wire


class SweepChart(anywidget.AnyWidget):
    """Robustness against accuracy, one mark per run (drawn by ``js/sweep_chart.js``).

    The owning :class:`SweepExplorer` validates every choice made in the view and writes
    back the accepted value; it also fills the point arrays and the correlation rows.
    """

    _esm = canvas_module("sweep_chart.js", "_chart_helpers.js")
    _css = read_asset("theme.css") + "\n" + read_asset("sweep_chart.css")

    accuracy = t.Dict(empty_wire(dtype="float64"), help="x of each mark: test accuracy (binary float64)").tag(sync=True)
    value = t.Dict(
        empty_wire(dtype="float64"), help="y of each mark: the robustness measure (binary float64)"
    ).tag(sync=True)
    family = t.Dict(
        empty_wire(dtype="uint8"), help="0 deterministic, 1 Bayesian, per mark (binary uint8)"
    ).tag(sync=True)
    point_keys = t.List(t.Unicode(), [], help="run key of each mark").tag(sync=True)
    point_notes = t.List(
        t.Unicode(), [], help="hover note of each mark: the run's configuration, plain text"
    ).tag(sync=True)
    method_options = t.List(t.Unicode(), [], help="posterior methods present in the results").tag(sync=True)
    methods = t.List(t.Unicode(), [], help="posterior methods shown").tag(sync=True)
    budget_options = t.List(t.Float(), [], help="attack budgets present in the results").tag(sync=True)
    budget = t.Float(0.0, help="attack budget eps shown").tag(sync=True)
    attack_options = t.List(t.Unicode(), [], help="attack labels present in the results").tag(sync=True)
    attack = t.Unicode("", help="attack shown").tag(sync=True)
    measure_options = t.List(t.Unicode(), [], help="robustness measures offered for the y axis").tag(sync=True)
    measure_titles = t.List(t.Unicode(), [], help="readable name of each robustness measure").tag(sync=True)
    measure = t.Unicode("robustness", help="robustness measure on the y axis").tag(sync=True)
    x_title = t.Unicode("test accuracy", help="x axis title").tag(sync=True)
    x_axis = t.Dict({"low": 0.0, "high": 1.0, "ticks": [], "labels": []},
                    help="x domain and its 1-2-5 ticks with their labels").tag(sync=True)
    y_axis = t.Dict({"low": 0.0, "high": 1.0, "ticks": [], "labels": []},
                    help="y domain and its 1-2-5 ticks with their labels").tag(sync=True)
    y_title = t.Unicode("", help="y axis title").tag(sync=True)
    correlations = t.List(t.List(t.Unicode()), [],
                          help="rows: family, n, Pearson r, p, Spearman rho, p, how p was found (text)").tag(sync=True)
    selected_key = t.Unicode("", help="run chosen by clicking a mark ('' for none)").tag(sync=True)
    note = t.Unicode("", help="one line under the chart, plain text").tag(sync=True)
    revision = t.Int(0, help="bumped after each full update so the view redraws once").tag(sync=True)
