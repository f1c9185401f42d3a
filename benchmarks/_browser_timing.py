"""What the browser benchmarks share: one JupyterLab + headless Chromium page, the clock
started at the input event, and the wait for the first animation frame where the view is done.

A view is "done" when the widget's own marker says the kernel's newer view is drawn
(``viewRevision`` above the one before the action), the status line is idle again, and every
named field of the snapshot differs from before. The status line's "updated in N ms" is the
kernel's own compute time for that view.
"""
from __future__ import annotations

import secrets
import sys
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from tests.browser.harness import (  # noqa: E402
    CHROMIUM,
    CHROMIUM_ARGS,
    PageErrors,
    free_port,
    jupyter_environment,
    lab_command,
    open_and_run,
    start_server,
    wait_until,
    write_lab_settings,
    write_notebook,
)

__all__ = ["CHROMIUM", "arm", "lab_page", "slider_grid", "time_actions"]

# Start the clock at the input event itself (capture phase, before the widget's handler).
_ARM_JS = """(targets) => {
  const start = () => { window.__jostleStarted = performance.now(); };
  for (const [selector, event] of targets) {
    const el = document.querySelector(selector);
    if (!el) throw new Error(`no element ${selector} to time`);
    el.addEventListener(event, start, true);
  }
  return true;
}"""

# `view` is a JavaScript expression giving the snapshot now; polled every animation frame.
_DONE_TEMPLATE = """([before, fields, idle]) => {
  const now = (%s);
  if (!(now.viewRevision > before.viewRevision && (!idle || now.status === 'idle'))) return false;
  for (const f of fields) { if (now[f] === before[f]) return false; }
  const kernel = /updated in (\\d+) ms/.exec(now.statusText);
  return {ms: performance.now() - window.__jostleStarted, kernelMs: kernel ? Number(kernel[1]) : null};
}"""


@contextmanager
def lab_page(cells: list[str], name: str = "bench.ipynb", timeout: float = 300,
             viewport: dict | None = None) -> Iterator[Any]:
    """JupyterLab on a scratch folder, Chromium on it, the notebook ``cells`` run; yields the page.

    Fails on any uncaught page error when the block ends; the server stops either way.
    """
    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory(prefix="jostle-bench-browser-") as scratch:
        base = Path(scratch)
        root, settings, workspaces = base / "root", base / "settings", base / "workspaces"
        for folder in (root, workspaces):
            folder.mkdir()
        write_lab_settings(settings)
        write_notebook(root / name, cells)
        port, token = free_port(), secrets.token_hex(16)
        url = f"http://127.0.0.1:{port}"
        lab = start_server("JupyterLab", lab_command(port, token, root, settings, workspaces), cwd=root,
                           env=jupyter_environment(base), log_path=base / "lab.log",
                           ready_url=f"{url}/api/status?token={token}", url=url, token=token, root=root)
        try:
            with sync_playwright() as playwright:
                browser = playwright.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
                try:
                    page = browser.new_page(viewport=viewport or {"width": 1400, "height": 1100})
                    errors = PageErrors(page)
                    open_and_run(page, lab, name, timeout=timeout)
                    yield page
                    errors.check()
                finally:
                    browser.close()
        finally:
            lab.stop()


def arm(page, targets: list[tuple[str, str]]) -> None:
    """Start the clock on each ``(css selector, event type)``: the first element matching."""
    page.evaluate(_ARM_JS, [list(t) for t in targets])


def slider_grid(page, testid: str, count: int, start: int = 6, stride: int = 2,
                scope: str | None = None) -> list[float]:
    """``count`` distinct values on a range input's own step grid (so the input does not snap two
    to one value): ``step * (start + stride * k)``. Distinct values keep the view cache from answering."""
    locator = page.locator(f"{scope or ''} [data-testid={testid}]".strip()).first
    step = float(locator.get_attribute("step"))
    return [round(step * (start + stride * k), 6) for k in range(count)]


def time_actions(page, act: Callable[[], None], before: Callable[[], dict], view_js: str, fields: list[str],
                 repeats: int, warmup: int = 2, timeout: float = 60, describe: str | None = None,
                 drawn_first: bool = False) -> list[dict]:
    """Run ``act`` ``warmup + repeats`` times; for each timed one, a dict of ``ms`` (input event to
    the first frame where the view is done) and ``kernelMs`` (from the status line, or None).

    ``before()`` is the snapshot taken before each action, ``view_js`` the JavaScript expression
    giving the snapshot now (both with ``viewRevision``, ``status`` and ``statusText``). With
    ``drawn_first`` the view is done once drawn, whatever the status line says (a widget that
    draws before its certified read-out); the wait then goes on until the status line is idle,
    and ``idleMs`` and ``kernelMs`` are read there.
    """
    done_js = _DONE_TEMPLATE % view_js
    timed = []
    for k in range(warmup + repeats):
        then = before()
        act()
        what = f"the view after action {k} (waiting for {fields})"
        done = wait_until(page, done_js, arg=[then, fields, not drawn_first], polling="raf", timeout=timeout,
                          what=what, describe=describe)
        if drawn_first:
            idle = wait_until(page, done_js, arg=[then, fields, True], polling="raf", timeout=timeout,
                              what=what + ", status idle", describe=describe)
            done = {**done, "idleMs": idle["ms"], "kernelMs": idle["kernelMs"]}
        if k >= warmup:
            timed.append(done)
    return timed
