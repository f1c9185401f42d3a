"""``jostle present`` in a real browser: the widgets of the presented notebook, no code."""
from __future__ import annotations

import signal

import pytest

from .harness import (
    START_TIMEOUT_S,
    JostleCommand,
    free_port,
    port_closed,
    screenshot,
    wait_for_http,
    wait_until,
    write_notebook,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

PRESENTED_CELLS = [
    ("markdown", "# presented page"),
    '''import ipywidgets as widgets
budget = widgets.FloatSlider(value=0.1, min=0.0, max=0.5, step=0.05, description="budget")
budget.add_class("shown-budget")
echo = widgets.Label(value="kernel saw 0.10")
echo.add_class("shown-echo")
budget.observe(lambda change: setattr(echo, "value", f"kernel saw {change['new']:.2f}"), names="value")
widgets.VBox([budget, echo])''',
]


def test_present_serves_the_widgets_without_code(tmp_path, page):
    notebook = write_notebook(tmp_path / "shown.ipynb", PRESENTED_CELLS)
    port = free_port()
    cli = JostleCommand(["present", str(notebook), "--no-browser", "--port", str(port)], tmp_path)
    try:
        cli.wait_for_line(rf"shown\.ipynb at http://127\.0\.0\.1:{port}/")
        wait_for_http(f"http://127.0.0.1:{port}/voila/static/", START_TIMEOUT_S, cli.process, "jostle present",
                      cli.log, any_status=True)
        page.goto(f"http://127.0.0.1:{port}/", wait_until="domcontentloaded")
        handle = page.locator(".shown-budget .noUi-handle").first
        handle.wait_for(timeout=90_000)
        handle.focus()
        page.keyboard.press("ArrowRight")
        wait_until(page, "() => { const l = document.querySelector('.shown-echo');"
                         " return l && l.textContent.includes('kernel saw 0.15'); }",
                   timeout=30, what="the kernel's echo of the budget slider (0.15)")
        assert "presented page" in page.inner_text("body")
        assert "budget.observe" not in page.inner_text("body")
        screenshot(page, "cli-present")
    finally:
        code = cli.stop_with(signal.SIGTERM)
    assert code == 0, cli.log()[-3000:]
    assert port_closed(port)
