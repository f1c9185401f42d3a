"""Helpers for the front-end checks: Notebook 7, JupyterLab's themes, text contrast, keyboard walks.

Used by test_notebook7_browser.py, test_dark_theme_browser.py and test_keyboard_browser.py.
"""
from __future__ import annotations

import json
import secrets
import sys
from pathlib import Path

from .harness import (
    _NOTEBOOK_DONE,
    _NOTEBOOK_READY,
    _RUN_ALL,
    NOTEBOOK_RUN_TIMEOUT_S,
    Server,
    free_port,
    start_server,
    wait_until,
)

DEMO_NOTEBOOKS = Path(__file__).resolve().parents[2] / "demo_notebooks"
DARK = "JupyterLab Dark"
LIGHT = "JupyterLab Light"


def notebook7_command(port: int, token: str, root: Path, settings_dir: Path, workspaces_dir: Path) -> list[str]:
    """``jupyter notebook`` (Notebook 7) with the same test settings as the JupyterLab server."""
    return [
        sys.executable, "-m", "jupyter", "notebook", "--no-browser", "--allow-root", "--ip=127.0.0.1",
        f"--port={port}", "--ServerApp.port_retries=0", f"--IdentityProvider.token={token}",
        "--JupyterNotebookApp.expose_app_in_browser=True", f"--ServerApp.root_dir={root}",
        f"--JupyterNotebookApp.user_settings_dir={settings_dir}",
        f"--JupyterNotebookApp.workspaces_dir={workspaces_dir}",
    ]


def run_open_notebook(page, name: str, timeout: float = NOTEBOOK_RUN_TIMEOUT_S) -> None:
    """Run every cell of the notebook ``name`` already open in the page; fail with any traceback."""
    wait_until(page, _NOTEBOOK_READY, arg=name, timeout=timeout, what=f"{name} to open with a kernel")
    page.evaluate(_RUN_ALL, name)
    result = wait_until(page, _NOTEBOOK_DONE, arg=name, timeout=timeout, what=f"every cell of {name} to finish")
    if result["errors"]:
        raise AssertionError(f"a cell of {name} raised:\n" + "\n\n".join(result["errors"]))


def first_tour_view_cells() -> list[str]:
    """The first tour's code cells up to the one that shows the Comparison (the later cells
    attack every test reading and only print)."""
    notebook = json.loads((DEMO_NOTEBOOKS / "01_first_tour.ipynb").read_text(encoding="utf-8"))
    cells = []
    for cell in notebook["cells"]:
        if cell["cell_type"] != "code":
            continue
        source = "".join(cell["source"])
        cells.append(source)
        if source.rstrip().splitlines()[-1].strip() == "board":
            return cells
    raise AssertionError("the first tour has no cell that shows `board`")


def set_theme(page, theme: str, timeout: float = 60.0) -> None:
    """Switch JupyterLab's theme with its own command and wait until the page says it is in use."""
    page.evaluate("(theme) => window.jupyterapp.commands.execute('apputils:change-theme', {theme})", theme)
    light = "true" if theme == LIGHT else "false"
    wait_until(page, "([name, light]) => document.body.dataset.jpThemeName === name"
                     " && document.body.dataset.jpThemeLight === light",
               arg=[theme, light], timeout=timeout, what=f"JupyterLab to show the theme {theme!r}")


# WCAG 2.1, success criterion 1.4.3 (Contrast, Minimum) and its definitions of "relative
# luminance" and "contrast ratio" (W3C Recommendation, 5 June 2018, section 1.4.3 and the
# glossary): L = 0.2126 R + 0.7152 G + 0.0722 B with each channel c = s/255 linearised as
# c/12.92 if c <= 0.03928 else ((c + 0.055)/1.055)^2.4; ratio (L1 + 0.05)/(L2 + 0.05) with L1 the
# lighter. Large text (>= 18 pt, or >= 14 pt bold; 1 pt = 4/3 px) needs 3:1, other text 4.5:1.
# A colour with alpha (a text colour, a background, an element's opacity) is composited over
# what lies under it first (source-over, common practice).
CONTRAST_JS = r"""(scopes) => {
  const parse = (s) => {
    const m = /rgba?\(([^)]+)\)/.exec(s || '');
    if (!m) return null;
    const p = m[1].split(/[ ,/]+/).filter(Boolean).map(Number);
    return [p[0], p[1], p[2], p.length > 3 ? p[3] : 1];
  };
  const over = (top, under) => {
    const a = top[3];
    return [0, 1, 2].map(k => top[k] * a + under[k] * (1 - a)).concat([1]);
  };
  const lin = (v) => { const c = v / 255; return c <= 0.03928 ? c / 12.92 : Math.pow((c + 0.055) / 1.055, 2.4); };
  const luminance = (c) => 0.2126 * lin(c[0]) + 0.7152 * lin(c[1]) + 0.0722 * lin(c[2]);
  const ratio = (a, b) => { const [l1, l2] = [luminance(a), luminance(b)].sort((x, y) => y - x);
    return (l1 + 0.05) / (l2 + 0.05); };
  // The colour under an element: its own and its ancestors' backgrounds, composited top-down
  // until an opaque one (the page's white canvas if none is).
  const background = (el) => {
    const layers = [];
    for (let node = el; node && node.nodeType === 1; node = node.parentElement) {
      const c = parse(getComputedStyle(node).backgroundColor);
      if (c && c[3] > 0) { layers.push(c); if (c[3] >= 1) break; }
    }
    let colour = [255, 255, 255, 1];
    for (const layer of layers.reverse()) colour = over(layer, colour);
    return colour;
  };
  const opacity = (el) => { let o = 1; for (let n = el; n && n.nodeType === 1; n = n.parentElement) {
    o *= Number(getComputedStyle(n).opacity); } return o; };
  const visible = (el) => {
    const css = getComputedStyle(el);
    if (css.visibility !== 'visible' || css.display === 'none') return false;
    const box = el.getBoundingClientRect();
    return box.width > 1 && box.height > 1;  // a 1 px clipped box is text for screen readers only
  };
  const ownText = (el) => Array.from(el.childNodes).filter(n => n.nodeType === 3).map(n => n.textContent)
    .join('').trim();
  const found = [];
  for (const scope of scopes) {
    for (const root of document.querySelectorAll(scope)) {
      for (const el of [root, ...root.querySelectorAll('*')]) {
        const tag = el.tagName.toLowerCase();
        if (tag === 'option' || tag === 'script' || tag === 'style') continue;
        const text = tag === 'select' ? (el.selectedOptions[0] || {}).textContent || '' : ownText(el);
        if (!text.trim() || !visible(el)) continue;
        const css = getComputedStyle(el);
        const svg = el instanceof SVGElement;
        const paint = parse(svg ? css.fill : css.color);
        if (!paint || css.fill === 'none' && svg) continue;
        const alpha = paint[3] * opacity(el);
        if (alpha === 0) continue;
        const bg = background(el);
        const fg = over([paint[0], paint[1], paint[2], alpha], bg);
        const size = parseFloat(css.fontSize), bold = Number(css.fontWeight) >= 700 || css.fontWeight === 'bold';
        const large = size >= 24 || (bold && size >= 56 / 3);
        found.push({scope, text: text.trim().slice(0, 60), tag, ratio: ratio(fg, bg), needed: large ? 3 : 4.5,
                    fg: fg.slice(0, 3).map(Math.round), bg: bg.slice(0, 3).map(Math.round), size});
      }
    }
  }
  return found;
}"""


def contrast(page, scopes: list[str]) -> list[dict]:
    """Every visible text element inside ``scopes`` with its WCAG 2.1 contrast ratio (see CONTRAST_JS)."""
    return page.evaluate(CONTRAST_JS, scopes)


def start_notebook7(base: Path, root: Path, env: dict[str, str]) -> Server:
    """Notebook 7 on ``root`` (windowing off, no notifications), ready for a page."""
    settings, workspaces = base / "nb7-settings", base / "nb7-workspaces"
    # Only the windowing setting: JupyterLab's notification settings name a plugin that
    # Notebook 7 lacks, and its page then throws while loading settings.
    tracker = settings / "@jupyterlab" / "notebook-extension" / "tracker.jupyterlab-settings"
    tracker.parent.mkdir(parents=True, exist_ok=True)
    tracker.write_text(json.dumps({"windowingMode": "none"}), encoding="utf-8")
    workspaces.mkdir(exist_ok=True)
    port, token = free_port(), secrets.token_hex(16)
    url = f"http://127.0.0.1:{port}"
    return start_server("Notebook 7", notebook7_command(port, token, root, settings, workspaces), cwd=root, env=env,
                        log_path=base / "notebook7.log", ready_url=f"{url}/api/status?token={token}", url=url,
                        token=token, root=root)
