"""Session fixtures for the browser tests: one Chromium, one JupyterLab, Voila on demand."""
from __future__ import annotations

import secrets
from pathlib import Path

import pytest

from .harness import (
    CHROMIUM, CHROMIUM_ARGS, PageErrors, Server, block_outside_traffic, free_port, jupyter_environment,
    lab_command, open_and_run, require_chromium, start_server, voila_command, wait_for, write_lab_settings,
    write_notebook,
)

__all__ = ["open_and_run", "wait_for", "write_notebook"]


@pytest.fixture(scope="session")
def chromium_browser():
    """Headless Debian Chromium (no browser download is possible here)."""
    require_chromium()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, headless=True)
        try:
            yield browser
        finally:
            browser.close()


@pytest.fixture
def page(chromium_browser):
    """A fresh browser context and page that fails the test on uncaught page errors."""
    context = chromium_browser.new_context(viewport={"width": 1400, "height": 1000})
    page = context.new_page()
    block_outside_traffic(page)
    errors = PageErrors(page)
    page.jostle_errors = errors
    yield page
    context.close()
    errors.check()


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
    yield server
    server.stop()


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

