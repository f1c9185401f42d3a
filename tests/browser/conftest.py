"""Session fixtures for the browser tests: one Chromium, one JupyterLab, Voila on demand."""
from __future__ import annotations

import secrets
from pathlib import Path

import pytest

from .harness import (
    Server,
    chromium_browser,
    free_port,
    jupyter_environment,
    lab_command,
    page,
    require_chromium,
    shutdown_kernels,
    start_server,
    voila_command,
    write_lab_settings,
)

__all__ = ["chromium_browser", "page"]

_RUNNING_LABS: list[Server] = []


@pytest.fixture(scope="session")
def jupyter_base(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("jupyter")


@pytest.fixture(scope="session")
def lab_server(jupyter_base, tmp_path_factory) -> Server:
    """JupyterLab on a scratch root folder with scratch settings (windowing off)."""
    require_chromium()
    root = tmp_path_factory.mktemp("lab-root")
    settings = jupyter_base / "lab-settings"
    workspaces = jupyter_base / "lab-workspaces"
    write_lab_settings(settings)
    workspaces.mkdir(exist_ok=True)
    port, token = free_port(), secrets.token_hex(16)
    url = f"http://127.0.0.1:{port}"
    server = start_server(
        "JupyterLab", lab_command(port, token, root, settings, workspaces), cwd=root,
        env=jupyter_environment(jupyter_base), log_path=jupyter_base / "lab.log",
        ready_url=f"{url}/api/status?token={token}", url=url, token=token, root=root,
    )
    _RUNNING_LABS.append(server)
    yield server
    _RUNNING_LABS.remove(server)
    server.stop()


@pytest.fixture(scope="module", autouse=True)
def _kernels_end_with_their_module():
    """Each test module's notebooks lose their kernels when it ends, so none slows the next."""
    yield
    for lab in _RUNNING_LABS:
        shutdown_kernels(lab)


@pytest.fixture(scope="session")
def voila_server(jupyter_base):
    """Factory: ``voila_server(notebook_path)`` serves one notebook with Voila at ``server.url``."""
    require_chromium()
    started: list[Server] = []

    def start(notebook: Path) -> Server:
        notebook = Path(notebook)
        port = free_port()
        url = f"http://127.0.0.1:{port}"
        server = start_server(
            "Voila", voila_command(notebook, port), cwd=notebook.parent, env=jupyter_environment(jupyter_base),
            log_path=jupyter_base / f"voila-{port}.log", ready_url=f"{url}/voila/static/", url=url,
            root=notebook.parent, any_status=True,
        )
        started.append(server)
        return server

    yield start
    for server in started:
        server.stop()

