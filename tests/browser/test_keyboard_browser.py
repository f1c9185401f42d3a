"""Keyboard and screen-reader access to jostle's views in a real JupyterLab page.

A Comparison (two explorers and the shared samples slider), an ImageExplorer and a
SweepExplorer are run in one notebook. Checked: Tab alone reaches every control of each widget (the walk starts on the
widget's output area, as a user tabbing from the cell's output would, and records the focused
element until focus leaves the widget); every control has an accessible name (aria-label,
aria-labelledby, a <label>, or for ipywidgets controls their description label); the map's
picked point moves by the documented arrow-key step (1/64 of the box per press, 10/64 with
Shift: js/explorer_map.js, widgets/TESTIDS.md); and the map's ARIA description states the
layer, the picked point and the predicted class, and follows them.
"""
from __future__ import annotations

import re

import pytest

from .explorer_page import snapshot, wait_for_explorer, wait_for_update
from .harness import lab_notebook, wait_until

pytestmark = [pytest.mark.browser, pytest.mark.slow]

COMPARISON, IMAGES, SWEEP = ".jostle-comparison", ".jostle-image-explorer", ".jostle-sweep-explorer"
FIRST = f"{COMPARISON} .jostle-explorer"
MOONS = dict(n_train=60, n_test=20, seed=0)
CLASSES = ["steady", "leak"]
CELLS = [
    f'''import torch, jostle
from jostle.widgets import Comparison, ImageExplorer

def random_ensemble(in_features, classes, members, seed):
    generator = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(in_features, classes, hidden=(16,)), generator) for _ in range(members)]
    names = {CLASSES!r} if classes == 2 else [str(c) for c in range(classes)]
    return jostle.Ensemble.from_modules(nets, meta={{"classes": names}})

raw = jostle.datasets.moons(**{MOONS!r})
moons = jostle.datasets.from_arrays(raw.x_train, raw.y_train, raw.x_test, raw.y_test, classes={CLASSES!r},
                                    name="moons", bounds=raw.bounds)
comparison = Comparison([random_ensemble(2, 2, 4, seed=2), random_ensemble(2, 2, 3, seed=3)], moons,
                        grid=24, steps=10)
comparison''',
    '''images = ImageExplorer(random_ensemble(64, 10, 4, seed=1), jostle.datasets.digits(seed=0), strip=4, steps=10)
images''',
    # made-up scores in a store written directly: the chart's controls are under test, not a fit
    '''import numpy as np, tempfile, pathlib
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.spec import run_key
from jostle.widgets import SweepExplorer

sweep = jostle.Sweep(datasets=[{"name": "moons", "n_test": 20}], methods=["map", "deep_ensemble"],
                     architectures=[{"depth": 1, "width": 4}], train_sizes=[20], seeds=[0, 1],
                     evaluation={"budgets": [0.1, 0.2], "points": 5, "attacks": ["fgsm"]})
rng = np.random.default_rng(3)
store = pathlib.Path(tempfile.mkdtemp()) / "runs.sqlite"
with RunStore(store) as db:
    for config in sweep.runs():
        attacks = [{"attack": a["label"], "method": a["method"], "norm": "inf", "steps": a["steps"], "samples": None,
                    "budget": b, "success_rate": float(rng.uniform()), "robustness": float(rng.uniform())}
                   for a in config["evaluation"]["attacks"] for b in config["evaluation"]["budgets"]]
        db.record({"key": run_key(config), "config": config, "status": "ok", "versions": {},
                   "metrics": {"accuracy": float(rng.uniform(0.6, 1)), "nll": 0.4, "ece": 0.05, "members": 1,
                               "attacks": attacks}})
SweepExplorer(store)''',
]

# Every focusable control inside `scope`, marked with data-kb-index, with its accessible name.
_CONTROLS_JS = r"""(scope) => {
  const root = document.querySelector(scope);
  const focusable = 'input, select, button, textarea, a[href], [tabindex], [contenteditable="true"], '
    + '[contenteditable=""]';
  const name = (el) => {
    const aria = (el.getAttribute('aria-label') || '').trim();
    if (aria) return aria;
    const by = (el.getAttribute('aria-labelledby') || '').split(/\s+/).filter(Boolean)
      .map(id => (document.getElementById(id) || {}).textContent || '').join(' ').trim();
    if (by) return by;
    const labels = Array.from(el.labels || []).map(l => l.textContent).join(' ').trim();
    if (labels) return labels;
    // an ipywidgets control: the description label of its own widget box
    const box = el.closest('.widget-inline-hbox');
    const description = box && box.querySelector(':scope > .widget-label');
    return description ? description.textContent.trim() : '';
  };
  const out = [];
  for (const el of root.querySelectorAll('*')) {
    const box = el.getBoundingClientRect(), css = getComputedStyle(el);
    // what the browser puts in the Tab order: tabindex >= 0, else inputs, selects, links and
    // contenteditable read-outs (whose tabIndex property reads -1); a scrolling box alone is
    // left to _FOCUSED_JS
    const inOrder = el.hasAttribute('tabindex') ? el.tabIndex >= 0 : el.matches(focusable) || el.isContentEditable;
    if (!inOrder) continue;
    if (el.disabled || !box.width || !box.height || css.visibility !== 'visible') continue;
    el.dataset.kbIndex = String(out.length);
    out.push({index: out.length, tag: el.tagName.toLowerCase(), testid: el.dataset.testid || '',
              role: el.getAttribute('role') || '', name: name(el), editable: el.isContentEditable});
  }
  return out;
}"""

# Put the focus on the output area that holds `scope` (made focusable by script only).
_FOCUS_OUTPUT_JS = """(scope) => {
  const area = document.querySelector(scope).closest('.jp-OutputArea');
  area.tabIndex = -1; area.focus();
  return document.activeElement === area;
}"""

# The focused element inside `scope`: its control index; "scroller" for a box that scrolls its
# overflow (Chromium makes those keyboard-focusable, so keys can scroll them); null outside.
_FOCUSED_JS = """(scope) => {
  const el = document.activeElement, root = document.querySelector(scope);
  const scrolls = (e) => !e.hasAttribute('tabindex')
    && (e.scrollWidth > e.clientWidth || e.scrollHeight > e.clientHeight);
  if (el && root.contains(el) && el.dataset.kbIndex === undefined && scrolls(el)) return 'scroller';
  return el && root.contains(el) ? (el.dataset.kbIndex === undefined
    ? `unlisted ${el.tagName} ${el.className} tabindex=${el.getAttribute('tabindex')}`
    : Number(el.dataset.kbIndex)) : null;
}"""


@pytest.fixture(scope="module")
def keyboard_page(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "keyboard.ipynb", CELLS, viewport=(1500, 2000)) as (page, errors):
        wait_for_explorer(page, FIRST)
        wait_until(page, "(s) => { const p = document.querySelector(s + ' [data-testid=image-panels-root]');"
                         " return p && Number(p.dataset.revision) >= 1; }", arg=IMAGES, what="the image panels")
        wait_until(page, "(s) => document.querySelectorAll(s + ' [data-testid=sweep-point]').length === 4",
                   arg=SWEEP, what="the sweep chart's 4 runs")
        yield page, errors


@pytest.mark.parametrize("scope, least", [(COMPARISON, 2 * 8 + 1), (IMAGES, 4 + 6), (SWEEP, 4 + 2 + 3)])
def test_tab_reaches_every_control_and_each_has_a_name(keyboard_page, scope, least):
    page, errors = keyboard_page
    controls = page.evaluate(_CONTROLS_JS, scope)
    # per explorer: map, layer select, 3 sliders, 3 selects; the Comparison adds its samples
    # slider; the ImageExplorer has 4 strip items and 6 attack controls; the SweepExplorer a mark
    # per run (4), a checkbox per method (2) and its 3 selects
    assert len(controls) >= least, controls
    unnamed = [c for c in controls if not c["name"]]
    assert not unnamed, f"controls with no accessible name: {unnamed}"
    # a focusable element with no native role says what it is (WAI-ARIA 1.2: role on custom controls)
    native = {"input", "select", "button", "textarea", "a"}
    roleless = [c for c in controls if c["tag"] not in native and not c["role"] and not c["editable"]]
    assert not roleless, f"custom controls with no role: {roleless}"
    assert page.evaluate(_FOCUS_OUTPUT_JS, scope)
    seen = []
    for _ in range(2 * len(controls) + 10):
        page.keyboard.press("Tab")
        focused = page.evaluate(_FOCUSED_JS, scope)
        if focused is None:
            break
        seen.append(focused)
    else:
        raise AssertionError(f"focus never left {scope} after {len(seen)} presses of Tab: {seen}")
    assert not [f for f in seen if isinstance(f, str) and f != "scroller"], (seen, controls)
    seen = [f for f in seen if f != "scroller"]
    missed = [c for c in controls if c["index"] not in seen]
    assert not missed, f"Tab never reached: {missed}; focus order {seen}"
    # each control is reached once, in document order (no focus trap, no skipped-back stop)
    assert seen == sorted(seen) and len(seen) == len(set(seen)), seen
    errors.check()


def _description(page) -> str:
    canvas = page.locator(f"{FIRST} [data-testid=explorer-map]").first
    assert canvas.get_attribute("role") == "application"
    assert "input map" in canvas.get_attribute("aria-label")
    ids = canvas.get_attribute("aria-describedby").split()
    return " ".join(page.locator(f"[id='{i}']").text_content() for i in ids)


def _point(text: str) -> tuple[float, float]:
    found = re.search(r"Picked point: x (-?[\d.]+), y (-?[\d.]+)\.", text)
    assert found, text
    return float(found.group(1)), float(found.group(2))


def test_arrow_keys_move_the_picked_point_by_the_documented_step(keyboard_page):
    import jostle

    page, errors = keyboard_page
    lo, hi = (b.tolist() for b in jostle.datasets.moons(**MOONS).bounds)
    before = wait_for_explorer(page, FIRST)
    page.locator(f"{FIRST} [data-testid=explorer-map]").first.focus()
    page.keyboard.press("ArrowRight")
    after = wait_for_update(page, before, ["point", "predictive"], what="the view after ArrowRight", scope=FIRST)
    (x0, y0), (x1, y1) = ([float(v) for v in s["point"].split(",")] for s in (before, after))
    # One press moves x by 1/64 of the box's width and leaves y (float64 arithmetic in the page;
    # the JSON round trip keeps 17 digits, so 1e-9 of the span is ample).
    assert x1 - x0 == pytest.approx((hi[0] - lo[0]) / 64, abs=1e-9 * (hi[0] - lo[0]))
    assert y1 == pytest.approx(y0, abs=1e-12)
    page.keyboard.press("Shift+ArrowUp")
    moved = wait_for_update(page, after, ["point"], what="the view after Shift+ArrowUp", scope=FIRST)
    x2, y2 = (float(v) for v in moved["point"].split(","))
    assert y2 - y1 == pytest.approx(10 * (hi[1] - lo[1]) / 64, abs=1e-9 * (hi[1] - lo[1]))
    assert x2 == pytest.approx(x1, abs=1e-12)
    # the kernel got the moves: the other column, linked in the kernel, shows the same point
    second = page.locator(f"{COMPARISON} [data-testid=explorer-map-root]").nth(1)
    wait_until(page, "([el, p]) => el.dataset.point === p", arg=[second.element_handle(), moved["point"]],
               what="the second column to follow the keyboard moves")
    errors.check()


def test_map_description_states_layer_point_and_predicted_class(keyboard_page):
    page, errors = keyboard_page
    state = wait_for_explorer(page, FIRST)
    text = _description(page)
    assert "layer: posterior predictive" in text, text
    px, py = (float(v) for v in state["point"].split(","))
    # the description rounds the computed input to 3 decimals
    assert _point(text) == pytest.approx((px, py), abs=5e-4 + 1e-12)
    predicted = re.search(r"Predicted class: (\w+) \(p = ([\d.]+)\)\.", text)
    assert predicted and predicted.group(1) in CLASSES and 0.5 <= float(predicted.group(2)) <= 1, text
    assert re.search(r"Attack (flips|does not flip) the prediction\.", text), text

    # a new layer and a new point reach the description once the kernel has computed them
    page.locator(f"{FIRST} [data-testid=layer-select]").first.select_option("epistemic")
    wait_until(page, "(s) => document.querySelector(s + ' [data-testid=explorer-map-description]')"
                     ".textContent.includes('layer: epistemic')", arg=FIRST, what="the description's new layer")
    before = snapshot(page, FIRST)
    page.locator(f"{FIRST} [data-testid=explorer-map]").first.focus()
    page.keyboard.press("ArrowDown")
    after = wait_for_update(page, before, ["point"], what="the view after ArrowDown", scope=FIRST)
    qx, qy = (float(v) for v in after["point"].split(","))
    wait_until(page, """([s, y]) => { const t = document.querySelector(s + ' [data-testid=explorer-map-description]')
        .textContent; const m = /y (-?[\\d.]+)\\./.exec(t); return m && Math.abs(Number(m[1]) - y) < 6e-4; }""",
               arg=[FIRST, qy], what="the description's new point")
    assert _point(_description(page)) == pytest.approx((qx, qy), abs=5e-4 + 1e-12)
    # announced to screen readers, never drawn: visually hidden but in the accessibility tree
    hidden = page.locator(f"{FIRST} [data-testid=explorer-map-description]").first
    assert hidden.bounding_box()["width"] <= 1
    errors.check()
