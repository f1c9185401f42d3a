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

from _browser_timing import CHROMIUM, arm, lab_page, slider_grid, time_actions  # puts the repository on sys.path
from _timing import median, percentile

from tests.browser.explorer_page import DESCRIBE_JS, click_map, set_range, snapshot, wait_for_explorer

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


def main() -> None:
    if not CHROMIUM.is_file():
        print(f"skipped: headless Chromium is not installed at {CHROMIUM}")
        return
    rows = _measure()
    print(f"S = {MEMBERS}, PGD 40 steps, 64x64 grid; {REPEATS} timed actions each, in JupyterLab + Chromium")
    print(f"{'action':34s} {'median ms':>9s} {'p95 ms':>8s} {'kernel ms':>9s} {'browser/kernel':>14s} {'target':>8s}")
    for name, browser, kernel in rows:
        target = TARGETS_MS.get(name)
        verdict = "" if target is None else f"<= {target:.0f} {'met' if median(browser) <= target else 'MISSED'}"
        ratio = median(browser) / max(median(kernel), 1e-9) if kernel else float("nan")
        print(f"{name:34s} {median(browser):9.0f} {percentile(browser, 95):8.0f} "
              f"{median(kernel) if kernel else float('nan'):9.0f} {ratio:14.2f} {verdict:>8s}")


def _measure() -> list[tuple[str, list[float], list[float]]]:
    rows = []
    with lab_page(NOTEBOOK) as page:
        wait_for_explorer(page, timeout=120)
        arm(page, [("[data-testid=explorer-map]", "pointerdown"), ("[data-testid=budget-slider]", "input"),
                   ("[data-testid=samples-slider]", "input")])
        for name, act, fields in _actions(page):
            timed = time_actions(page, act, lambda: snapshot(page), "window.__jostleSnapshot(null, false)", fields,
                                 repeats=REPEATS, describe=DESCRIBE_JS)
            rows.append((name, [d["ms"] for d in timed], [d["kernelMs"] for d in timed if d["kernelMs"] is not None]))
    return rows


def _actions(page):
    # Distinct values each time: a revisited value would be served from the view cache.
    points = [((k * 0.6180339) % 0.8 + 0.1, (k * 0.4142135) % 0.8 + 0.1) for k in range(1, REPEATS + 3)]
    budgets = iter(slider_grid(page, "budget-slider", REPEATS + 2))
    samples = iter(range(MEMBERS - 1, MEMBERS - REPEATS - 4, -1))
    clicks = iter(points)
    return [
        ("map click -> all panels updated", lambda: click_map(page, *next(clicks)),
         ["point"]),
        ("budget -> path redrawn", lambda: set_range(page, "budget-slider", next(budgets)), ["budget", "pathEnd"]),
        ("samples -> background redrawn", lambda: set_range(page, "samples-slider", next(samples)),
         ["samples", "layerRevision"]),
    ]


if __name__ == "__main__":
    main()
