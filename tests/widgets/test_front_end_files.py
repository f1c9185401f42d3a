"""Static checks of the ES modules and CSS (no browser): structure, text-only user strings, ids."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from jostle.widgets import _charts, _palette
from jostle.widgets._assets import asset_path

ROOT = Path(__file__).resolve().parents[2]
OWN_PY = ["explorer.py", "image_explorer.py", "comparison.py", "_charts.py", "_gradient_strip_part.py"]
MODULES = ["explorer_map.js", "attack_controls.js", "status_line.js", "image_strip.js", "image_panels.js",
           "gradient_strip.js", "gradient_components.js"]


@pytest.mark.parametrize("name", MODULES)
def test_module_is_self_contained_and_never_parses_html(name):
    source = asset_path(name).read_text(encoding="utf-8")
    assert re.search(r"^export default \{ render \};$", source, re.M)
    assert not re.search(r"^\s*import\s", source, re.M)  # no CDN or relative imports (no build step)
    # user strings go in as text: none of the HTML-parsing sinks appear (common practice, OWASP DOM XSS)
    for sink in ("innerHTML", "outerHTML", "insertAdjacentHTML", "document.write", "eval(", "new Function"):
        assert sink not in source, f"{name} uses {sink}"
    assert len(source.splitlines()) <= 250


def test_every_data_testid_in_the_views_is_listed_in_testids_md():
    listed = set(re.findall(r"`([a-z][a-z0-9-]+)`", (ROOT / "widgets" / "TESTIDS.md").read_text()))
    used = set()
    for name in MODULES:
        used |= set(re.findall(r'(?:dataset\.testid|testid:)\s*=?\s*"([a-z0-9-]+)"', asset_path(name).read_text()))
        used |= set(re.findall(r'"(image-(?:original|perturbation|attacked))"', asset_path(name).read_text()))
    for name in OWN_PY:
        text = (ROOT / "widgets" / name).read_text()
        used |= set(re.findall(r'jostle-tid-([a-z0-9-]+)"', text)) | set(re.findall(r'_figure\("([a-z-]+)"', text))
    used.discard("")
    assert {"explorer-map", "budget-slider", "samples-slider", "status-line", "predictive-chart", "spread-chart",
            "path-chart", "fade-chart", "image-strip", "image-original", "image-perturbation",
            "image-attacked"} <= used
    assert used <= listed, f"not in TESTIDS.md: {sorted(used - listed)}"


def test_python_palette_mirrors_theme_css():
    css = asset_path("theme.css").read_text()
    for k, colour in enumerate(_palette.CLASS_COLOURS):
        assert re.search(rf"--jostle-class-{k}:\s*{colour}\b", css, re.I), (k, colour)
    assert re.search(rf"--jostle-attack:\s*{_palette.ATTACK_COLOUR}\b", css, re.I)
    assert re.search(rf"--jostle-input:\s*{_palette.INPUT_COLOUR}\b", css, re.I)


@pytest.mark.parametrize("name", ["theme.css", "gradient_pictures.css"])
def test_css_is_scoped_and_themed(name):
    css = asset_path(name).read_text()
    rules = re.sub(r"/\*.*?\*/", "", css, flags=re.S)
    for selector in re.findall(r"(^|\})\s*([^{}]+)\{", rules):
        for part in selector[1].split(","):
            assert part.strip().startswith(".jostle-"), part  # every rule under a jostle class
    for variable in re.findall(r"var\((--jp-[a-z0-9-]+)(,?)", css):
        assert variable[1] == ",", f"{variable[0]} has no fallback"


def _relative_luminance(hex_colour: str) -> float:
    # WCAG 2.1, "relative luminance" (sRGB linearised, weights 0.2126, 0.7152, 0.0722)
    channels = [int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)]
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


def test_fallback_text_colours_meet_wcag_aa_contrast():
    # WCAG 2.1 success criterion 1.4.3: text contrast (L1 + 0.05) / (L2 + 0.05) >= 4.5 : 1,
    # for the colours used outside JupyterLab (the --jp-* fallbacks)
    css = asset_path("theme.css").read_text()
    fallback = dict(re.findall(r"--jostle-([a-z]+): var\(--jp-[a-z0-9-]+, (#[0-9a-f]{6})\)", css))
    assert {"ink", "muted", "surface", "raised", "border", "focus", "error"} <= set(fallback)
    for text in ("ink", "muted", "focus", "error"):
        for ground in ("surface", "raised"):
            light, dark = sorted((_relative_luminance(fallback[text]), _relative_luminance(fallback[ground])))[::-1]
            assert (light + 0.05) / (dark + 0.05) >= 4.5, (text, ground)
    assert fallback["ink"] in _charts.INK and fallback["muted"] in _charts.MUTED  # bqplot charts agree
