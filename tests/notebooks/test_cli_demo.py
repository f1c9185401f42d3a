"""``jostle demo`` and ``jostle present``: copying the tour, serving it, stopping cleanly.

The servers run as real subprocesses through the installed ``jostle`` entry point and are
checked over HTTP on 127.0.0.1; ``present`` is checked in headless Chromium in
tests/browser/test_cli_present_browser.py (beside the session's one browser).
"""
from __future__ import annotations

import json
import re
import signal
import socket
import sys
import time
from importlib import resources
from pathlib import Path

import pytest

import jostle.cli
from jostle.cli.demo import FIRST_TOUR, copy_demo_notebooks
from tests.browser.harness import START_TIMEOUT_S, JostleCommand, free_port, port_closed, wait_for_http, write_notebook


def _shipped(name: str) -> bytes:
    return resources.files("jostle.demo_notebooks").joinpath(name).read_bytes()


# ---------------------------------------------------------------------------- copying
def test_copy_fills_an_empty_folder_with_the_shipped_files(tmp_path):
    report = copy_demo_notebooks(tmp_path / "work")
    assert FIRST_TOUR in report.copied
    assert report.kept_edited == [] and report.unchanged == []
    assert (tmp_path / "work" / FIRST_TOUR).read_bytes() == _shipped(FIRST_TOUR)
    assert not any(p.name.startswith(("__", ".")) for p in (tmp_path / "work").rglob("*"))


def test_copy_never_overwrites_and_restores_only_missing_files(tmp_path):
    copy_demo_notebooks(tmp_path)
    again = copy_demo_notebooks(tmp_path)
    assert again.copied == [] and FIRST_TOUR in again.unchanged

    edited = tmp_path / FIRST_TOUR
    edited.write_text('{"my": "edits"}', encoding="utf-8")
    report = copy_demo_notebooks(tmp_path)
    assert report.kept_edited == [FIRST_TOUR]
    assert edited.read_text(encoding="utf-8") == '{"my": "edits"}'
    assert any("kept your edited copy of 01_first_tour.ipynb" in line for line in report.lines())

    edited.unlink()
    assert FIRST_TOUR in copy_demo_notebooks(tmp_path).copied
    assert edited.read_bytes() == _shipped(FIRST_TOUR)


def test_shipped_first_tour_is_a_valid_notebook_with_a_kernelspec():
    import nbformat

    nb = nbformat.reads(_shipped(FIRST_TOUR).decode("utf-8"), as_version=4)
    nbformat.validate(nb)
    # Without kernelspec metadata JupyterLab opens a kernel-choice dialog first.
    assert nb.metadata["kernelspec"]["name"] == "python3"


# ---------------------------------------------------------------------------- user errors
@pytest.mark.parametrize("argv, message", [
    (["demo", "--port", "0"], r"jostle demo: --port must be an integer in \[1, 65535\]; got 0"),
    (["demo", "--port", "70000"], r"--port must be an integer in \[1, 65535\]; got 70000"),
    (["present", "missing.ipynb"], r"jostle present: NOTEBOOK must be an existing \.ipynb file; got 'missing\.ipynb'"),
])
def test_bad_arguments_end_as_one_line_and_exit_code_1(argv, message, capsys):
    assert jostle.cli.main(argv) == 1
    assert re.search(message, capsys.readouterr().err)


def test_demo_refuses_a_dir_that_is_a_file(tmp_path, capsys):
    blocker = tmp_path / "taken"
    blocker.write_text("x")
    assert jostle.cli.main(["demo", "--dir", str(blocker), "--port", str(free_port())]) == 1
    assert re.search(r"--dir must be a folder; got '.*taken', which is a file", capsys.readouterr().err)


def test_port_in_use_is_refused(tmp_path, capsys):
    notebook = write_notebook(tmp_path / "shown.ipynb", ["1 + 1"])
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        assert jostle.cli.main(["present", str(notebook), "--port", str(port), "--no-browser"]) == 1
    assert f"--port {port} is already in use on 127.0.0.1; choose another" in capsys.readouterr().err


# ---------------------------------------------------------------------------- live servers
def _start_kernel_for(url: str, token: str, path: str) -> None:
    import urllib.request

    body = json.dumps({"path": path, "type": "notebook", "kernel": {"name": "python3"}}).encode()
    request = urllib.request.Request(f"{url}/api/sessions?token={token}", data=body, method="POST",
                                     headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=30) as response:
        assert response.status == 201


@pytest.mark.slow
def test_demo_serves_the_first_tour_and_stops_cleanly_on_sigint(tmp_path):
    port = free_port()
    work = tmp_path / "demo"
    cli = JostleCommand(["demo", "--no-browser", "--port", str(port), "--dir", str(work)], tmp_path)
    try:
        opened = cli.wait_for_line(rf"open (http://127\.0\.0\.1:{port})/lab/tree/{FIRST_TOUR}\?token=([0-9a-f]+)")
        url, token = opened.group(1), opened.group(2)
        wait_for_http(f"{url}/api/status?token={token}", START_TIMEOUT_S, cli.process, "jostle demo", cli.log)
        page_html = wait_for_http(f"{url}/lab/tree/{FIRST_TOUR}?token={token}", 30, cli.process, "jostle demo")
        assert "JupyterLab" in page_html
        contents = wait_for_http(f"{url}/api/contents/{FIRST_TOUR}?token={token}", 30, cli.process, "jostle demo")
        assert '"type": "notebook"' in contents or '"type":"notebook"' in contents
        assert (work / FIRST_TOUR).read_bytes() == _shipped(FIRST_TOUR)

        _start_kernel_for(url, token, FIRST_TOUR)
        deadline = time.monotonic() + 30
        while not cli.kernel_processes() and time.monotonic() < deadline:
            time.sleep(0.2)
        kernels = cli.kernel_processes()
        # The kernel is the Python of the environment jostle runs in (same bin folder),
        # whatever other kernels the machine has.
        assert kernels and Path(kernels[0][0]).parent == Path(sys.executable).parent
    finally:
        code = cli.stop_with(signal.SIGINT)
    assert code == 0, cli.log()[-3000:]
    assert port_closed(port)
    deadline = time.monotonic() + 10
    while cli.kernel_processes() and time.monotonic() < deadline:
        time.sleep(0.2)
    assert cli.kernel_processes() == [], "a kernel outlived jostle demo"


@pytest.mark.slow
def test_second_demo_run_keeps_the_users_edited_copy_and_stops_on_terminate(tmp_path):
    work = tmp_path / "demo"
    copy_demo_notebooks(work)
    notebook = json.loads((work / FIRST_TOUR).read_text(encoding="utf-8"))
    notebook["cells"].append({"cell_type": "markdown", "id": "my-notes", "metadata": {}, "source": ["my own notes"]})
    edited = json.dumps(notebook, indent=1)
    (work / FIRST_TOUR).write_text(edited, encoding="utf-8")

    port = free_port()
    cli = JostleCommand(["demo", "--no-browser", "--port", str(port), "--dir", str(work)], tmp_path)
    try:
        opened = cli.wait_for_line(rf"open (http://127\.0\.0\.1:{port})\S+token=([0-9a-f]+)")
        wait_for_http(f"{opened.group(1)}/api/status?token={opened.group(2)}", START_TIMEOUT_S, cli.process,
                      "jostle demo", cli.log)
    finally:
        code = cli.stop_with(signal.SIGTERM)
    assert code == 0, cli.log()[-3000:]
    assert f"kept your edited copy of {FIRST_TOUR}" in cli.log()
    assert (work / FIRST_TOUR).read_text(encoding="utf-8") == edited
    assert port_closed(port)
