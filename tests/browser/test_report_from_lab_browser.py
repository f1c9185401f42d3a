"""A report made from a live explorer in JupyterLab (after a click on its map) opens offline
in a fresh page and shows the numbers the live page showed."""
from __future__ import annotations

import re

import pytest

from .explorer_page import click_map, snapshot, wait_for_explorer, wait_for_update
from .harness import (
    lab_notebook,
    screenshot,
    wait_until,
)
from .test_report_offline_browser import _cells, _open_offline

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CELLS = [
    ("markdown", "# a finding to share"),
    '''import torch, ipywidgets as widgets
import jostle
from jostle.widgets import Explorer

data = jostle.datasets.moons(n_train=60, n_test=10, noise=0.2, seed=0)
generator = torch.Generator().manual_seed(0)
nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=(16,)), generator) for _ in range(6)]
ens = jostle.Ensemble.from_modules(nets)
explorer = Explorer(ens, data, grid=32, steps=10, budget=0.3)
done = widgets.Label("no report yet")

def write(_):
    done.value = f"report written: {explorer.report('finding.html')}"

button = widgets.Button(description="write the report")
button.on_click(write)
widgets.VBox([explorer, button, done])''',
]


def _split(text: str, name: str) -> list[float]:
    found = re.search(rf"{name}: total ([\d.]+), aleatoric ([\d.]+), epistemic ([\d.]+)", text)
    assert found, f"no uncertainty split for {name!r} in {text!r}"
    return [float(v) for v in found.groups()]


def test_report_made_in_jupyterlab_shows_the_live_numbers_offline(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "finding.ipynb", CELLS, viewport=(1400, 1100)) as (page, _):
        before = wait_for_explorer(page)
        click_map(page, 0.3, 0.35)
        live = wait_for_update(page, before, ["point", "predictive", "uncertainty"], what="the clicked input's view")
        page.get_by_role("button", name="write the report").click()
        wait_until(page, "() => document.body.innerText.includes('report written:')", what="the report to be written")
        live = snapshot(page)  # unchanged by writing the report
        live_success = page.get_by_test_id("explorer-map-root").first.get_attribute("data-success")
        screenshot(page, "report-lab-live")
    path = lab_server.root / "finding.html"
    context, report, url, attempts, dialogs, page_errors = _open_offline(chromium_browser, path)
    try:
        settings = dict(_cells(report, "report-settings"))
        point = [float(v) for v in live["point"].split(",")]
        shown = [float(v) for v in settings["input"].split(",")]
        # the report prints 6 significant digits of the point the map shows
        assert shown == pytest.approx(point, rel=1e-5, abs=1e-6)
        summary = dict(_cells(report, "report-summary"))
        for name, key in (("input", "uncertainty at the input (nats)"),
                          ("attacked", "uncertainty at the attacked (nats)")):
            page_split = _split(live["uncertainty"], name)
            report_split = _split(f"{name}: {summary[key]}", name)
            # the page shows 3 decimals, the report 4: they agree within the coarser rounding
            assert report_split == pytest.approx(page_split, abs=5e-4 + 5e-5)
        assert summary["attack flipped the prediction"] == {"true": "yes", "false": "no"}[live_success]
        assert report.locator("svg[role=img]").count() == 5
        assert settings["budget (eps)"] == live["budget"] == "0.3"
        screenshot(report.locator("main"), "report-lab-offline")
    finally:
        context.close()
    assert not dialogs and not page_errors
    assert url in attempts and {a for a in attempts if not a.startswith("data:")} == {url}, attempts
