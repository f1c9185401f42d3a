"""Every jostle view stays readable in JupyterLab's dark theme (and in the light one).

The first tour's Comparison (its cells up to the one that shows it) and an ImageExplorer are
run in one JupyterLab page. In each theme, every visible text element inside the views (HTML
text, bqplot's SVG text, the selects' shown option) is measured against the colour under it:
WCAG 2.1 contrast ratio, at least 4.5:1 for text and 3:1 for large text (success criterion
1.4.3; the formulas are cited in front_ends.CONTRAST_JS). The theme is switched with
JupyterLab's own command while the views are on the page, so the canvases must follow it.
Screenshots: test-artifacts/theme-light-*.png and theme-dark-*.png.
"""
from __future__ import annotations

import json

import pytest

from .front_ends import DARK, LIGHT, contrast, first_tour_view_cells, set_theme
from .harness import (
    ARTIFACTS,
    PageErrors,
    block_outside_traffic,
    close_all_tabs,
    open_and_run,
    screenshot,
    wait_until,
    write_notebook,
)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

COMPARISON, IMAGES = ".jostle-comparison", ".jostle-image-explorer"
SCOPES = [COMPARISON, IMAGES]
IMAGE_CELL = '''from jostle.widgets import ImageExplorer

def random_ensemble(in_features, classes, members, seed):
    generator = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(in_features, classes, hidden=(16,)), generator) for _ in range(members)]
    return jostle.Ensemble.from_modules(nets)

images = ImageExplorer(random_ensemble(64, 10, 4, seed=1), jostle.datasets.digits(seed=0), strip=8, steps=10)
images'''
RUN_TIMEOUT_S = 240.0

# Every status line idle and every map / image view drawn from a kernel view.
_SETTLED_JS = """(scopes) => {
  const roots = scopes.map(s => document.querySelector(s));
  if (roots.some(r => !r)) return false;
  const states = roots.flatMap(r => Array.from(r.querySelectorAll('[data-testid="status-line"]'))
    .map(s => s.dataset.state));
  const maps = roots.flatMap(r => Array.from(r.querySelectorAll('[data-view-revision]')));
  const panels = roots.flatMap(r => Array.from(r.querySelectorAll('[data-testid="image-panels-root"]')));
  return states.length >= 3 && states.every(s => s === 'idle') && maps.length >= 2
    && maps.every(m => Number(m.dataset.viewRevision) >= 1)
    && panels.length >= 1 && panels.every(p => Number(p.dataset.revision) >= 1);
}"""

# How the canvases look: mean luminance of the image panels' and strip's pixels (the grey ramp
# runs from the theme's surface to its ink), and how often each map has redrawn.
_CANVASES_JS = """(scope) => {
  const root = document.querySelector(scope);
  const luma = (canvas) => {
    const d = canvas.getContext('2d').getImageData(0, 0, canvas.width, canvas.height).data;
    let sum = 0;
    for (let k = 0; k < d.length; k += 4) sum += 0.2126 * d[k] + 0.7152 * d[k + 1] + 0.0722 * d[k + 2];
    return sum / (d.length / 4);
  };
  const canvases = ['image-original', 'image-attacked', 'image-strip-item'].map(
    id => root.querySelector(`[data-testid="${id}"]`));
  return {luma: canvases.map(luma),
          maps: Array.from(document.querySelectorAll('[data-testid="explorer-map-root"]'))
            .map(m => Number(m.dataset.revision))};
}"""


@pytest.fixture(scope="module")
def themed_page(chromium_browser, lab_server):
    name = "theme_check.ipynb"
    write_notebook(lab_server.root / name, first_tour_view_cells() + [IMAGE_CELL])
    context = chromium_browser.new_context(viewport={"width": 1500, "height": 2400})
    page = context.new_page()
    block_outside_traffic(page)
    errors = PageErrors(page)
    try:
        open_and_run(page, lab_server, name, timeout=RUN_TIMEOUT_S)
        wait_until(page, _SETTLED_JS, arg=SCOPES, timeout=RUN_TIMEOUT_S, what="every view drawn and idle")
        yield page, errors
    finally:
        # The theme is a user setting of the session's JupyterLab: leave it light for the next module.
        try:
            set_theme(page, LIGHT)
            close_all_tabs(page)
        finally:
            context.close()
    errors.check()


def _check(page, theme: str) -> dict:
    found = contrast(page, SCOPES)
    ARTIFACTS.mkdir(exist_ok=True)
    (ARTIFACTS / f"contrast-{theme}.json").write_text(json.dumps(found, indent=1), encoding="utf-8")
    kinds = {f["tag"] for f in found}
    # the measurement saw the views' text of every kind: HTML labels, SVG chart text, selects
    assert {"text", "select", "label"} <= kinds, kinds
    assert len(found) > 50, f"only {len(found)} text elements measured"
    failing = [f for f in found if f["ratio"] < f["needed"]]
    assert not failing, f"{len(failing)} text elements below WCAG 2.1 AA in {theme}:\n" + "\n".join(
        f"{f['ratio']:.2f} < {f['needed']}: {f['tag']} {f['text']!r} fg {f['fg']} on {f['bg']}" for f in failing[:30])
    lowest = min(found, key=lambda f: f["ratio"])
    print(f"{theme}: {len(found)} text elements, lowest contrast {lowest['ratio']:.2f}:1 ({lowest['tag']} "
          f"{lowest['text']!r}, fg {lowest['fg']} on {lowest['bg']})")
    for scope, picture in ((COMPARISON, "first-tour"), (IMAGES, "image-explorer")):
        widget = page.locator(scope).first
        widget.scroll_into_view_if_needed()
        assert screenshot(widget, f"theme-{theme}-{picture}").stat().st_size > 10_000
    return lowest


def test_views_meet_wcag_contrast_in_the_light_and_the_dark_theme(themed_page):
    page, errors = themed_page
    set_theme(page, LIGHT)
    light = page.evaluate(_CANVASES_JS, IMAGES)
    _check(page, "light")
    set_theme(page, DARK)
    # The canvases repaint from the theme's colours: the digits' background (the low end of
    # the grey ramp) turns from the light surface to the dark one, and every map redraws.
    dark = wait_until(page, f"""(light) => {{ const now = ({_CANVASES_JS})({IMAGES!r});
        return now.luma.every((v, k) => v < light.luma[k] - 60)
          && now.maps.every((r, k) => r > light.maps[k]) ? now : false; }}""",
                      arg=light, timeout=30, what="the canvases to repaint in the dark theme",
                      describe=f"() => ({_CANVASES_JS})({IMAGES!r})")
    assert all(d < 128 < lt for d, lt in zip(dark["luma"], light["luma"])), (light, dark)
    _check(page, "dark")
    errors.check()


def _wcag_ratio(fg: tuple[float, ...], bg: tuple[float, ...]) -> float:
    """WCAG 2.1 contrast ratio written out again in Python (the definitions cited in front_ends)."""
    def luminance(colour):
        lin = [c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4 for c in (v / 255 for v in colour)]
        return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]

    high, low = sorted((luminance(fg), luminance(bg)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_contrast_measure_follows_the_wcag_definitions(page):
    """The page-side measure on a static page of known colours (no server)."""
    page.set_content("""<body style="background: #ffffff; margin: 0">
      <div class="jostle-root" style="background: #ffffff">
        <span id="black" style="color: #000000">black on white</span>
        <span id="grey" style="color: #777777">grey 77 on white</span>
        <div style="background: rgba(0, 0, 0, 0)"><span style="color: rgba(0, 0, 0, 0.54)">translucent ink</span></div>
        <div style="background: #222222"><span style="color: #dddddd; font-size: 24px">large light on dark</span></div>
        <svg width="200" height="40"><text x="0" y="20" fill="#767676">svg text</text></svg>
      </div></body>""")
    found = {f["text"]: f for f in contrast(page, [".jostle-root"])}
    assert set(found) == {"black on white", "grey 77 on white", "translucent ink", "large light on dark", "svg text"}
    # The extremes of the scale are 21:1 and 1:1 (WCAG 2.1, definition of contrast ratio).
    assert found["black on white"]["ratio"] == pytest.approx(21.0, rel=1e-9)
    # #777777 on white: 4.48:1, just below AA (a standard example of the trade); #767676 just above.
    assert found["grey 77 on white"]["ratio"] == pytest.approx(_wcag_ratio((119,) * 3, (255,) * 3), rel=1e-9)
    assert found["grey 77 on white"]["ratio"] < 4.5 < found["svg text"]["ratio"]
    assert found["svg text"]["ratio"] == pytest.approx(_wcag_ratio((118,) * 3, (255,) * 3), rel=1e-9)
    # 54% black over white composites to 255 * 0.46 = 117.3 per channel (source-over); the
    # page rounds nothing before the ratio, so only float64 rounding separates the two.
    assert found["translucent ink"]["ratio"] == pytest.approx(_wcag_ratio((117.3,) * 3, (255,) * 3), rel=1e-6)
    # the transparent box is skipped on the way up; the dark one is the text's background
    assert found["large light on dark"]["bg"] == [34, 34, 34]
    assert found["large light on dark"]["needed"] == 3 and found["black on white"]["needed"] == 4.5
