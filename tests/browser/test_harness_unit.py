"""The harness's own rules, checked without a browser: skip or fail, ports, notebooks, stopping."""
from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from . import harness


def test_missing_chromium_skips_on_a_developer_machine(monkeypatch, tmp_path):
    monkeypatch.setattr(harness, "CHROMIUM", tmp_path / "no-chromium")
    monkeypatch.delenv("CI", raising=False)
    with pytest.raises(pytest.skip.Exception, match=r"headless Chromium is not installed at .*no-chromium"):
        harness.require_chromium()


def test_missing_chromium_fails_in_ci(monkeypatch, tmp_path):
    monkeypatch.setattr(harness, "CHROMIUM", tmp_path / "no-chromium")
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match=r"\.ci/run should have installed it"):
        harness.require_chromium()


def test_free_port_is_bindable_on_localhost():
    port = harness.free_port()
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", port))


def test_written_notebook_is_v4_and_names_the_kernel(tmp_path):
    import json

    # write_notebook validates against the nbformat schema before writing.
    path = harness.write_notebook(tmp_path / "nb.ipynb", [("markdown", "# title"), "1 + 1"])
    nb = json.loads(path.read_text(encoding="utf-8"))
    assert nb["nbformat"] == 4
    assert nb["metadata"]["kernelspec"]["name"] == harness.KERNEL_NAME
    assert [c["cell_type"] for c in nb["cells"]] == ["markdown", "code"]


def test_kernelspec_of_the_test_environment_runs_this_python(tmp_path):
    import json

    env = harness.jupyter_environment(tmp_path)
    spec = json.loads((tmp_path / "data" / "kernels" / harness.KERNEL_NAME / "kernel.json").read_text())
    assert spec["argv"][0] == sys.executable
    assert env["JUPYTER_PATH"] == str(tmp_path / "data")


def test_stopping_a_server_ends_its_whole_process_group():
    # A parent that ignores SIGTERM and leaves a child behind: both must be gone afterwards.
    script = "import signal, subprocess, time; signal.signal(signal.SIGTERM, signal.SIG_IGN); " \
             "subprocess.Popen(['sleep', '120']); time.sleep(120)"
    process = subprocess.Popen([sys.executable, "-c", script], start_new_session=True)
    time.sleep(0.5)
    pgid = os.getpgid(process.pid)
    harness.stop_process_group(process, timeout=1.0)
    assert process.poll() is not None
    with pytest.raises(ProcessLookupError):
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline:
            os.killpg(pgid, 0)  # raises once no process of the group is left
            time.sleep(0.1)


def test_a_server_outlives_no_killed_test_process(tmp_path):
    # A stand-in for the test process starts a long "server" the harness's way, then is
    # killed outright (no teardown runs); the server must get SIGTERM and end.
    pid_file = tmp_path / "server.pid"
    script = (
        "import subprocess, sys, time; sys.path.insert(0, sys.argv[1]); "
        "from tests.browser.harness import stop_with_parent; "
        "p = subprocess.Popen(['sleep', '120'], start_new_session=True, preexec_fn=stop_with_parent); "
        "open(sys.argv[2], 'w').write(str(p.pid)); time.sleep(120)"
    )
    runner = subprocess.Popen([sys.executable, "-c", script, str(harness.REPO_ROOT), str(pid_file)])
    deadline = time.monotonic() + 30
    while not pid_file.exists() or not pid_file.read_text():
        assert time.monotonic() < deadline, "the stand-in never started its server"
        time.sleep(0.1)
    server_pid = int(pid_file.read_text())
    runner.kill()
    runner.wait(10)
    deadline = time.monotonic() + 10
    while _alive(server_pid) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not _alive(server_pid), "the server outlived the killed test process"


def _alive(pid: int) -> bool:
    try:
        state = (Path("/proc") / str(pid) / "stat").read_text().split(")")[-1].split()[0]
    except OSError:
        return False
    return state != "Z"  # a zombie has exited and waits to be reaped
