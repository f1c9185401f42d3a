"""The Explorer's certified read-out in real JupyterLab: both radii drawn on the map, the words beside them."""
from __future__ import annotations

import re

import pytest

from .explorer_page import wait_for_explorer
from .harness import (
    lab_notebook,
    screenshot,
    wait_until,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CELLS = [
    ("markdown", "# certified radius beside the attack"),
    '''import jostle
from jostle.widgets import Explorer

data = jostle.datasets.moons(n_train=100, n_test=40, noise=0.2, seed=0)
ens = jostle.fit_deep_ensemble(jostle.mlp(2, 2, hidden=(16, 16), activation="relu"), data, members=6,
                               epochs=40, batch_size=50, lr=0.03, seed=0, progress=False)
explorer = Explorer(ens, data, point=[0.0, 1.0], budget=0.05, grid=24, steps=20, layer="certified")
explorer''',
]

# Both rings drawn (their half-widths in px are on the map root), the words in the page.
_DRAWN_JS = """() => {
  const map = document.querySelector('[data-testid="explorer-map-root"]');
  const text = document.querySelector('[data-testid="certified-text"]');
  const legend = document.querySelector('[data-testid="radius-legend"]');
  if (!map || !text || !legend) return false;
  const proved = Number(map.dataset.certifiedRadiusPx || 0), flip = Number(map.dataset.flipRadiusPx || 0);
  if (!(proved > 0 && flip > proved && Number(map.dataset.radiusLayer) === 24 * 24)) return false;
  return {proved, flip, text: text.textContent, legend: legend.textContent,
          caution: (document.querySelector('[data-testid="certified-caution"]') || {textContent: ''}).textContent};
}"""


def test_explorer_draws_both_radii_and_says_them_in_words(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "certified.ipynb", CELLS, viewport=(1400, 1100)) as (page, _):
        wait_for_explorer(page)
        drawn = wait_until(page, _DRAWN_JS, timeout=180, what="both rings, the words and the finest radius layer")
        assert re.search(r"No flip is possible within r = [\d.e-]+ \(L-inf ball, certified, CROWN\); "
                         r"the attack flipped at e = [\d.e-]+; between them, unknown\.", drawn["text"])
        assert "sampled members" in drawn["caution"] and "regulation" in drawn["caution"]
        assert "r = 0" in drawn["legend"] and "24 x 24 of 24 x 24" in drawn["legend"]
        page.get_by_test_id("certified-text").first.scroll_into_view_if_needed()
        page.get_by_test_id("explorer-map").first.scroll_into_view_if_needed()
        screenshot(page, "explorer-lab-certified")
