"""The limit chart of :class:`jostle.widgets.SweepExplorer`: expected-gradient size over widths and data."""
from __future__ import annotations

import anywidget
import traitlets as t

from ._assets import canvas_module, read_asset
from ._wire import empty_wire


class LimitChart(anywidget.AnyWidget):
    """Cells of width (across) by training size (up), coloured by a read-out statistic of the
    expected loss gradient on a log scale, or that statistic against the sample count S per
    cell beside the 1/sqrt(S) reference (drawn by ``js/limit_chart.js``).

    The owning :class:`SweepExplorer` validates every choice made in the view, writes back
    the accepted value and fills the cells.
    """

    _esm = canvas_module("limit_chart.js", "_chart_helpers.js")
    _css = read_asset("theme.css") + "\n" + read_asset("limit_chart.css")

    method_options = t.List(t.Unicode(), [], help="posterior methods with a gradient read-out").tag(sync=True)
    method = t.Unicode("", help="posterior method whose runs fill the grid").tag(sync=True)
    sample_options = t.List(t.Unicode(), [], help="sample counts offered (numbers as text, then 'all')").tag(sync=True)
    samples = t.Unicode("all", help="sample count S shown in the grid").tag(sync=True)
    measure_options = t.List(t.Unicode(), [], help="read-out statistics offered for the colour").tag(sync=True)
    measure_titles = t.List(t.Unicode(), [], help="readable name of each statistic").tag(sync=True)
    measure = t.Unicode("l2_median", help="read-out statistic that colours the cells").tag(sync=True)
    view = t.Unicode("grid", help="'grid' (cells by width and size) or 'curves' (statistic against S)").tag(sync=True)
    widths = t.List(t.Int(), [], help="network widths, left to right").tag(sync=True)
    train_sizes = t.List(t.Int(), [], help="training sizes, bottom to top").tag(sync=True)
    values = t.Dict(empty_wire(dtype="float64"),
                    help="cell values, shape (n_sizes, n_widths), NaN for no run (binary float64)").tag(sync=True)
    saved = t.Dict(empty_wire(dtype="uint8"), help="1 where the cell's run has a saved ensemble (binary uint8)").tag(
        sync=True)
    cell_keys = t.List(t.Unicode(), [], help="run key per cell, row-major from the smallest size ('' for none)").tag(
        sync=True)
    cell_notes = t.List(t.Unicode(), [], help="hover note per cell, row-major, plain text").tag(sync=True)
    curves = t.List(t.Dict(), [], help="per filled cell: row, column, sample counts and values (a few numbers)").tag(
        sync=True)
    reference = t.Dict({"samples": [], "values": []},
                       help="the 1/sqrt(S) Monte Carlo reference at the stored sample counts").tag(sync=True)
    colour_scale = t.Dict({"low": 1.0, "high": 10.0, "ticks": [], "labels": []},
                          help="the log colour scale's ends and its legend ticks with labels").tag(sync=True)
    selected_key = t.Unicode("", help="run chosen by clicking a cell ('' for none)").tag(sync=True)
    note = t.Unicode("", help="one line under the chart, plain text").tag(sync=True)
    revision = t.Int(0, help="bumped after each full update so the view redraws once").tag(sync=True)
