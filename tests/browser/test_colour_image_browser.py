"""ImageExplorer on a colour 28x28 meter card in a real JupyterLab page, perturbation per channel."""
from __future__ import annotations

import pytest

from .harness import (
    lab_notebook,
    screenshot,
    wait_for,
    wait_until,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

IMAGES = ".jostle-image-explorer"
CELLS = [
    '''import torch, jostle
from jostle.widgets import ImageExplorer

cards = jostle.datasets.meter_cards(resolution=28, colour=True)
generator = torch.Generator().manual_seed(1)
nets = [jostle.init_parameters(jostle.mlp(3 * 28 * 28, 10, hidden=(16,)), generator) for _ in range(4)]
images = ImageExplorer(jostle.Ensemble.from_modules(nets), cards, strip=6, steps=10, budget=0.1,
                       index=2)
images''',
]

_STATE_JS = """(scope) => {
  const root = document.querySelector(scope);
  if (!root) return false;
  const get = (id) => root.querySelector(`[data-testid="${id}"]`);
  const panels = get('image-panels-root'), status = get('status-line'), strip = get('image-strip');
  const original = get('image-original'), perturbation = get('image-perturbation');
  if (!panels || !status || status.dataset.state !== 'idle' || Number(panels.dataset.revision) < 1) return false;
  if (!strip || Number(strip.dataset.count) !== 6 || original.width !== 28) return false;
  const pixel = (canvas, x, y) => Array.from(canvas.getContext('2d').getImageData(x, y, 1, 1).data);
  return {
    original: [original.width, original.height], perturbation: [perturbation.width, perturbation.height],
    shown: original.getBoundingClientRect().width,
    aspect: perturbation.getBoundingClientRect().width / perturbation.getBoundingClientRect().height,
    px: pixel(original, 14, 10), corner: pixel(original, 3, 20),
  };
}"""


@pytest.fixture(scope="module")
def lab_page(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "colour_cards.ipynb", CELLS, viewport=(1400, 1400)) as opened:
        yield opened


def test_colour_card_drawn_in_rgb_with_the_perturbation_per_channel(lab_page):
    import jostle

    page, errors = lab_page
    wait_for(page, "image-explorer")
    state = wait_until(page, _STATE_JS, arg=IMAGES, what="the colour card's first view")
    card = jostle.datasets.meter_cards(resolution=28, colour=True).x_test[2].reshape(3, 28, 28).numpy()
    assert state["original"] == [28, 28]
    assert state["perturbation"] == [3 * 28 + 2, 28]  # three channel panels, one pixel apart
    assert state["shown"] > 28  # the canvas is scaled up on screen, not drawn at one pixel per pixel
    assert state["aspect"] == pytest.approx(86 / 28, rel=0.03)  # square pixels; 3% for whole-pixel CSS sizes
    for (x, y), key in (((14, 10), "px"), ((3, 20), "corner")):
        expected = [round(255 * min(1.0, max(0.0, float(v)))) for v in card[:, y, x]]
        # values in [0, 1] drawn as round(255 * v): within one 8-bit level (quantisation step 1/255)
        assert all(abs(a - b) <= 1 for a, b in zip(state[key][:3], expected)), (state[key], expected)
    screenshot(page.locator(IMAGES).first, "image-explorer-colour-card-lab")
    errors.check()
