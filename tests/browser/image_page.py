"""Reading an ImageExplorer in a real page (shared by the browser tests and the browser benchmark).

Located by the data-testid hooks of widgets/TESTIDS.md, inside one widget's outer box
(``scope``, a CSS selector), since the ids repeat when a page holds several widgets.
"""
from __future__ import annotations

from .harness import WIDGET_TIMEOUT_S, wait_until

IMAGES = ".jostle-image-explorer"

# A function of the scope selector; plain JSON, so Python can compare snapshots.
PANELS_JS = """(scope) => {
  const root = document.querySelector(scope);
  if (!root) return null;
  const get = (id) => root.querySelector(`[data-testid="${id}"]`);
  const panels = get('image-panels-root'), strip = get('image-strip'), status = get('status-line');
  const original = get('image-original');
  const chart = get('predictive-chart');
  return {
    revision: Number(panels ? panels.dataset.revision : -1), maxAbs: panels ? Number(panels.dataset.maxAbs) : null,
    viewRevision: Number(panels && panels.dataset.viewRevision !== undefined ? panels.dataset.viewRevision : -1),
    selected: strip ? strip.dataset.selected : null, count: strip ? Number(strip.dataset.count) : 0,
    status: status ? status.dataset.state : '', statusText: status ? status.textContent : '',
    budget: (get('budget-slider') || {dataset: {}}).dataset.value,
    original: original ? original.toDataURL() : '',
    predictive: chart
      ? Array.from(chart.querySelectorAll('.curve path.line')).map(p => p.getAttribute('d')).join('|')
      : '',
  };
}"""


def panels(page, scope: str = IMAGES) -> dict:
    """The image explorer's observable state now (see ``PANELS_JS``)."""
    return page.evaluate(PANELS_JS, scope)


def wait_for_image_explorer(page, scope: str = IMAGES, timeout: float = WIDGET_TIMEOUT_S) -> dict:
    """Wait until the panels show the kernel's first view and the status line is idle; return the snapshot."""
    return wait_until(page, f"""(scope) => {{ const s = ({PANELS_JS})(scope);
        return s && s.viewRevision >= 1 && s.status === 'idle' ? s : false; }}""", arg=scope, timeout=timeout,
                      what="the image explorer's first view (panels drawn, status idle)",
                      describe=f"""(scope) => {{ const s = ({PANELS_JS})(scope);
        return s ? {{viewRevision: s.viewRevision, status: s.status, statusText: s.statusText}} : null; }}""")
