"""Reading and driving a jostle explorer in a real page (shared by tests and the browser benchmark).

Everything is located by the data-testid hooks listed in widgets/TESTIDS.md. Charts are
bqplot SVG: a chart's "signature" is the geometry of its marks (line paths, bar heights),
which changes exactly when the chart draws different data.
"""
from __future__ import annotations

from typing import Any

from .harness import WIDGET_TIMEOUT_S, wait_for, wait_until

# Installed once per page; returns plain JSON so Python can compare snapshots.
SNAPSHOT_JS = """() => {
  if (window.__jostleSnapshot) return true;
  const q = (root, id) => root.querySelector(`[data-testid="${id}"]`);
  const signature = (root, id) => {
    const chart = q(root, id);
    if (!chart) return null;
    const parts = [];
    for (const p of chart.querySelectorAll('.curve path.line')) parts.push(p.getAttribute('d') || '');
    for (const g of chart.querySelectorAll('.bargroup')) {
      parts.push((g.getAttribute('transform') || '') + ':' +
                 Array.from(g.querySelectorAll('rect')).map(r => r.getAttribute('height')).join(','));
    }
    return parts.join('|');
  };
  // The attacker-S marker is the one vertical two-point line of the fade chart.
  const markerX = (root) => {
    const chart = q(root, 'fade-chart');
    if (!chart) return null;
    for (const p of chart.querySelectorAll('.curve path.line')) {
      const m = /^M([-\\d.e]+),[-\\d.e]+L([-\\d.e]+),[-\\d.e]+$/.exec(p.getAttribute('d') || '');
      if (m && Math.abs(Number(m[1]) - Number(m[2])) < 1e-6) return Number(m[1]);
    }
    return null;
  };
  window.__jostleSnapshot = (scopeSelector, withPixels) => {
    const root = scopeSelector ? document.querySelector(scopeSelector) : document;
    const map = q(root, 'explorer-map-root') || {dataset: {}};
    const status = q(root, 'status-line') || {dataset: {}, textContent: ''};
    const canvas = q(root, 'explorer-map');
    const value = (id) => { const el = q(root, id); return el ? el.dataset.value : null; };
    return {
      viewRevision: Number(map.dataset.viewRevision || -1), layerRevision: Number(map.dataset.layerRevision || -1),
      revision: Number(map.dataset.revision || -1), point: map.dataset.point || '',
      pathEnd: map.dataset.pathEnd || '', pathLength: Number(map.dataset.pathLength || 0),
      ballRadiusPx: Number(map.dataset.ballRadiusPx || 0),
      status: status.dataset.state || '', statusText: status.textContent || '',
      predictive: signature(root, 'predictive-chart'), spread: signature(root, 'spread-chart'),
      path: signature(root, 'path-chart'), fade: signature(root, 'fade-chart'), markerX: markerX(root),
      uncertainty: (q(root, 'uncertainty-text') || {textContent: ''}).textContent,
      budget: value('budget-slider'), samples: value('samples-slider'),
      pixels: withPixels && canvas ? canvas.toDataURL() : '',
    };
  };
  return true;
}"""

# Wait for a view newer than `before` with the status idle and every named field changed.
_UPDATED_JS = """([before, fields, scope]) => {
  const now = window.__jostleSnapshot(scope, fields.includes('pixels'));
  if (!(now.viewRevision > before.viewRevision && now.status === 'idle')) return false;
  for (const f of fields) { if (now[f] === before[f]) return false; }
  return now;
}"""

DESCRIBE_JS = """([before, fields, scope]) => {
  const now = window.__jostleSnapshot(scope, fields.includes('pixels'));
  return {viewRevision: now.viewRevision, status: now.status, statusText: now.statusText,
          unchanged: fields.filter(f => now[f] === before[f])};
}"""


def snapshot(page, scope: str | None = None, pixels: bool = False) -> dict[str, Any]:
    """The explorer's observable state: hooks, chart signatures and (optionally) the map's pixels."""
    page.evaluate(SNAPSHOT_JS)
    return page.evaluate("([scope, pixels]) => window.__jostleSnapshot(scope, pixels)", [scope, pixels])


def wait_for_explorer(page, scope: str | None = None, timeout: float = WIDGET_TIMEOUT_S) -> dict[str, Any]:
    """Wait until the explorer shows its first kernel view with every chart drawn; return the snapshot."""
    wait_for(page, "explorer-map", timeout=timeout)
    page.evaluate(SNAPSHOT_JS)
    return wait_until(page, """(scope) => { const s = window.__jostleSnapshot(scope);
        return s.viewRevision >= 1 && s.status === 'idle'
          && s.predictive && s.spread && s.path && s.fade ? s : false; }""",
                      arg=scope, timeout=timeout, what="the explorer's first view (status idle, every chart drawn)")


def wait_for_update(page, before: dict, fields: list[str], what: str, scope: str | None = None,
                    timeout: float = WIDGET_TIMEOUT_S) -> dict[str, Any]:
    """Wait for a newer kernel view in which each of ``fields`` differs from ``before``."""
    return wait_until(page, _UPDATED_JS, arg=[before, fields, scope], timeout=timeout, what=what,
                      describe=DESCRIBE_JS)


def click_map(page, fx: float, fy: float, scope: str | None = None) -> None:
    """Click the map at fractions (fx, fy) of its width and height (from the top left)."""
    canvas = page.locator(f"{scope or ''} [data-testid=explorer-map]".strip()).first
    box = canvas.bounding_box()
    page.mouse.click(box["x"] + fx * box["width"], box["y"] + fy * box["height"])


def set_range(page, testid: str, value: float, scope: str | None = None) -> None:
    """Set a native range input as a user dragging it would (input event)."""
    page.locator(f"{scope or ''} [data-testid={testid}]".strip()).first.fill(str(value))
