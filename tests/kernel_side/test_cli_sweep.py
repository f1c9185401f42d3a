"""`jostle fit`, `jostle sweep run/show` and `jostle inspect`, driven through a subprocess."""
from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

import jostle
from jostle.sweeps.results_db import RunStore, StoreError

FIT = """
seed = 1
[data]
name = "moons"
n_train = 40
n_test = 40
[architecture]
depth = 1
width = 8
[method]
name = "deep_ensemble"
members = 2
epochs = 3
"""

SWEEP = """
[sweep]
name = "cli"
seeds = [0, 1]
train_sizes = [40]
[[sweep.datasets]]
name = "moons"
n_test = 40
[[sweep.architectures]]
depth = 1
width = 8
[[sweep.methods]]
name = "map"
epochs = 2
lr = -1.0
[[sweep.methods]]
name = "map"
epochs = {epochs}
[sweep.evaluation]
budgets = [0.1, 0.2]
points = 10
[[sweep.evaluation.attacks]]
method = "fgsm"
[[sweep.evaluation.attacks]]
method = "pgd"
steps = 3
"""


def jostle_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "jostle.cli", *args], cwd=cwd, capture_output=True,
                          text=True, timeout=240, env={**os.environ, "OMP_NUM_THREADS": "1"})


def in_process(argv: list[str], capsys, cwd: Path, monkeypatch) -> subprocess.CompletedProcess:
    """The same entry point in this process (no interpreter start-up), for the many error cases."""
    from jostle.cli.commands import main

    monkeypatch.chdir(cwd)
    try:
        code = main(argv)
    except SystemExit as exit_:  # argparse's --help and usage errors
        code = exit_.code
    out, err = capsys.readouterr()
    return subprocess.CompletedProcess(argv, code, out, err)


def one_line_error(result: subprocess.CompletedProcess) -> str:
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    return lines[0]


def test_help_everywhere(tmp_path, capsys, monkeypatch):
    assert "sweep" in jostle_cli("--help", cwd=tmp_path).stdout
    for args in (["fit"], ["sweep"], ["sweep", "run"], ["sweep", "show"], ["inspect"]):
        result = in_process([*args, "--help"], capsys, tmp_path, monkeypatch)
        assert result.returncode == 0 and "usage: jostle" in result.stdout, args
    assert "--save-ensembles" in in_process(["sweep", "run", "--help"], capsys, tmp_path, monkeypatch).stdout


def test_fit_then_inspect(tmp_path):
    (tmp_path / "fit.toml").write_text(FIT)
    result = jostle_cli("fit", "fit.toml", "--out", "post.safetensors", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "wrote post.safetensors: 2 member(s), method deep_ensemble" in result.stdout
    ens = jostle.load(tmp_path / "post.safetensors")
    assert len(ens) == 2 and ens.meta["run"]["config"]["seed"] == 1
    shown = jostle_cli("inspect", "post.safetensors", cwd=tmp_path)
    assert shown.returncode == 0, shown.stderr
    assert "members: 2" in shown.stdout and 'method: "deep_ensemble"' in shown.stdout
    assert "diagnostics:" in shown.stdout


@pytest.mark.parametrize("text, message", [
    (FIT.replace("width = 8", "width = 8\nheight = 3"), r"fit\.toml\.architecture: unknown key 'height'"),
    (FIT.replace("depth = 1", "depth = -1"), r"fit\.toml\.architecture\.depth: must be an integer >= 0; got -1"),
    (FIT.replace('name = "deep_ensemble"', 'name = "mcmc"'), r"fit\.toml\.method: unknown method 'mcmc'"),
    ("seed = [\n", r"fit\.toml is not valid TOML"),
])
def test_fit_refuses_bad_configs_in_one_line(tmp_path, text, message, capsys, monkeypatch):
    (tmp_path / "fit.toml").write_text(text)
    result = in_process(["fit", "fit.toml", "--out", "post.safetensors"], capsys, tmp_path, monkeypatch)
    assert result.returncode == 1
    assert __import__("re").search(r"^jostle fit: " + message, one_line_error(result))
    assert not (tmp_path / "post.safetensors").exists()


def test_bad_config_through_a_subprocess(tmp_path):
    (tmp_path / "fit.toml").write_text(FIT.replace("width = 8", "width = 8\nheight = 3"))
    result = jostle_cli("fit", "fit.toml", "--out", "post.safetensors", cwd=tmp_path)
    assert result.returncode == 1 and result.stdout == ""
    assert one_line_error(result).startswith("jostle fit: fit.toml.architecture: unknown key 'height'")
    missing = jostle_cli("sweep", "run", "nowhere.toml", "--store", "s.sqlite", cwd=tmp_path)
    assert missing.returncode == 1
    assert one_line_error(missing) == "jostle sweep run: config file does not exist: nowhere.toml"


def test_bad_arguments_fail_in_one_line(tmp_path, capsys, monkeypatch):
    def cli(*argv):
        return in_process(list(argv), capsys, tmp_path, monkeypatch)

    missing = cli("fit", "nowhere.toml", "--out", "p.safetensors")
    assert missing.returncode == 1 and one_line_error(missing) == "jostle fit: config file does not exist: nowhere.toml"
    (tmp_path / "fit.toml").write_text(FIT)
    suffix = cli("fit", "fit.toml", "--out", "post.pt")
    assert one_line_error(suffix) == "jostle fit: --out must end in .safetensors; got 'post.pt'"
    nothing = cli("inspect", "nothing.safetensors")
    assert nothing.returncode == 1 and "path does not exist" in one_line_error(nothing)
    (tmp_path / "junk.safetensors").write_bytes(b"\x80\x04junk")  # pickle protocol 4 opening bytes
    junk = cli("inspect", "junk.safetensors")
    assert junk.returncode == 1 and "never unpickles" in one_line_error(junk)
    store = cli("sweep", "show", "nowhere.sqlite")
    assert store.returncode == 1 and one_line_error(store) == "jostle sweep show: store does not exist: nowhere.sqlite"
    (tmp_path / "bad.toml").write_text(SWEEP.format(epochs=2).replace('name = "map"', 'name = "mcmc"', 1))
    bad = cli("sweep", "run", "bad.toml", "--store", "s.sqlite")
    assert bad.returncode == 1
    assert one_line_error(bad).startswith("jostle sweep run: sweep.methods[0]: unknown method 'mcmc'")
    no_action = cli("sweep")
    assert no_action.returncode == 1
    assert no_action.stderr.strip().endswith("jostle sweep: choose an action: run or show")
    wrong_kind = cli("sweep", "run", "fit.toml", "--store", "s.sqlite")
    assert one_line_error(wrong_kind).startswith("jostle sweep run: unknown key 'seed' at the top")
    no_out = cli("fit", "fit.toml")
    assert no_out.returncode == 2 and "--out" in no_out.stderr  # argparse usage error


def test_sweep_run_and_show(tmp_path, capsys, monkeypatch):
    (tmp_path / "sweep.toml").write_text(SWEEP.format(epochs=2))
    result = jostle_cli("sweep", "run", "sweep.toml", "--store", "runs.sqlite", "--save-ensembles", "--quiet",
                        cwd=tmp_path)
    assert result.returncode == 3, result.stderr  # some runs failed: lr = -1 is refused on purpose
    assert "cli: 4 runs, 0 already stored, 2 finished, 2 failed -> runs.sqlite" in result.stdout
    again = in_process(["sweep", "run", "sweep.toml", "--store", "runs.sqlite", "--skip-failed", "--quiet"],
                       capsys, tmp_path, monkeypatch)
    assert again.returncode == 0 and "4 already stored, 0 finished, 0 failed" in again.stdout
    shown = jostle_cli("sweep", "show", "runs.sqlite", cwd=tmp_path)
    assert shown.returncode == 0, shown.stderr
    assert "cells: attack success rate / softmax robustness" in shown.stdout
    assert "all runs: dataset moons, n_train 40, depth 1, width 8, activation tanh" in shown.stdout
    lines = [line.split() for line in shown.stdout.splitlines()]
    header = next(line for line in lines if line[:2] == ["key", "method"])
    assert header[-2:] == ["eps=0.1", "eps=0.2"]
    assert sum(1 for line in lines if "pgd-inf" in line) == 2 and "2 finished run(s), 2 failed" in shown.stdout
    failed = in_process(["sweep", "show", "runs.sqlite", "--failed"], capsys, tmp_path, monkeypatch)
    assert "lr" in failed.stdout and "2 failed run(s)" in failed.stdout
    assert len(list((tmp_path / "runs.ensembles").glob("*.safetensors"))) == 2


def test_unreachable_scheduler(tmp_path, capsys, monkeypatch):
    (tmp_path / "sweep.toml").write_text(SWEEP.format(epochs=2))
    result = in_process(["sweep", "run", "sweep.toml", "--store", "runs.sqlite", "--scheduler", "tcp://127.0.0.1:9",
                         "--connect-timeout", "1"], capsys, tmp_path, monkeypatch)
    assert result.returncode == 1
    assert one_line_error(result).startswith("jostle sweep run: cannot reach the scheduler at tcp://127.0.0.1:9")


@pytest.mark.slow
def test_sigint_then_rerun_executes_only_the_missing_runs(tmp_path):
    # 3,000 epochs make each good run about 2 s here (400 made it 0.5 s): after the first one is
    # stored, the three left take several seconds, so the interrupt lands mid-sweep even when
    # this poller is starved for a second or two on a loaded machine (at 400 the whole sweep
    # once finished, exit code 3, before the signal arrived).
    (tmp_path / "sweep.toml").write_text(SWEEP.format(epochs=3000).replace("seeds = [0, 1]", "seeds = [0, 1, 2, 3]"))
    command = [sys.executable, "-m", "jostle.cli", "sweep", "run", "sweep.toml", "--store", "runs.sqlite", "--quiet"]
    process = subprocess.Popen(command, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.time() + 120
    stored = 0
    while time.time() < deadline and stored < 5:  # the 4 failing runs come first and are quick
        time.sleep(0.2)
        if (tmp_path / "runs.sqlite").exists():
            try:
                with RunStore(tmp_path / "runs.sqlite", readonly=True) as db:
                    stored = len(db.statuses())
            except StoreError:  # the writer has created the file but not yet its tables
                pass
    assert process.poll() is None, f"the sweep ended before the interrupt (exit {process.returncode}, {stored} stored)"
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=60)
    assert process.returncode == 130 and err.strip().endswith("jostle sweep run: interrupted")
    with RunStore(tmp_path / "runs.sqlite", readonly=True) as db:
        before = db.statuses()
    assert 5 <= len(before) < 8
    assert sqlite3.connect(tmp_path / "runs.sqlite").execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    rerun = jostle_cli("sweep", "run", "sweep.toml", "--store", "runs.sqlite", "--skip-failed", "--quiet", cwd=tmp_path)
    assert f"8 runs, {len(before)} already stored, {8 - len(before)} finished" in rerun.stdout


def test_inspect_lists_recorded_diagnostics(tmp_path, capsys, monkeypatch):
    data = jostle.datasets.moons(n_train=20, n_test=10)
    ens = jostle.fit_map(jostle.mlp(2, 2, hidden=(4,)), data, epochs=1, progress=False)
    ens.save(str(tmp_path / "post.safetensors"), extra_meta={"diagnostics": {"divergences": 0, "rhat_max": 1.004}})
    result = in_process(["inspect", "post.safetensors"], capsys, tmp_path, monkeypatch)
    assert result.returncode == 0
    lines = result.stdout.splitlines()
    assert "diagnostics:" in lines and "  divergences: 0" in lines and "  rhat_max: 1.004" in lines
