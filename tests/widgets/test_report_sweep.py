"""SweepExplorer reports: the chart's numbers as filtered, the opened run, and restoring the filters."""
from __future__ import annotations

import numpy as np
import pytest

from jostle.report import read_report_state
from jostle.sweeps.chart_data import sweep_view
from jostle.sweeps.results_db import RunStore
from jostle.widgets.sweep_explorer import SweepExplorer

from .test_report import Tables
from .test_sweep_explorer import SWEEP, _fake_record


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("sweep-report") / "runs.sqlite"
    rng = np.random.default_rng(7)
    with RunStore(path) as db:
        for config in SWEEP.runs():
            db.record(_fake_record(config, rng))
    return path


def test_sweep_report_shows_the_filtered_chart_and_restores_it(store, tmp_path):
    w = SweepExplorer(store)
    w.methods, w.attack, w.budget, w.measure = ["map", "vi"], "pgd-inf", 0.2, "unflipped"
    path = w.report(tmp_path / "sweep.html")
    entry = read_report_state(path)["entries"][0]
    points, correlations = w.points, w.correlations
    assert entry["points"]["keys"] == points.keys
    np.testing.assert_array_equal(entry["points"]["accuracy"], points.accuracy)  # float64 JSON round trip: exact
    np.testing.assert_array_equal(entry["points"]["value"], points.value)
    assert [c["n"] for c in entry["correlations"]] == [c.n for c in correlations]
    parser = Tables()
    parser.feed(path.read_text(encoding="utf-8"))
    rows = parser.tables["report-correlations"][1:]
    for row, c in zip(rows, correlations):
        assert row[0] == c.family and int(row[1]) == c.n
        if np.isfinite(c.pearson_r):
            assert abs(float(row[2]) - c.pearson_r) <= 5e-4  # shown to 3 decimals
    assert len(parser.tables["report-runs"]) == 1 + len(points.keys)
    restored = SweepExplorer.from_report(path, store)
    assert (restored.methods, restored.attack, restored.budget, restored.measure) == (
        ["map", "vi"], "pgd-inf", 0.2, "unflipped")
    fresh = sweep_view(restored._frame, restored.methods, restored.budget, restored.attack, restored.measure)[0]
    assert fresh.keys == points.keys
    svg = w.figure("sweep", tmp_path / "sweep.svg")
    assert svg.read_text(encoding="utf-8").count("<polygon") + svg.read_text(encoding="utf-8").count(
        "<ellipse") == len(points.keys)
    with pytest.raises(ValueError, match="name must be 'sweep' while no run is opened; got 'map'"):
        w.figure("map", tmp_path / "map.svg")
