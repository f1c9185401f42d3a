"""Static checks of the ES modules and CSS (no browser): structure, text-only user strings, ids."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from jostle.widgets import _palette
from jostle.widgets._assets import asset_path

ROOT = Path(__file__).resolve().parents[2]
OWN_PY = ["explorer.py", "image_explorer.py", "comparison.py", "_charts.py"]
MODULES = ["explorer_map.js", "attack_controls.js", "status_line.js", "image_strip.js", "image_panels.js"]


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


def test_css_is_scoped_and_themed():
    css = asset_path("theme.css").read_text()
    rules = re.sub(r"/\*.*?\*/", "", css, flags=re.S)
    for selector in re.findall(r"(^|\})\s*([^{}]+)\{", rules):
        for part in selector[1].split(","):
            assert part.strip().startswith(".jostle-"), part  # every rule under a jostle class
    for variable in re.findall(r"var\((--jp-[a-z0-9-]+)(,?)", css):
        assert variable[1] == ",", f"{variable[0]} has no fallback"
