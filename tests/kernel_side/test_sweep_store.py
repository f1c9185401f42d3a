"""The SQLite run store: one row per key, failed runs replaced on retry, long and wide results."""
from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest

import jostle
from jostle.sweeps.results_db import RunStore, StoreError
from jostle.sweeps.spec import run_key

SWEEP = jostle.Sweep(datasets=[{"name": "moons", "n_test": 20}], methods=["map", "deep_ensemble"],
                     architectures=[{"depth": 1, "width": 4}], train_sizes=[20], seeds=[0],
                     evaluation={"budgets": [0.1, 0.3], "points": 5})


def _record(config, status="ok", accuracy=0.9, ensemble=None):
    metrics = None
    if status == "ok":
        metrics = {"accuracy": accuracy, "nll": 0.3, "ece": 0.05, "members": 1, "attacks": [
            {"attack": a["label"], "method": a["method"], "norm": a["norm"], "steps": a["steps"],
             "samples": a["samples"], "budget": b, "success_rate": b, "robustness": 1 - b}
            for a in config["evaluation"]["attacks"] for b in config["evaluation"]["budgets"]]}
    return {"key": run_key(config), "config": config, "status": status, "metrics": metrics,
            "error": None if status == "ok" else "ValueError: bad",
            "traceback": None if status == "ok" else "Traceback...",
            "fit_seconds": 0.1, "eval_seconds": 0.2, "started": 1.0, "finished": 2.0, "worker": "here:1",
            "versions": {"jostle": jostle.__version__}, "ensemble_bytes": ensemble}


def test_wal_mode_and_integrity(tmp_path):
    path = tmp_path / "runs.sqlite"
    with RunStore(path) as store:
        store.record(_record(SWEEP.runs()[0]))
        assert store.integrity_check() == "ok"
    # sqlite3 itself as the reference for the journal mode (persisted in the file for WAL)
    assert sqlite3.connect(path).execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_failed_run_is_replaced_not_duplicated(tmp_path):
    config = SWEEP.runs()[0]
    with RunStore(tmp_path / "runs.sqlite") as store:
        store.record(_record(config, status="failed"))
        assert store.statuses() == {run_key(config): "failed"}
        store.record(_record(config))
        rows = store.runs()
        assert len(rows) == 1 and rows[0]["status"] == "ok" and rows[0]["attempts"] == 2
        assert rows[0]["error"] is None
        count = store._db.execute("SELECT COUNT(*) FROM attack_results").fetchone()[0]
        assert count == 4  # 2 attacks x 2 budgets, once


def test_results_long_and_wide(tmp_path):
    with RunStore(tmp_path / "runs.sqlite") as store:
        for i, config in enumerate(SWEEP.runs()):
            store.record(_record(config, accuracy=0.8 + 0.1 * i))
        long = store.results()
        wide = store.results(wide=True)
    assert len(long) == 2 * 2 * 2 and len(wide) == 2
    assert set(long["family"]) == {"deterministic", "Bayesian"}
    assert {"success_rate[pgd-inf@0.3]", "robustness[fgsm-inf@0.1]"} <= set(wide.columns)
    row = wide.set_index("method").loc["deep_ensemble"]
    np.testing.assert_allclose(row["robustness[pgd-inf@0.3]"], 0.7)
    np.testing.assert_allclose(row["accuracy"], 0.9)


def test_failed_runs_only_on_request(tmp_path):
    configs = SWEEP.runs()
    with RunStore(tmp_path / "runs.sqlite") as store:
        store.record(_record(configs[0]))
        store.record(_record(configs[1], status="failed"))
        assert set(store.results()["status"]) == {"ok"}
        shown = store.results(include_failed=True, wide=True)
    assert shown.set_index("status").loc["failed", "error"] == "ValueError: bad"


def test_ensemble_saved_beside_the_store(tmp_path):
    config = SWEEP.runs()[0]
    path = tmp_path / "runs.sqlite"
    with RunStore(path) as store:
        store.record(_record(config, ensemble=b"payload"))
        saved = store.ensemble_file(run_key(config))
    assert saved == tmp_path / "runs.ensembles" / f"{run_key(config)}.safetensors"
    assert saved.read_bytes() == b"payload"


def test_config_is_stored_as_canonical_json(tmp_path):
    config = SWEEP.runs()[1]
    with RunStore(tmp_path / "runs.sqlite") as store:
        store.record(_record(config))
        text = store._db.execute("SELECT config FROM runs").fetchone()[0]
    assert json.loads(text) == config
    assert text == json.dumps(config, sort_keys=True, separators=(",", ":"))


def test_foreign_files_are_refused(tmp_path):
    junk = tmp_path / "junk.sqlite"
    junk.write_bytes(b"not a database at all, just some bytes" * 10)
    with pytest.raises(StoreError, match=r"junk\.sqlite is not a jostle run store"):
        RunStore(junk)
    with pytest.raises(FileNotFoundError, match=r"store does not exist: .*missing\.sqlite"):
        RunStore(tmp_path / "missing.sqlite", readonly=True)
    other = tmp_path / "other.sqlite"
    sqlite3.connect(other).execute("CREATE TABLE t (x)")
    with pytest.raises(StoreError, match=r"other\.sqlite is not a jostle run store"):
        RunStore(other, readonly=True)
