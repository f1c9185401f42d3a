"""``jostle report``: a store's charts as one offline HTML file; a notebook gets a message saying why not."""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

import jostle
from jostle.cli import main
from jostle.cli.report import notebook_explorers
from jostle.report import read_report_state
from jostle.sweeps.chart_data import sweep_points
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.spec import run_key

SWEEP = jostle.Sweep(
    datasets=[{"name": "moons", "n_test": 20}], methods=["map", "deep_ensemble"],
    architectures=[{"depth": 1, "width": 4}], train_sizes=[20], seeds=list(range(3)),
    evaluation={"budgets": [0.1, 0.2], "points": 5, "attacks": [{"method": "fgsm"}]},
)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """Seeded made-up scores for finished runs (the chart's input, no fitting)."""
    path = tmp_path_factory.mktemp("cli-report") / "runs.sqlite"
    rng = np.random.default_rng(3)
    with RunStore(path) as db:
        for config in SWEEP.runs():
            accuracy = float(rng.uniform(0.6, 1.0))
            attacks = [{"attack": a["label"], "method": a["method"], "norm": a["norm"], "steps": a["steps"],
                        "samples": a["samples"], "budget": b, "success_rate": float(rng.uniform()),
                        "robustness": float(rng.uniform())}
                       for a in config["evaluation"]["attacks"] for b in config["evaluation"]["budgets"]]
            db.record({"key": run_key(config), "config": config, "status": "ok", "error": None, "traceback": None,
                       "metrics": {"accuracy": accuracy, "nll": 0.4, "ece": 0.05, "members": 1, "attacks": attacks},
                       "versions": {}, "ensemble_bytes": None})
    return path


def test_report_of_a_store_holds_every_attack_and_budget(store, tmp_path, capsys):
    out = tmp_path / "sweep.html"
    assert main(["report", str(store), "--out", str(out)]) == 0
    assert f"wrote {out}" in capsys.readouterr().out
    state = read_report_state(out)
    assert state["kind"] == "sweep_store"
    assert [(e["attack"], e["budget"]) for e in state["entries"]] == [("fgsm-inf", 0.1), ("fgsm-inf", 0.2)]
    with RunStore(store, readonly=True) as db:
        frame = db.results()
    for entry in state["entries"]:
        expected = sweep_points(frame, None, entry["budget"], entry["attack"])
        assert entry["points"]["keys"] == expected.keys
        np.testing.assert_array_equal(entry["points"]["value"], expected.value)  # float64 JSON round trip: exact
    text = out.read_text(encoding="utf-8")
    assert "<link" not in text and "<script src" not in text and text.count("<svg") == 2


def test_report_default_path_and_errors(store, tmp_path, capsys):
    assert main(["report", str(store)]) == 0
    assert store.with_name("runs-report.html").is_file()
    assert main(["report", str(tmp_path / "nothing.sqlite")]) == 1
    assert "source must be an existing sweep store or notebook; got" in capsys.readouterr().err
    bad = tmp_path / "bad.sqlite"
    bad.write_bytes(b"not a database")
    assert main(["report", str(bad)]) == 1
    assert "is not a readable sweep store" in capsys.readouterr().err


def test_a_notebook_gets_a_message_that_says_what_a_report_needs(tmp_path, capsys):
    state = {"m1": {"model_name": "VBoxModel", "state": {"point": [0.5, 0.1], "budget": 0.2, "method": "pgd",
                                                         "norm": "inf", "steps": 40}},
             "m2": {"model_name": "LabelModel", "state": {"value": "x"}}}
    notebook = {"cells": [], "metadata": {"widgets": {"application/vnd.jupyter.widget-state+json": {
        "state": state, "version_major": 2, "version_minor": 0}}}, "nbformat": 4, "nbformat_minor": 5}
    path = tmp_path / "tour.ipynb"
    path.write_text(json.dumps(notebook), encoding="utf-8")
    assert notebook_explorers(notebook) == [{"point": [0.5, 0.1], "method": "pgd", "budget": 0.2, "norm": "inf",
                                             "steps": 40}]
    assert main(["report", str(path)]) == 1
    err = capsys.readouterr().err
    assert "a notebook does not hold the posteriors or the views a report draws" in err
    assert "holds the settings of 1 explorer(s)" in err and "explorer.report('finding.html')" in err


def test_the_command_imports_no_widget_library(store, tmp_path):
    code = ("import sys; from jostle.cli import main; "
            f"assert main(['report', {str(store)!r}, '--out', {str(tmp_path / 'r.html')!r}]) == 0; "
            "bad = [m for m in ('ipywidgets', 'traitlets', 'anywidget', 'bqplot', 'jostle.widgets') "
            "if m in sys.modules]; assert not bad, bad")
    subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, timeout=120)
