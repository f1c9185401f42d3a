"""The shipped demo notebooks run in a real JupyterLab page and draw their widgets.

The first three tours cover the Comparison, the Explorer and the ImageExplorer, and 07 the
ImageExplorer on a convolutional ensemble of 28x28 cards; the tall
viewport keeps each widget whole in its screenshot. Each notebook is copied unchanged into
the lab's root, run with "run all cells", and its widgets are waited for until their status
lines are idle. The page must report no errors.
Screenshots go to test-artifacts/demo-*.png (the README's pictures are chosen from them).
"""
from __future__ import annotations

import shutil
import urllib.error
import urllib.request
from pathlib import Path

import pytest

from .harness import PageErrors, block_outside_traffic, close_all_tabs, open_and_run, screenshot, wait_until

pytestmark = [pytest.mark.browser, pytest.mark.slow]

NOTEBOOKS = Path(__file__).resolve().parents[2] / "demo_notebooks"
RUN_TIMEOUT_S = 240.0

# Every status line inside `scope` is idle, there is at least `count` of them, and each map
# or image panel has received a kernel view.
_SETTLED_JS = """([scope, count]) => {
  const root = document.querySelector(scope);
  if (!root) return false;
  const states = Array.from(root.querySelectorAll('[data-testid="status-line"]')).map(s => s.dataset.state);
  if (states.length < count || !states.every(s => s === 'idle')) return false;
  const views = Array.from(root.querySelectorAll('[data-view-revision]')).map(e => Number(e.dataset.viewRevision));
  return views.every(v => v >= 1) ? {states, views} : false;
}"""

CASES = [
    ("01_first_tour.ipynb", ".jostle-comparison", 2, "demo-first-tour-comparison"),
    ("02_fading_gradient.ipynb", ".jostle-explorer", 1, "demo-fading-gradient-explorer"),
    ("03_meter_cards.ipynb", ".jostle-image-explorer", 1, "demo-meter-cards-image-explorer"),
    ("07_scanned_cards_cnn.ipynb", ".jostle-image-explorer", 1, "demo-scanned-cards-cnn-image-explorer"),
]


@pytest.fixture
def wide_page(chromium_browser):
    """A fresh page per notebook (with the saved layout dropped, see ``_forget_workspace``)."""
    context = chromium_browser.new_context(viewport={"width": 1700, "height": 2600})
    page = context.new_page()
    block_outside_traffic(page)
    errors = PageErrors(page)
    yield page, errors
    context.close()


@pytest.mark.parametrize("name, scope, statuses, picture", CASES)
def test_demo_notebook_draws_its_widgets_in_jupyterlab(name, scope, statuses, picture, wide_page, lab_server):
    page, errors = wide_page
    shutil.copy(NOTEBOOKS / name, lab_server.root / name)
    _forget_workspace(lab_server)
    try:
        open_and_run(page, lab_server, name, timeout=RUN_TIMEOUT_S)
        settled = wait_until(page, _SETTLED_JS, arg=[scope, statuses], timeout=120,
                             what=f"every view of {scope} in {name} to be drawn and idle")
        assert len(settled["states"]) >= statuses
        widget = page.locator(scope).first
        widget.scroll_into_view_if_needed()
        assert screenshot(widget, picture).stat().st_size > 10_000
        errors.check()
    finally:
        close_all_tabs(page)
        _forget_workspace(lab_server)


def _forget_workspace(lab) -> None:
    """Drop JupyterLab's saved layout, so the next page does not reopen (and rerun) this notebook."""
    request = urllib.request.Request(f"{lab.url}/lab/api/workspaces/default?token={lab.token}", method="DELETE")
    try:
        urllib.request.urlopen(request, timeout=10).close()
    except urllib.error.HTTPError as err:
        if err.code != 404:
            raise
