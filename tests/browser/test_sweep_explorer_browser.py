"""SweepExplorer in real JupyterLab: marks per family, hover note, filters, and a click reaching the kernel."""
from __future__ import annotations

import pytest

from .harness import (
    lab_notebook,
    screenshot,
    wait_for,
    wait_until,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

MARKUP = '<img src=x onerror="window.__jostleInjected=1">'
# Made-up scores in a store written directly (demo data for the chart; no fitting in the kernel).
SWEEP_CELLS = [
    ("markdown", "# sweep explorer under test"),
    f'''import numpy as np, tempfile, pathlib
import jostle
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.spec import run_key
from jostle.widgets import SweepExplorer

sweep = jostle.Sweep(datasets=[{{"name": "moons", "n_test": 20}}],
                     methods=["map", {{"name": "deep_ensemble", "optimizer": {MARKUP!r}}}],
                     architectures=[{{"depth": 1, "width": 4}}], train_sizes=[20], seeds=[0, 1, 2],
                     evaluation={{"budgets": [0.1, 0.2], "points": 5, "attacks": ["fgsm", "pgd"]}})
rng = np.random.default_rng(3)
store = pathlib.Path(tempfile.mkdtemp()) / "runs.sqlite"
with RunStore(store) as db:
    for config in sweep.runs():
        acc = float(rng.uniform(0.6, 1))
        attacks = [{{"attack": a["label"], "method": a["method"], "norm": "inf", "steps": a["steps"], "samples": None,
                    "budget": b, "success_rate": float(rng.uniform()), "robustness": float(rng.uniform())}}
                   for a in config["evaluation"]["attacks"] for b in config["evaluation"]["budgets"]]
        db.record({{"key": run_key(config), "config": config, "status": "ok", "versions": {{}},
                   "metrics": {{"accuracy": acc, "nll": 0.4, "ece": 0.05, "members": 1, "attacks": attacks}}}})
explorer = SweepExplorer(store)
explorer''',
]


@pytest.fixture(scope="module")
def sweep_page(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "sweep_explorer.ipynb", SWEEP_CELLS) as (page, _):
        wait_for(page, "sweep-chart")
        yield page


def test_marks_differ_by_shape_and_colour_per_family(sweep_page):
    chart = wait_for(sweep_page, "sweep-chart")
    assert chart.get_attribute("data-point-count") == "6"
    marks = sweep_page.evaluate("""() => Array.from(document.querySelectorAll('[data-testid=sweep-point]')).map(
        p => [p.dataset.family, p.getAttribute('d'), getComputedStyle(p).fill])""")
    by_family = {family: (shape, fill) for family, shape, fill in marks}
    assert sorted(f for f, _, _ in marks) == ["Bayesian"] * 3 + ["deterministic"] * 3
    assert by_family["Bayesian"][0] != by_family["deterministic"][0]  # shape
    assert by_family["Bayesian"][1] != by_family["deterministic"][1]  # colour
    assert sweep_page.get_by_test_id("sweep-explorer").count() == 1  # class copied into data-testid
    screenshot(sweep_page.get_by_test_id("sweep-explorer"), "sweep-explorer")


def test_hover_shows_the_configuration_as_text(sweep_page):
    point = sweep_page.locator("[data-testid=sweep-point][data-family=Bayesian]").first
    point.hover()
    tooltip = wait_for(sweep_page, "sweep-tooltip")
    text = tooltip.inner_text()
    assert "deep_ensemble" in text and "seed" in text and MARKUP in text  # the markup shown, not parsed
    assert sweep_page.evaluate("() => window.__jostleInjected === undefined")


def test_budget_filter_and_click_reach_the_kernel(sweep_page):
    chart = wait_for(sweep_page, "sweep-chart")
    before = int(chart.get_attribute("data-revision"))
    sweep_page.get_by_test_id("sweep-budget-select").select_option("0.2")
    wait_until(sweep_page, "n => Number(document.querySelector('[data-testid=sweep-chart]').dataset.revision) > n",
               arg=before, timeout=30, what="the chart to redraw for budget 0.2")
    sweep_page.locator("[data-testid=sweep-point]").first.click()
    wait_until(sweep_page, "() => { const d = document.querySelector('[data-testid=sweep-detail]');"
                           " return d && d.textContent.includes('was not saved'); }",
               timeout=30, what="the kernel to open the clicked run beside the chart")
    assert sweep_page.locator("[data-testid=sweep-point][aria-selected=true]").count() == 1
