"""Explorer latency in a real browser: from a user's action to the redrawn view.

JupyterLab and headless Chromium (as in tests/browser) run an Explorer over S = 100
members of a 2-64-64-2 tanh deep ensemble on moons, PGD 40 steps, 64x64 background.
Three actions are timed in the page, from the input event to the first animation frame
where the view shows the new state:

- a click on the map, until the status line reports the new view (the kernel sends it after
  the map and every chart, on the same socket) and the map shows the new input;
- a budget change, until the attack path is redrawn (its end point moved);
- a sample-count change, until the 64x64 background is repainted.

Every action uses a value not used before, so the kernel's view cache never answers.
Beside each browser time is the kernel's own compute time for the same update (from the
status line), measured in the same run: their ratio is the cost of the wire and the drawing.
"""
from __future__ import annotations

import secrets
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from _timing import median, percentile  # noqa: E402

from tests.browser.explorer_page import DESCRIBE_JS, click_map, set_range, snapshot, wait_for_explorer  # noqa: E402
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

MEMBERS = 100
REPEATS = 15
TARGETS_MS = {"budget -> path redrawn": 150.0, "samples -> background redrawn": 400.0}
NOTEBOOK = [
    f'''import jostle
from jostle.widgets import Explorer

data = jostle.datasets.moons(n_train=300, n_test=100, noise=0.2, seed=0)
ens = jostle.fit_deep_ensemble(jostle.mlp(2, 2, hidden=(64, 64)), data, members={MEMBERS}, epochs=20,
                               batch_size=100, lr=0.02, seed=0, progress=False)
explorer = Explorer(ens, data, grid=64, steps=40, method="pgd", budget=0.1)
explorer''',
]

# Start the clock at the input event itself (capture phase, before the widget's handler).
_ARM_JS = """() => {
  const start = () => { window.__jostleStarted = performance.now(); };
  document.querySelector('[data-testid=explorer-map]').addEventListener('pointerdown', start, true);
  for (const id of ['budget-slider', 'samples-slider']) {
    document.querySelector(`[data-testid=${id}]`).addEventListener('input', start, true);
  }
  return true;
}"""

_DONE_JS = """([before, fields]) => {
  const now = window.__jostleSnapshot(null, false);
  if (!(now.viewRevision > before.viewRevision && now.status === 'idle')) return false;
  for (const f of fields) { if (now[f] === before[f]) return false; }
  const kernel = /updated in (\\d+) ms/.exec(now.statusText);
  return {ms: performance.now() - window.__jostleStarted, kernelMs: kernel ? Number(kernel[1]) : null};
}"""


def main() -> None:
    if not CHROMIUM.is_file():
        print(f"skipped: headless Chromium is not installed at {CHROMIUM}")
        return
    with tempfile.TemporaryDirectory(prefix="jostle-bench-browser-") as base:
        rows = _measure(Path(base))
    print(f"S = {MEMBERS}, PGD 40 steps, 64x64 grid; {REPEATS} timed actions each, in JupyterLab + Chromium")
    print(f"{'action':34s} {'median ms':>9s} {'p95 ms':>8s} {'kernel ms':>9s} {'browser/kernel':>14s} {'target':>8s}")
    for name, browser, kernel in rows:
        target = TARGETS_MS.get(name)
        verdict = "" if target is None else f"<= {target:.0f} {'met' if median(browser) <= target else 'MISSED'}"
        ratio = median(browser) / max(median(kernel), 1e-9) if kernel else float("nan")
        print(f"{name:34s} {median(browser):9.0f} {percentile(browser, 95):8.0f} "
              f"{median(kernel) if kernel else float('nan'):9.0f} {ratio:14.2f} {verdict:>8s}")


def _measure(base: Path) -> list[tuple[str, list[float], list[float]]]:
    from playwright.sync_api import sync_playwright

    root, settings, workspaces = base / "root", base / "settings", base / "workspaces"
    for folder in (root, workspaces):
        folder.mkdir()
    write_lab_settings(settings)
    write_notebook(root / "bench.ipynb", NOTEBOOK)
    port, token = free_port(), secrets.token_hex(16)
    url = f"http://127.0.0.1:{port}"
    lab = start_server("JupyterLab", lab_command(port, token, root, settings, workspaces), cwd=root,
                       env=jupyter_environment(base), log_path=base / "lab.log",
                       ready_url=f"{url}/api/status?token={token}", url=url, token=token, root=root)
    try:
        with sync_playwright() as playwright:
            browser = playwright.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
            try:
                page = browser.new_page(viewport={"width": 1400, "height": 1100})
                errors = PageErrors(page)
                open_and_run(page, lab, "bench.ipynb", timeout=300)
                wait_for_explorer(page, timeout=120)
                page.evaluate(_ARM_JS)
                rows = [(name, *_time(page, act, fields)) for name, act, fields in _actions(page)]
                errors.check()
            finally:
                browser.close()
    finally:
        lab.stop()
    return rows


def _actions(page):
    # Distinct values each time: a revisited value would be served from the view cache.
    points = [((k * 0.6180339) % 0.8 + 0.1, (k * 0.4142135) % 0.8 + 0.1) for k in range(1, REPEATS + 3)]
    # Budgets on the slider's own step grid, so the range input does not snap two to one value.
    step = float(page.get_by_test_id("budget-slider").first.get_attribute("step"))
    budgets = iter([round(step * (6 + 2 * k), 6) for k in range(REPEATS + 2)])
    samples = iter(range(MEMBERS - 1, MEMBERS - REPEATS - 4, -1))
    clicks = iter(points)
    return [
        ("map click -> all panels updated", lambda: click_map(page, *next(clicks)),
         ["point"]),
        ("budget -> path redrawn", lambda: set_range(page, "budget-slider", next(budgets)), ["budget", "pathEnd"]),
        ("samples -> background redrawn", lambda: set_range(page, "samples-slider", next(samples)),
         ["samples", "layerRevision"]),
    ]


def _time(page, act, fields, warmup: int = 2) -> tuple[list[float], list[float]]:
    browser_ms, kernel_ms = [], []
    for k in range(warmup + REPEATS):
        before = snapshot(page)
        act()
        done = wait_until(page, _DONE_JS, arg=[before, fields], polling="raf", timeout=60,
                          what=f"the view after action {k} (waiting for {fields})", describe=DESCRIBE_JS)
        if k >= warmup:
            browser_ms.append(done["ms"])
            if done["kernelMs"] is not None:
                kernel_ms.append(done["kernelMs"])
    return browser_ms, kernel_ms


if __name__ == "__main__":
    main()
