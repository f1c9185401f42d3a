"""ImageExplorer and Comparison in a real JupyterLab page.

One notebook holds both widgets (seeded random nets: the views, not the fit, are under
test); every locator is scoped to one widget's outer box, since ids repeat on the page.
"""
from __future__ import annotations

import pytest

from .harness import lab_notebook, screenshot, wait_for, wait_until
from .image_page import IMAGES, PANELS_JS, panels

pytestmark = [pytest.mark.browser, pytest.mark.slow]

COMPARISON = ".jostle-comparison"
MARKUP_LABEL = "<b>first</b> posterior"
CELLS = [
    '''import torch, jostle
from jostle.widgets import Comparison, ImageExplorer

def random_ensemble(in_features, classes, members, seed):
    generator = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(in_features, classes, hidden=(16,)), generator) for _ in range(members)]
    return jostle.Ensemble.from_modules(nets)

digits = jostle.datasets.digits(seed=0)
images = ImageExplorer(random_ensemble(64, 10, 4, seed=1), digits, strip=8, steps=10, budget=0.1)
images''',
    f'''moons = jostle.datasets.moons(n_train=60, n_test=20, seed=0)
comparison = Comparison([random_ensemble(2, 2, 4, seed=2), random_ensemble(2, 2, 3, seed=3)], moons,
                        labels=[{MARKUP_LABEL!r}, "second posterior"], grid=24, steps=10)
comparison''',
]

@pytest.fixture(scope="module")
def lab_widgets(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "images_and_comparison.ipynb", CELLS,
                      viewport=(1400, 1400)) as opened:
        yield opened


def _wait_panels(page, condition: str, arg, what: str) -> dict:
    return wait_until(page, f"""([scope, arg]) => {{ const s = ({PANELS_JS})(scope);
        return s && s.status === 'idle' && ({condition}) ? s : false; }}""", arg=[IMAGES, arg], what=what,
                      describe=f"""([scope, arg]) => {{ const s = ({PANELS_JS})(scope);
        return {{...s, original: s.original === (arg || {{}}).original ? 'unchanged' : 'changed',
                 predictive: s.predictive === (arg || {{}}).predictive ? 'unchanged' : 'changed'}}; }}""")


def test_image_explorer_choosing_an_image_updates_the_panels(lab_widgets):
    page, errors = lab_widgets
    wait_for(page, "image-explorer")
    wait_for(page.locator(IMAGES), "image-panels-root")
    before = _wait_panels(page, "s.revision >= 1 && s.count === 8", None, "the image explorer's first view")
    assert before["selected"] == "0"

    page.locator(f'{IMAGES} [data-testid=image-strip-item][data-index="3"]').click()
    after = _wait_panels(page, "s.selected === '3' && s.revision > arg.revision && s.predictive !== arg.predictive"
                               " && s.viewRevision > arg.viewRevision", before, "the panels for test image 3")
    # PGD iterates stay inside the L-inf ball of radius eps (Madry et al. 2018).
    assert 0 < after["maxAbs"] <= float(after["budget"]) + 1e-6
    screenshot(page.locator(IMAGES).first, "image-explorer-lab")

    item = page.locator(f'{IMAGES} [data-testid=image-strip-item][data-index="5"]')
    item.focus()
    page.keyboard.press("Enter")
    _wait_panels(page, "s.selected === '5' && s.revision > arg.revision", after,
                 "the panels for test image 5 (keyboard)")
    errors.check()


def test_comparison_columns_share_the_budget_and_show_labels_as_text(lab_widgets):
    page, errors = lab_widgets
    columns = page.locator(f"{COMPARISON} [data-testid=comparison-column]")
    wait_for(page, "comparison")
    wait_for(page.locator(COMPARISON), "comparison-column")
    assert columns.count() == 2
    labels = page.locator(f"{COMPARISON} [data-testid=comparison-label]").all_inner_texts()
    assert labels == [MARKUP_LABEL, "second posterior"]
    assert page.locator(f"{COMPARISON} b").count() == 0  # the markup stayed text

    sliders = page.locator(f"{COMPARISON} [data-testid=budget-slider]")
    wait_until(page, "(scope) => document.querySelectorAll("
                     "scope + ' [data-testid=explorer-map-root][data-view-revision]')"
                     ".length === 2 && Array.from(document.querySelectorAll(scope + ' [data-testid=status-line]'))"
                     ".every(s => s.dataset.state === 'idle')", arg=COMPARISON, what="both explorers' first views")
    radii = page.locator(f"{COMPARISON} [data-testid=explorer-map-root]").evaluate_all(
        "nodes => nodes.map(n => Number(n.dataset.ballRadiusPx))")
    sliders.nth(0).fill("0.3")
    # The kernel links the columns: the second explorer's slider and eps-ball follow the first.
    moved = wait_until(page, """([scope, radii]) => {
        const sliders = Array.from(document.querySelectorAll(scope + ' [data-testid=budget-slider]'));
        const maps = Array.from(document.querySelectorAll(scope + ' [data-testid=explorer-map-root]'));
        const values = sliders.map(s => s.dataset.value);
        const now = maps.map(m => Number(m.dataset.ballRadiusPx));
        return values[0] === values[1] && Number(values[1]) > 0.2 && now.every((r, k) => r > radii[k]) ? values : false;
    }""", arg=[COMPARISON, radii], what="the second column to follow the first column's budget")
    assert float(moved[0]) == pytest.approx(0.3, abs=0.01)
    screenshot(page.locator(COMPARISON).first, "comparison-lab")
    errors.check()


def test_original_panel_draws_the_chosen_image(lab_widgets):
    """The panel's grey levels must follow the image's values: darker for larger values."""
    from scipy.stats import spearmanr

    import jostle

    page, errors = lab_widgets
    index = int(panels(page)["selected"])
    image = jostle.datasets.digits(seed=0).x_test[index].numpy()
    luminance = page.locator(f"{IMAGES} [data-testid=image-original]").evaluate("""canvas => {
        const data = canvas.getContext('2d').getImageData(0, 0, canvas.width, canvas.height).data;
        const out = [];
        for (let k = 0; k < data.length; k += 4) {
            out.push(0.2126 * data[k] + 0.7152 * data[k + 1] + 0.0722 * data[k + 2]);
        }
        return out;
    }""")
    assert len(luminance) == image.size
    assert len(set(luminance)) > 1, "the original panel is one flat colour"
    # A monotone decreasing grey map gives Spearman rank correlation -1 (scipy.stats.spearmanr).
    assert spearmanr(image, luminance).statistic < -0.99
    errors.check()
