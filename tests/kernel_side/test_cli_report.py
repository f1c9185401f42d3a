"""``jostle report``: a store's charts as one offline HTML file; a notebook gets a message saying why not."""
from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import torch

import jostle
from jostle.cli import main
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


def _notebook(path, *sources):
    import nbformat

    notebook = nbformat.v4.new_notebook(cells=[nbformat.v4.new_code_cell(src) for src in sources])
    nbformat.write(notebook, str(path))
    return path


NOTEBOOK_CELLS = (
    "import jostle\nfrom jostle.widgets import Comparison, Explorer\n"
    "data = jostle.datasets.leak_alarm()\n"
    "hmc, point = jostle.demo_posterior('leak_alarm_hmc')[:20], jostle.demo_posterior('leak_alarm_map')",
    "ex = Explorer(hmc, data, point=(0.3, 0.2), budget=0.25, steps=8, grid=16)\nassert ex.wait(120)\nex",
    "gone = Explorer(point, data, grid=16)\ngone.close()  # closed: not reported",
    "both = Comparison([hmc, point], data, steps=8, grid=16)\nboth",
)


def test_a_notebook_is_run_and_each_open_explorer_reported(tmp_path, capsys):
    # The notebook runs in a fresh kernel (nbclient); every explorer it left open gets the
    # report its own report() writes, with the view that notebook computed.
    source = _notebook(tmp_path / "finding.ipynb", *NOTEBOOK_CELLS)
    out = tmp_path / "reports"
    assert main(["report", str(source), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    files = sorted(p.name for p in out.iterdir())
    assert files == ["finding-1-explorer.html", "finding-2-comparison.html"], files
    assert printed.count("wrote ") == 2
    explorer = read_report_state(out / files[0])
    assert explorer["kind"] == "explorer" and len(explorer["entries"]) == 1
    entry = explorer["entries"][0]
    assert entry["state"]["point"] == [0.3, 0.2] and entry["state"]["budget"] == 0.25 and entry["state"]["steps"] == 8
    assert "hmc posterior: 20 members" in entry["provenance"]["description"]
    # The reported predictive is the posterior's at that input, computed here in another process:
    # same float32 arithmetic on the same parameters, so agreement to float32 rounding (~1e-7, x10).
    expected = jostle.demo_posterior("leak_alarm_hmc")[:20].predict(torch.tensor([[0.3, 0.2]])).probs[0]
    np.testing.assert_allclose(entry["view"]["before"]["probs"], expected.numpy(), rtol=0, atol=1e-6)
    comparison = read_report_state(out / files[1])
    assert comparison["kind"] == "comparison" and len(comparison["entries"]) == 2


def test_a_notebook_that_fails_or_shows_nothing_says_so(tmp_path, capsys):
    broken = _notebook(tmp_path / "broken.ipynb", "x = 1", "raise RuntimeError('sensor feed offline')")
    assert main(["report", str(broken)]) == 1
    err = capsys.readouterr().err
    assert "running the notebook failed in cell 2" in err and "sensor feed offline" in err
    empty = _notebook(tmp_path / "empty.ipynb", "import jostle")
    assert main(["report", str(empty)]) == 1
    assert "ran but left no open jostle explorer to report" in capsys.readouterr().err
    not_a_notebook = tmp_path / "noise.ipynb"
    not_a_notebook.write_text("{ not json", encoding="utf-8")
    assert main(["report", str(not_a_notebook)]) == 1
    assert "is not a readable notebook" in capsys.readouterr().err


def test_the_command_imports_no_widget_library(store, tmp_path):
    code = ("import sys; from jostle.cli import main; "
            f"assert main(['report', {str(store)!r}, '--out', {str(tmp_path / 'r.html')!r}]) == 0; "
            "bad = [m for m in ('ipywidgets', 'traitlets', 'anywidget', 'bqplot', 'jostle.widgets') "
            "if m in sys.modules]; assert not bad, bad")
    subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, timeout=120)
