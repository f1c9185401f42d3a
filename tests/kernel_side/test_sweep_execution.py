"""Sweeps end to end: in-process against a Dask LocalCluster, worker kills, interrupts, failures."""
from __future__ import annotations

import logging
import os
import signal
import sqlite3

import numpy as np
import pytest

import jostle
from jostle.sweeps.results_db import RunStore

distributed = pytest.importorskip("distributed")

TINY = dict(
    datasets=[{"name": "moons", "n_test": 40, "noise": 0.2}],
    methods=[{"name": "map", "epochs": 3, "batch_size": 20},
             {"name": "deep_ensemble", "members": 2, "epochs": 3, "batch_size": 20}],
    architectures=[{"depth": 1, "width": 8}],
    train_sizes=[40],
    seeds=[0, 1],
    evaluation={"budgets": [0.1, 0.3], "points": 20,
                "attacks": [{"method": "fgsm"}, {"method": "pgd", "steps": 5}]},
    name="tiny",
)
METRICS = ["accuracy", "nll", "ece", "success_rate", "robustness"]


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1,
                                       dashboard_address=":0", silence_logs=logging.ERROR)
    with cluster, distributed.Client(cluster) as c:
        yield c


def _sorted(frame):
    return frame.sort_values(["key", "attack", "budget"]).reset_index(drop=True)


def _integrity(path) -> str:
    # sqlite3's own PRAGMA integrity_check, through a fresh connection
    return sqlite3.connect(path).execute("PRAGMA integrity_check").fetchone()[0]


@pytest.fixture(scope="module")
def in_process(tmp_path_factory):
    path = tmp_path_factory.mktemp("local") / "runs.sqlite"
    sweep = jostle.Sweep(**TINY)
    summary = sweep.run(store=path)  # with the tqdm bar, as a user would see it
    return sweep, path, summary


def test_in_process_runs_every_run_once(in_process):
    sweep, path, summary = in_process
    assert (summary.total, summary.finished, summary.failed, summary.skipped) == (4, 4, 0, 0)
    frame = sweep.results()
    assert len(frame) == 4 * 2 * 2  # runs x attacks x budgets
    assert frame.groupby("key").size().eq(4).all()
    assert set(frame["family"]) == {"deterministic", "Bayesian"}
    assert frame[METRICS].notna().all().all()
    assert _integrity(path) == "ok"


def test_cluster_gives_the_same_rows(in_process, client, tmp_path):
    sweep, _, _ = in_process
    summary = jostle.Sweep(**TINY).run(store=tmp_path / "runs.sqlite", client=client, progress_bar=False)
    assert (summary.finished, summary.failed) == (4, 0)
    local = _sorted(sweep.results())
    remote = _sorted(jostle.Sweep(**TINY).results(store=tmp_path / "runs.sqlite"))
    columns = ["key", "attack", "budget", "seed", "method"]
    assert local[columns].equals(remote[columns])
    np.testing.assert_allclose(remote[METRICS].to_numpy(float), local[METRICS].to_numpy(float), atol=1e-6, rtol=0)
    with RunStore(tmp_path / "runs.sqlite", readonly=True) as db:
        workers = {r["worker"] for r in db.runs()}
        versions = db.runs()[0]["versions"]
    assert all(int(w.split(":")[1]) != os.getpid() for w in workers)  # really ran elsewhere
    assert set(versions) == {"jostle", "torch", "numpy", "python"}
    assert _integrity(tmp_path / "runs.sqlite") == "ok"


def test_rerun_skips_stored_runs(in_process):
    sweep, path, _ = in_process
    seen = []
    summary = sweep.run(store=path, progress=lambda record, s: seen.append(record), progress_bar=False)
    assert (summary.skipped, summary.finished, seen) == (4, 0, [])


@pytest.mark.parametrize("where", ["in_process", "cluster"])
def test_interrupted_sweep_resumes_with_only_the_missing_runs(where, client, tmp_path):
    path = tmp_path / "runs.sqlite"
    use = client if where == "cluster" else None
    done = []

    def stop_after_two(record, summary):
        done.append(record["key"])
        if len(done) == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        jostle.Sweep(**TINY).run(store=path, client=use, progress=stop_after_two, progress_bar=False)
    assert _integrity(path) == "ok"
    with RunStore(path, readonly=True) as db:
        assert set(db.statuses()) == set(done)
    again = []
    summary = jostle.Sweep(**TINY).run(store=path, client=use, progress=lambda r, s: again.append(r["key"]),
                                       progress_bar=False)
    keys = jostle.Sweep(**TINY).keys()
    assert summary.skipped == 2 and sorted(again) == sorted(set(keys) - set(done))
    with RunStore(path, readonly=True) as db:
        rows = db.runs()
    assert sorted(r["key"] for r in rows) == sorted(keys) and all(r["attempts"] == 1 for r in rows)
    assert _integrity(path) == "ok"


def test_failing_run_is_stored_and_the_sweep_completes(client, tmp_path):
    path = tmp_path / "runs.sqlite"
    spec = dict(TINY, methods=TINY["methods"] + [{"name": "map", "epochs": 3, "lr": -1.0}])  # lr < 0 is refused
    sweep = jostle.Sweep(**spec)
    summary = sweep.run(store=path, client=client, progress_bar=False)
    assert (summary.total, summary.finished, summary.failed) == (6, 4, 2)
    with RunStore(path, readonly=True) as db:
        failed = [r for r in db.runs() if r["status"] == "failed"]
    assert len(failed) == 2
    assert all(r["config"]["method"].get("lr") == -1.0 for r in failed)
    assert all("lr" in r["error"] and "Traceback" in r["traceback"] for r in failed)
    kept = sweep.run(store=path, retry_failed=False, progress_bar=False)
    assert (kept.skipped, kept.failed) == (6, 0)
    retried = sweep.run(store=path, progress_bar=False)
    assert (retried.skipped, retried.failed) == (4, 2)
    with RunStore(path, readonly=True) as db:
        rows = db.runs()
    assert len(rows) == 6 and sorted(r["attempts"] for r in rows) == [1] * 4 + [2] * 2
    assert len(sweep.results(include_failed=True)) == 4 * 4 + 2
    assert _integrity(path) == "ok"


def test_saved_ensembles_reload_with_the_same_predictions(tmp_path):
    path = tmp_path / "runs.sqlite"
    spec = dict(TINY, methods=TINY["methods"][1:], seeds=[0])
    sweep = jostle.Sweep(**spec)
    sweep.run(store=path, save_ensembles=True, progress_bar=False)
    key = sweep.keys()[0]
    with RunStore(path, readonly=True) as db:
        saved = db.ensemble_file(key)
        accuracy = db.runs()[0]["accuracy"]
    assert saved == path.parent / "runs.ensembles" / f"{key}.safetensors"
    ens = jostle.load(saved)
    assert len(ens) == 2 and ens.meta["run"]["key"] == key
    data = jostle.datasets.moons(n_train=40, n_test=40, noise=0.2, seed=0)
    assert jostle.metrics.accuracy(ens.predict(data.x_test), data.y_test) == pytest.approx(accuracy, abs=1e-12)



def test_asking_for_saved_ensembles_later_runs_the_stored_runs_again(tmp_path):
    # Stored without ensembles, then asked to save them: each run is fitted again (the
    # same seeded run, so the same metrics) and its ensemble written; a third call skips.
    path = tmp_path / "runs.sqlite"
    sweep = jostle.Sweep(**dict(TINY, methods=TINY["methods"][:1]))
    first = sweep.run(store=path, progress_bar=False)
    assert first.finished == 2
    with RunStore(path, readonly=True) as db:
        before = {r["key"]: r["accuracy"] for r in db.runs()}
        assert all(db.ensemble_file(k) is None for k in before)
    second = sweep.run(store=path, save_ensembles=True, progress_bar=False)
    assert (second.skipped, second.finished) == (0, 2)
    with RunStore(path, readonly=True) as db:
        for run in db.runs():
            assert run["accuracy"] == before[run["key"]] and run["attempts"] == 2
            assert db.ensemble_file(run["key"]).exists()
    third = sweep.run(store=path, save_ensembles=True, progress_bar=False)
    assert (third.skipped, third.finished) == (2, 0)
    # a saved file that went missing is made again
    with RunStore(path, readonly=True) as db:
        db.ensemble_file(sweep.keys()[0]).unlink()
    fourth = sweep.run(store=path, save_ensembles=True, progress_bar=False)
    assert (fourth.skipped, fourth.finished) == (1, 1)

@pytest.mark.slow
def test_killing_a_worker_mid_sweep_loses_no_run(client, tmp_path):
    path = tmp_path / "runs.sqlite"
    spec = dict(TINY, seeds=[0, 1, 2, 3], methods=[dict(m, epochs=30) for m in TINY["methods"]])
    pids = client.run(os.getpid)
    killed = {}

    def kill_a_busy_worker(record, summary):
        if killed:
            return
        busy = [address for address, keys in client.processing().items() if keys]
        if busy:
            killed[busy[0]] = client.processing()[busy[0]]
            os.kill(pids[busy[0]], signal.SIGKILL)

    seen = []
    summary = jostle.Sweep(**spec).run(
        store=path, client=client, progress_bar=False,
        progress=lambda r, s: (seen.append(r["key"]), kill_a_busy_worker(r, s)),
    )
    assert killed, "no worker was busy when the first run finished"
    assert (summary.finished, summary.failed) == (8, 0)
    assert sorted(seen) == sorted(jostle.Sweep(**spec).keys())  # each run committed exactly once
    with RunStore(path, readonly=True) as db:
        rows = db.runs()
    assert len(rows) == 8 and all(r["status"] == "ok" and r["attempts"] == 1 for r in rows)
    assert _integrity(path) == "ok"
    client.wait_for_workers(2, timeout=60)


# The smallest settings of each method that still fit something (few epochs, few draws).
TINY_SETTINGS = {
    "map": {"epochs": 2},
    "deep_ensemble": {"members": 2, "epochs": 2},
    "dropout": {"p": 0.1, "samples": 4, "epochs": 2},
    "vi": {"samples": 4, "epochs": 2},
    "laplace": {"samples": 4, "epochs": 2},
    "hmc": {"samples": 4, "chains": 2, "warmup": 20, "map_steps": 20},
}


@pytest.mark.parametrize("method", list(TINY_SETTINGS))
def test_every_method_runs_through_a_sweep(method, tmp_path):
    import inspect

    from jostle.sweeps.spec import METHODS

    # a method the sweep configuration names but jostle does not export is a failure, not a skip
    fit = getattr(jostle, METHODS[method], None)
    assert fit is not None, f"jostle.{METHODS[method]} is missing: the sweep names {method!r}"
    accepted = inspect.signature(fit).parameters
    settings = {k: v for k, v in TINY_SETTINGS[method].items() if k in accepted}
    sweep = jostle.Sweep(**dict(TINY, methods=[{"name": method, **settings}], seeds=[0]))
    summary = sweep.run(store=tmp_path / "runs.sqlite", progress_bar=False)
    with RunStore(tmp_path / "runs.sqlite", readonly=True) as db:
        run = db.runs()[0]
    assert summary.finished == 1, run["traceback"]
    expected_members = {"map": 1, "deep_ensemble": 2}.get(method, 4)
    if method != "hmc":  # how HMC counts draws over chains is its own business
        assert run["metrics"]["members"] == expected_members
    else:  # so few draws cannot pass the convergence checks; the warning is kept with the run
        assert any(w.startswith("ConvergenceWarning") for w in run["warnings"])
        assert run["metrics"]["diagnostics"]["problems"]
    frame = sweep.results()
    assert frame["family"].eq("deterministic" if method == "map" else "Bayesian").all()
    assert frame["robustness"].between(0, 1).all() and frame["success_rate"].between(0, 1).all()


def test_command_line_sends_runs_to_a_scheduler(in_process, client, tmp_path, monkeypatch, capsys):
    from jostle.cli.commands import main

    sweep, _, _ = in_process
    (tmp_path / "sweep.toml").write_text(SWEEP_TOML)
    monkeypatch.chdir(tmp_path)
    code = main(["sweep", "run", "sweep.toml", "--store", "remote.sqlite", "--quiet",
                 "--scheduler", client.scheduler.address])
    assert code == 0, capsys.readouterr().err
    assert "tiny: 4 runs, 0 already stored, 4 finished, 0 failed" in capsys.readouterr().out
    remote = _sorted(jostle.Sweep.from_toml(tmp_path / "sweep.toml").results(store=tmp_path / "remote.sqlite"))
    local = _sorted(sweep.results())
    assert remote["key"].tolist() == local["key"].tolist()  # the TOML names the same runs
    np.testing.assert_allclose(remote[METRICS].to_numpy(float), local[METRICS].to_numpy(float), atol=1e-6, rtol=0)
    with RunStore(tmp_path / "remote.sqlite", readonly=True) as db:
        assert all(int(r["worker"].split(":")[1]) != os.getpid() for r in db.runs())


# TINY as a TOML file
SWEEP_TOML = """
[sweep]
name = "tiny"
seeds = [0, 1]
train_sizes = [40]
[[sweep.datasets]]
name = "moons"
n_test = 40
noise = 0.2
[[sweep.architectures]]
depth = 1
width = 8
[[sweep.methods]]
name = "map"
epochs = 3
batch_size = 20
[[sweep.methods]]
name = "deep_ensemble"
members = 2
epochs = 3
batch_size = 20
[sweep.evaluation]
budgets = [0.1, 0.3]
points = 20
[[sweep.evaluation.attacks]]
method = "fgsm"
[[sweep.evaluation.attacks]]
method = "pgd"
steps = 5
"""


def test_the_demo_leak_alarm_data_runs_through_a_sweep(tmp_path):
    # The scenario's data set is a sweep data set like the others; its rows carry its name
    # and the run's data are jostle.datasets.leak_alarm with the same arguments.
    from jostle.sweeps.one_run import load_run_data

    sweep = jostle.Sweep(**dict(TINY, datasets=[{"name": "leak_alarm", "n_test": 40}], seeds=[0]))
    run = sweep.runs()[0]
    assert run["data"] == {"name": "leak_alarm", "n_train": 40, "n_test": 40, "noise": 0.2, "seed": 0}
    direct = jostle.datasets.leak_alarm(n_train=40, n_test=40)
    loaded = load_run_data(run["data"])
    assert np.array_equal(loaded.x_train.numpy(), direct.x_train.numpy()) and loaded.classes == ["steady", "leak"]
    summary = sweep.run(store=tmp_path / "runs.sqlite", progress_bar=False)
    assert summary.finished == 2
    assert set(sweep.results()["dataset"]) == {"leak_alarm"}
