"""The limit chart inside SweepExplorer: its cells from the store, its choices, a click that opens a run."""
from __future__ import annotations

from importlib.resources import files

import numpy as np
import pytest
import traitlets

import jostle
from jostle.sweeps.chart_data import limit_grid
from jostle.sweeps.results_db import RunStore
from jostle.widgets._wire import from_wire
from jostle.widgets.sweep_explorer import SweepExplorer

SHIPPED = files("jostle.demo_notebooks") / "data" / "leak_alarm_limit.sqlite"


def test_shipped_study_fills_the_grid_for_hmc():
    w = SweepExplorer(str(SHIPPED))
    chart = w.limit_chart
    assert w.limit_method == "hmc" and chart.method_options == ["deep_ensemble", "hmc", "map"]
    assert chart.sample_options == ["1", "4", "16", "64", "all"]
    assert chart.widths == [4, 16, 64, 256] and chart.train_sizes == [50, 200, 800]
    with RunStore(str(SHIPPED), readonly=True) as db:
        frame = db.gradients()
    every = frame[(frame.method == "hmc") & (frame.which == "expected") & (frame.samples == frame.members)]
    values = from_wire(chart.values)
    for _, row in every.iterrows():
        i, j = chart.train_sizes.index(row.n_train), chart.widths.index(row.width)
        assert values[i, j] == row.l2_median  # a copy of the stored number
        assert chart.cell_keys[i * 4 + j] == row.key
    assert chart.colour_scale["low"] == values.min() and chart.colour_scale["labels"]
    assert "12 of 12 cells have a run; 0 with a saved ensemble" in chart.note


def test_choices_from_the_view_are_checked_and_refused_ones_restored():
    w = SweepExplorer(str(SHIPPED))
    w.limit_chart.method = "map"  # as if the browser sent it
    assert w.limit_method == "map" and from_wire(w.limit_chart.values).shape == (3, 4)
    w.limit_chart.samples = "3"
    assert w.limit_samples == "all" and w.limit_chart.samples == "all"
    assert "limit_samples must be one of ['1', '4', '16', '64', 'all']; got '3'" in w.limit_chart.note
    w.limit_chart.view = "curves"
    assert w.limit_view == "curves" and len(w.limit_chart.curves) == 12
    with pytest.raises(traitlets.TraitError, match=r"limit_measure must be one of .*; got 'l1'"):
        w.limit_measure = "l1"
    with pytest.raises(traitlets.TraitError, match=r"limit_method must be one of .*; got 'vi'"):
        w.limit_method = "vi"
    with pytest.raises(traitlets.TraitError, match=r"limit_view must be one of \['grid', 'curves'\]; got 'table'"):
        w.limit_view = "table"


def test_clicking_a_cell_opens_its_saved_run(tmp_path):
    from jostle.widgets import Explorer as explorer_class

    sweep = jostle.Sweep(datasets=[{"name": "leak_alarm", "n_test": 20}],
                         methods=[{"name": "deep_ensemble", "members": 2, "epochs": 3}],
                         architectures=[{"depth": 1, "width": w} for w in (3, 6)], train_sizes=[20],
                         evaluation={"budgets": [0.1], "points": 6, "attacks": [{"method": "fgsm"}]},
                         store=tmp_path / "runs.sqlite")
    sweep.run(save_ensembles=True, progress_bar=False)
    w = SweepExplorer(sweep)
    grid = limit_grid(sweep.gradients(), "deep_ensemble", "all", saved_keys=sweep.keys())
    assert from_wire(w.limit_chart.saved).tolist() == [[1, 1]]
    np.testing.assert_array_equal(from_wire(w.limit_chart.values), grid.values)
    key = w.limit_chart.cell_keys[1]
    w.limit_chart.selected_key = key  # a click on the cell
    try:
        assert w.selected_key == key and w.chart.selected_key == key
        assert isinstance(w.opened, explorer_class) and w.detail.children == (w.detail_title, w.opened)
    finally:
        w.selected_key = ""


def test_a_store_without_readout_says_so(tmp_path):
    import sqlite3

    sweep = jostle.Sweep(datasets=[{"name": "leak_alarm", "n_test": 20}], methods=[{"name": "map", "epochs": 2}],
                         architectures=[{"depth": 1, "width": 3}], train_sizes=[20],
                         evaluation={"budgets": [0.1], "points": 4, "attacks": [{"method": "fgsm"}]})
    path = tmp_path / "runs.sqlite"
    sweep.run(path, progress_bar=False)
    db = sqlite3.connect(path)
    db.execute("DELETE FROM gradient_results")
    db.commit()
    db.close()
    w = SweepExplorer(path)
    assert w.limit_method == "" and w.limit is None and w.limit_chart.cell_keys == []
    assert "No run in this store has a gradient read-out" in w.limit_chart.note


def test_limit_module_is_self_contained_and_sets_text_only():
    import re

    from jostle.widgets.limit_chart import LimitChart

    source = str(LimitChart._esm)  # as served: the shared helpers, then the chart's own module
    assert "export default { render }" in source
    assert not re.search(r"^\s*import\s", source, flags=re.M)  # no imports, no build step
    assert "innerHTML" not in source  # kernel strings only through textContent
