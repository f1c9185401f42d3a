"""The 2-D Explorer in real JupyterLab and Voila pages, driven like a user would.

One notebook (a small seeded deep ensemble on moons) is opened once in JupyterLab and the
tests act on it in turn; each compares what the page shows before and after one action.
"""
from __future__ import annotations

import math
import re

import pytest

from .explorer_page import click_map, set_range, snapshot, wait_for_explorer, wait_for_update
from .harness import (
    lab_notebook,
    open_voila,
    screenshot,
    write_notebook,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

MARKUP_NAME = '<img src=x onerror="window.__jostleInjected=1">'
MOONS = dict(n_train=100, n_test=40, noise=0.2, seed=0)
EXPLORER_CELLS = [
    ("markdown", "# explorer under test"),
    f'''import jostle
from jostle.widgets import Explorer

raw = jostle.datasets.moons(**{MOONS!r})
names = [{MARKUP_NAME!r}, "surge"]
data = jostle.datasets.from_arrays(raw.x_train, raw.y_train, raw.x_test, raw.y_test, classes=names,
                                   name="moons", bounds=raw.bounds)
ens = jostle.fit_deep_ensemble(jostle.mlp(2, 2, hidden=(16, 16)), data, members=6, epochs=40,
                               batch_size=50, lr=0.03, seed=0, progress=False)
explorer = Explorer(ens, data, grid=32, steps=20)
explorer''',
]


@pytest.fixture(scope="module")
def explorer_notebook(lab_server):
    return write_notebook(lab_server.root / "explorer.ipynb", EXPLORER_CELLS)


@pytest.fixture(scope="module")
def lab_explorer(chromium_browser, lab_server, explorer_notebook):
    """One JupyterLab page with the explorer notebook run; page errors fail the module."""
    with lab_notebook(chromium_browser, lab_server, explorer_notebook.name, viewport=(1400, 1100)) as (page, errors):
        wait_for_explorer(page)
        yield page, errors


@pytest.fixture(scope="module")
def bounds():
    import jostle

    lo, hi = jostle.datasets.moons(**MOONS).bounds
    return float(lo[0]), float(hi[0]), float(lo[1]), float(hi[1])


def test_explorer_shows_every_panel(lab_explorer):
    page, errors = lab_explorer
    for testid in ("explorer", "explorer-map", "map-legend", "layer-select", "budget-slider", "samples-slider",
                   "steps-slider", "method-select", "norm-select", "objective-select", "predictive-chart",
                   "spread-chart", "uncertainty-text", "path-chart", "fade-chart", "status-line", "caution-note"):
        assert page.get_by_test_id(testid).count() >= 1, f"data-testid={testid!r} is missing"
    state = snapshot(page)
    assert state["status"] == "idle" and state["pathLength"] == 21  # steps + 1 points (20 PGD steps)
    assert "not certify" in page.get_by_test_id("caution-note").first.inner_text()
    screenshot(page, "explorer-lab")
    errors.check()


def test_map_click_moves_the_input_and_updates_predictive_and_spread(lab_explorer, bounds):
    page, errors = lab_explorer
    before = snapshot(page)
    fx, fy = 0.2, 0.25
    click_map(page, fx, fy)
    # Not the spread chart's signature: it is a 20-bin histogram over 6 members, and two
    # confidently classified inputs put every member in the same top bin, so it may
    # rightly stay the same. The split beneath it comes from the same view and moves.
    after = wait_for_update(page, before, ["point", "predictive", "uncertainty"],
                            what="the kernel's view for the clicked input")
    assert after["spread"], "the spread chart is not drawn after the click"
    x0, x1, y0, y1 = bounds
    x, y = (float(v) for v in after["point"].split(","))
    # The map puts x0..x1 across the canvas and y1..y0 down it; one pixel is < 1% of the box.
    assert x == pytest.approx(x0 + fx * (x1 - x0), abs=0.01 * (x1 - x0))
    assert y == pytest.approx(y1 - fy * (y1 - y0), abs=0.01 * (y1 - y0))
    _check_uncertainty_split(after["uncertainty"], classes=2)
    screenshot(page.get_by_test_id("explorer-map-root").first, "explorer-lab-map-after-click")
    # (-1.3, 1.375) sits in the upper moon, where every member gives its class p > 0.99.
    # Near the map's lower-left corner, far from the data, the members disagree (deep
    # ensembles spread off the data: Lakshminarayanan et al. 2017); for this seeded ensemble
    # they range from p = 0.0 to 0.97 there, so the histogram must move to other bins.
    click_map(page, 0.2, 0.9)
    far = wait_for_update(page, after, ["point", "spread", "uncertainty"],
                          what="the spread chart for an input far from the data")
    _check_uncertainty_split(far["uncertainty"], classes=2)
    errors.check()


def test_budget_slider_redraws_the_path_and_scales_the_eps_ball(lab_explorer):
    page, errors = lab_explorer
    before = snapshot(page, pixels=True)
    eps_before = float(before["budget"])
    set_range(page, "budget-slider", round(2.5 * eps_before, 3))
    after = wait_for_update(page, before, ["budget", "ballRadiusPx", "path", "pixels"],
                            what="the path and eps-ball for the new budget")
    eps_after = float(after["budget"])
    assert eps_after > eps_before
    # The ball's half-width is eps times the map's pixels per data unit, so radii scale with eps.
    assert after["ballRadiusPx"] / before["ballRadiusPx"] == pytest.approx(eps_after / eps_before, rel=0.02)
    assert after["pathEnd"] != before["pathEnd"]
    errors.check()


def test_samples_slider_moves_the_marker_on_the_gradient_chart(lab_explorer):
    page, errors = lab_explorer
    before = snapshot(page)
    assert before["markerX"] is not None, "the fade chart shows no attacker-samples marker"
    set_range(page, "samples-slider", 2)
    after = wait_for_update(page, before, ["samples", "markerX"], what="the fade-chart marker for 2 samples")
    assert after["samples"] == "2"
    # Fewer samples sit further left on the (log) samples axis.
    assert after["markerX"] < before["markerX"]
    screenshot(page, "explorer-lab-after-controls")
    errors.check()


def test_class_name_with_markup_is_shown_as_text_and_runs_nothing(lab_explorer):
    page, errors = lab_explorer
    legend = page.get_by_test_id("map-legend").first.inner_text()
    assert MARKUP_NAME in legend
    assert page.evaluate("() => window.__jostleInjected") is None
    assert page.locator('img[src="x"]').count() == 0
    ticks = page.get_by_test_id("predictive-chart").first.locator("text").evaluate_all(
        "nodes => nodes.map(n => n.textContent)")
    # the long name is cut on the axis (the legend holds it whole); its start shows the markup as text
    assert any(t.startswith("<img src=") and t.endswith("\u2026") for t in ticks), \
        f"the class name should appear, cut with an ellipsis, as a chart tick label; got {ticks}"
    errors.check()


def test_explorer_under_voila(page, voila_server, explorer_notebook, bounds):
    voila = voila_server(explorer_notebook)
    open_voila(page, voila)
    before = wait_for_explorer(page, timeout=120)
    click_map(page, 0.75, 0.7)
    # The spread histogram may rightly be unchanged (see the JupyterLab click test); the
    # uncertainty split under it comes from the same view.
    after = wait_for_update(page, before, ["point", "predictive", "uncertainty", "path"],
                            what="the kernel's view for the clicked input under Voila")
    assert after["spread"], "the spread chart is not drawn under Voila"
    _check_uncertainty_split(after["uncertainty"], classes=2)
    x0, x1, y0, y1 = bounds
    x, _ = (float(v) for v in after["point"].split(","))
    assert x == pytest.approx(x0 + 0.75 * (x1 - x0), abs=0.01 * (x1 - x0))
    assert "fit_deep_ensemble" not in page.inner_text("body")  # Voila hides the code
    assert page.evaluate("() => window.__jostleInjected") is None
    screenshot(page, "explorer-voila")


def _check_uncertainty_split(text: str, classes: int) -> None:
    """Total predictive entropy = aleatoric + epistemic (Houlsby et al. 2011; Depeweg et al. 2018).

    Each is shown to 3 decimals, so the identity holds to rounding; all lie in [0, ln C].
    """
    match = re.search(r"input: total ([\d.]+), aleatoric ([\d.]+), epistemic ([\d.]+)", text)
    assert match, f"no uncertainty split in {text!r}"
    total, aleatoric, epistemic = (float(v) for v in match.groups())
    assert total == pytest.approx(aleatoric + epistemic, abs=0.0016)
    for value in (total, aleatoric, epistemic):
        assert 0.0 <= value <= math.log(classes) + 5e-4
