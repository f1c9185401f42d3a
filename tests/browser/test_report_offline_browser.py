"""A report file opened in a fresh Chromium page with every request but the file itself
refused: it shows the live explorer's numbers, and the page attempts no request at all."""
from __future__ import annotations

import pytest

import jostle
from jostle.report import posterior_sha256
from jostle.widgets import Explorer, ImageExplorer

from ..widgets.conftest import tiny_ensemble
from .harness import ARTIFACTS, screenshot

pytestmark = [pytest.mark.browser]

EVIL_CLASS = "<script>alert(1)</script>"


def _open_offline(browser, path):
    """A fresh context whose only allowed request is the report file; returns (page, attempts)."""
    context = browser.new_context(viewport={"width": 1300, "height": 900}, offline=True)
    page = context.new_page()
    url = path.resolve().as_uri()
    attempts, dialogs, errors = [], [], []

    def route(r):
        attempts.append(r.request.url)
        r.continue_() if r.request.url == url else r.abort()

    page.route("**/*", route)
    page.on("request", lambda request: attempts.append(request.url))
    page.on("dialog", lambda dialog: (dialogs.append(dialog.message), dialog.dismiss()))
    page.on("pageerror", lambda err: errors.append(str(err)))
    page.goto(url, wait_until="load")
    return context, page, url, attempts, dialogs, errors


def _cells(page, testid):
    return page.eval_on_selector_all(f'[data-testid="{testid}"] tr',
                                     "rows => rows.map(r => [...r.cells].map(c => c.textContent))")


def test_explorer_report_opens_offline_with_the_live_numbers(chromium_browser, tmp_path):
    data = jostle.datasets.moons(n_train=60, n_test=10, noise=0.2, seed=0)
    data = jostle.datasets.from_arrays(data.x_train, data.y_train, data.x_test, data.y_test,
                                       classes=[EVIL_CLASS, "wine"], name="moons", bounds=data.bounds)
    ens = tiny_ensemble(members=8, class_names=data.classes, hidden=(16,))
    ex = Explorer(ens, data, steps=20, budget=0.4, grid=48)
    try:
        ex.point = [0.2, 0.3]  # as a click on the map would
        assert ex.wait(60)
        view = ex.result
        path = ex.report(tmp_path / "finding.html")
    finally:
        ex.close()
    context, page, url, attempts, dialogs, errors = _open_offline(chromium_browser, path)
    try:
        assert page.title() == "jostle explorer report"
        assert page.locator("svg[role=img]").count() == 5  # map, predictive, spread, path, fade
        rows = _cells(page, "report-predictive")[1:]
        assert [r[0] for r in rows] == view.classes  # the class name shown as text, not run
        assert page.inner_text('[data-testid="report-legend"]').split() == [EVIL_CLASS, "wine"]
        for c, row in enumerate(rows):
            # shown to 4 decimals: within half a unit of the last place (plus float32 rounding)
            assert abs(float(row[1]) - float(view.before.probs[c])) <= 5e-5 + 1e-7
            assert abs(float(row[4]) - float(view.after.probs[c])) <= 5e-5 + 1e-7
        settings = dict(_cells(page, "report-settings"))
        assert settings["input"] == "0.2, 0.3" and settings["budget (eps)"] == "0.4" and settings["steps"] == "20"
        summary = dict(_cells(page, "report-summary"))
        assert summary["attack flipped the prediction"] == ("yes" if view.attack.success else "no")
        assert dict(_cells(page, "report-provenance"))["posterior sha256"] == posterior_sha256(ens)
        assert "not certificates" in page.inner_text('[data-testid="report-cautions"]')
        # every drawing has painted: the map's background raster (a data: URI) decoded
        assert page.evaluate("() => [...document.images].length") == 0
        assert page.eval_on_selector("svg image", "el => el.getAttribute('href').slice(0, 22)") == \
            "data:image/png;base64,"
        screenshot(page.locator("main"), "report-offline-explorer")
    finally:
        context.close()
    assert not dialogs and not errors
    # the file itself is the only request; inline data: URIs are not fetched from anywhere
    assert url in attempts and {a for a in attempts if not a.startswith("data:")} == {url}, attempts


def test_image_report_opens_offline(chromium_browser, tmp_path):
    digits = jostle.datasets.digits(seed=0)
    ens = tiny_ensemble(members=4, in_features=64, classes=10, hidden=(8,), class_names=digits.classes)
    ex = ImageExplorer(ens, digits, strip=6, steps=5, budget=0.3, index=1)
    try:
        assert ex.wait(60)
        path = ex.report(tmp_path / "digit.html")
    finally:
        ex.close()
    context, page, url, attempts, dialogs, errors = _open_offline(chromium_browser, path)
    try:
        assert [page.locator(f'figure[data-view="{v}"]').count() for v in ("original", "perturbation", "attacked")] \
            == [1, 1, 1]
        # each image panel's PNG decodes to its 8 x 8 pixels (drawn in the SVG at 180 px)
        sizes = page.evaluate("""async () => Promise.all([...document.querySelectorAll('svg image')].map(el =>
            new Promise(done => { const img = new Image(); img.onload = () => done([img.naturalWidth,
            img.naturalHeight]); img.onerror = () => done(null); img.src = el.getAttribute('href'); })))""")
        assert sizes == [[8, 8], [8, 8], [8, 8]]
        screenshot(page.locator("main"), "report-offline-image")
    finally:
        context.close()
    assert not dialogs and not errors
    assert url in attempts and {a for a in attempts if not a.startswith("data:")} == {url}, attempts
    assert (ARTIFACTS / "report-offline-image.png").is_file()
