"""The expected-gradient strip of ImageExplorer and the GradientComponents view in a real JupyterLab page.

Seeded random nets on the 28x28 meter cards (the views, not a fit, are under test). The
L-inf norms the page writes under each image are compared with jostle.gradient_pictures
computed here from the same seeded ensemble.
"""
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
SETUP = '''import torch, jostle
from jostle.widgets import GradientComponents, ImageExplorer

def random_ensemble(in_features, classes, members, seed):
    generator = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(in_features, classes, hidden=(16,)), generator) for _ in range(members)]
    return jostle.Ensemble.from_modules(nets)

cards = jostle.datasets.meter_cards(resolution=28, seed=0)
ens = random_ensemble(784, 10, 20, seed=1)'''
CELLS = [
    SETUP + '''
images = ImageExplorer(ens, cards, strip=6, steps=5, budget=0.1, samples=4)
images''',
    '''components = GradientComponents(ens, cards, points=16, samples=(1, 4, 16, None))
components''',
]

_STRIP_JS = """(scope) => {
  const root = document.querySelector(scope);
  const strip = root && root.querySelector('[data-testid=gradient-strip]');
  if (!strip) return null;
  const items = Array.from(strip.querySelectorAll('[data-testid=gradient-strip-item]'));
  const status = root.querySelector('[data-testid=status-line]');
  return {
    revision: Number(strip.dataset.revision || 0), status: status ? status.dataset.state : '',
    samples: items.map(f => Number(f.dataset.samples)), linf: items.map(f => Number(f.dataset.linf)),
    captions: items.map(f => f.querySelector('figcaption').textContent),
    highlighted: items.map(f => f.dataset.highlighted === 'true'),
    distinct: items.map(f => { const c = f.querySelector('canvas');
      const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
      const seen = new Set(); for (let k = 0; k < d.length; k += 4) seen.add(d[k] * 65536 + d[k + 1] * 256 + d[k + 2]);
      return seen.size; }),
    sizes: items.map(f => { const c = f.querySelector('canvas'); return [c.width, c.height]; }),
    note: (strip.querySelector('[data-testid=gradient-strip-note]') || {}).textContent,
  };
}"""


@pytest.fixture(scope="module")
def lab_page(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "gradient_pictures.ipynb", CELLS, viewport=(1400, 1600)) as opened:
        yield opened


def _reference(index: int):
    import torch

    import jostle

    cards = jostle.datasets.meter_cards(resolution=28, seed=0)
    generator = torch.Generator().manual_seed(1)
    nets = [jostle.init_parameters(jostle.mlp(784, 10, hidden=(16,)), generator) for _ in range(20)]
    ens = jostle.Ensemble.from_modules(nets)
    x = cards.x_test[index:index + 1]
    return jostle.gradient_pictures(ens, x, samples=(1, 4, 16, 64, None, 4), seed=0)


def test_strip_shows_each_count_with_its_norm(lab_page):
    page, errors = lab_page
    wait_for(page, "image-explorer")
    wait_for(page.locator(IMAGES), "gradient-strip")
    shown = wait_until(page, f"""(scope) => {{ const s = ({_STRIP_JS})(scope);
        return s && s.status === 'idle' && s.samples.length === 4 ? s : false; }}""", arg=IMAGES,
                       what="the gradient strip's first drawing")
    assert shown["samples"] == [1, 4, 16, 20]  # 64 and all clip to the 20 members
    assert shown["highlighted"] == [False, True, False, False]  # the attacker's S = 4
    assert all(size == [28, 28] for size in shown["sizes"])
    assert all(count > 20 for count in shown["distinct"]), shown["distinct"]  # a picture, not one flat colour
    reference = _reference(0)
    # the page shows float64 norms from the same seeded computation in another process:
    # float32 member gradients, so agreement to a few float32 roundings
    assert shown["linf"] == pytest.approx(reference.linf[:, 0].tolist(), rel=1e-5)
    for caption, count, norm in zip(shown["captions"], shown["samples"], reference.linf[:, 0]):
        assert caption.startswith(f"S = {count}") and "L-inf " in caption
        assert float(caption.split("L-inf ")[1]) == pytest.approx(float(f"{norm:.3g}"), rel=1e-3)
    assert "own scale" in shown["note"]
    screenshot(page.locator(f"{IMAGES} .jostle-tid-gradient-section").first, "gradient-strip-lab")

    page.locator(f'{IMAGES} [data-testid=image-strip-item][data-index="2"]').click()
    moved = wait_until(page, f"""([scope, before]) => {{ const s = ({_STRIP_JS})(scope);
        return s && s.status === 'idle' && s.revision > before.revision ? s : false; }}""", arg=[IMAGES, shown],
                       what="the strip for test image 2")
    assert moved["linf"] == pytest.approx(_reference(2).linf[:, 0].tolist(), rel=1e-5)
    errors.check()


def test_components_view_draws_a_row_per_count(lab_page):
    page, errors = lab_page
    view = wait_for(page, "gradient-components")
    rows = wait_until(page, """() => { const r = document.querySelector('[data-testid=gradient-components]');
        const maps = r ? Array.from(r.querySelectorAll('[data-testid=gradient-components-heat]')) : [];
        const rows = r ? Number(r.dataset.rows) : 0;
        return rows === 4 ? maps.map(c => [c.width, c.height, Number(c.dataset.samples)]) : false;
    }""", what="the components view")
    assert rows == [[784, 16, 1], [784, 16, 4], [784, 16, 16], [784, 16, 20]]
    view.scroll_into_view_if_needed()
    screenshot(view, "gradient-components-lab")
    errors.check()
