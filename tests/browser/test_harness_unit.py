"""The harness's own rules, checked without a browser: skip or fail, ports, notebooks, stopping."""
from __future__ import annotations

import os
import socket
import subprocess
import sys
import time

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
