"""The limit chart in real JupyterLab: a store filled by `jostle sweep run` shows the grid of widths by
training sizes (an empty cell where no run was made), its log colour legend, the norm-against-S view,
and a click on a cell opening that run beside the charts."""
from __future__ import annotations

import subprocess

import pytest

from .harness import (
    jostle_command,
    lab_notebook,
    screenshot,
    wait_for,
    wait_until,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

# Two small limit sweeps into one store, shaped like examples/leak_alarm_limit.toml: widths 3 and 6
# at 30 readings, width 3 alone at 60, so the grid's cell (width 6, 60 readings) has no run.
SWEEP_TOML = """[sweep]
name = "limit-{name}"
train_sizes = {sizes}
[[sweep.datasets]]
name = "leak_alarm"
n_test = 40
{architectures}
[[sweep.methods]]
name = "deep_ensemble"
members = 4
epochs = 20
[sweep.evaluation]
budgets = [0.1]
points = 20
gradient_samples = [1, 2, "all"]
[[sweep.evaluation.attacks]]
method = "fgsm"
"""


def _architectures(widths) -> str:
    return "".join(f"[[sweep.architectures]]\ndepth = 1\nwidth = {w}\n" for w in widths)


@pytest.fixture(scope="module")
def limit_page(chromium_browser, lab_server):
    store = lab_server.root / "limit.sqlite"
    for name, sizes, widths in (("a", [30], (3, 6)), ("b", [60], (3,))):
        config = lab_server.root / f"limit_{name}.toml"
        config.write_text(SWEEP_TOML.format(name=name, sizes=sizes, architectures=_architectures(widths)))
        done = subprocess.run([*jostle_command(), "sweep", "run", str(config), "--store", str(store),
                               "--save-ensembles", "--quiet"], capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr
    cells = [("markdown", "# limit chart under test"),
             f"from jostle.widgets import SweepExplorer\nexplorer = SweepExplorer({str(store)!r})\nexplorer"]
    with lab_notebook(chromium_browser, lab_server, "limit_chart.ipynb", cells, viewport=(1500, 1400)) as (page, _):
        wait_for(page, "limit-chart")
        yield page


def test_grid_shows_cells_by_width_and_size_with_an_empty_one(limit_page):
    chart = wait_for(limit_page, "limit-chart")
    wait_until(limit_page, "() => document.querySelector('[data-testid=limit-chart]').dataset.cellCount === '3'",
               timeout=30, what="three filled cells")
    cells = limit_page.evaluate("""() => Array.from(document.querySelectorAll('[data-testid=limit-cell]')).map(
        c => [Number(c.dataset.width), Number(c.dataset.size), c.dataset.empty, getComputedStyle(c).fill])""")
    assert sorted((w, s, e) for w, s, e, _ in cells) == [(3, 30, "false"), (3, 60, "false"), (6, 30, "false"),
                                                          (6, 60, "true")]
    fills = {f for _, _, e, f in cells if e == "false"}
    assert len(fills) == 3  # three different norms, three colours on the log scale
    legend = limit_page.get_by_test_id("limit-legend")
    assert len(legend.locator("text").all_inner_texts()) >= 2  # numbered ticks
    assert chart.get_attribute("data-view") == "grid"
    screenshot(limit_page.get_by_test_id("sweep-explorer"), "limit-chart-grid")


def test_norm_against_samples_view_draws_curves_and_the_reference(limit_page):
    chart = wait_for(limit_page, "limit-chart")
    limit_page.get_by_test_id("limit-view-select").select_option("curves")
    wait_until(limit_page, "() => document.querySelector('[data-testid=limit-chart]').dataset.view === 'curves'",
               timeout=30, what="the curves view")
    assert limit_page.get_by_test_id("limit-curve").count() == 3
    assert limit_page.get_by_test_id("limit-reference").count() == 1
    screenshot(chart, "limit-chart-curves")
    limit_page.get_by_test_id("limit-view-select").select_option("grid")
    wait_until(limit_page, "() => document.querySelector('[data-testid=limit-chart]').dataset.view === 'grid'",
               timeout=30, what="the grid view again")


def test_clicking_a_cell_opens_its_run(limit_page):
    cell = limit_page.locator("[data-testid=limit-cell][data-width='6'][data-size='30']")
    cell.hover()
    assert "width 6, n_train 30" in wait_for(limit_page, "limit-tooltip").inner_text()
    cell.click()
    wait_until(limit_page, "() => { const d = document.querySelector('[data-testid=sweep-detail]');"
                           " return d && d.textContent.includes('deep_ensemble, seed 0'); }",
               timeout=60, what="the kernel to open the clicked cell's run beside the charts")
    wait_for(limit_page, "explorer-map", timeout=60)
    assert limit_page.locator("[data-testid=limit-cell][aria-selected=true]").count() == 1
    screenshot(limit_page.get_by_test_id("sweep-explorer"), "limit-chart-opened")
