"""The image panels' view on its own in Chromium, driven by a stand-in model (no kernel).

A kernel message that sets several traits fires one change event per trait, synchronously
(Backbone's ``set``, which ipywidgets uses); the view must paint once per message and mark
which view it shows.
"""
from __future__ import annotations

import pytest

from jostle.widgets._assets import canvas_module

pytestmark = [pytest.mark.browser]

_RENDER_JS = """async (source) => {
  const url = URL.createObjectURL(new Blob([source], {type: 'text/javascript'}));
  const view = (await import(url)).default;
  const wire = (values, shape) => ({shape, dtype: 'float32', buffer: new DataView(new Float32Array(values).buffer)});
  const values = {original: wire([0, 0.5, 1, 0.25], [2, 2]), perturbation: wire([0, 0, 0, 0], [2, 2]),
                  attacked: wire([0, 0.5, 1, 0.25], [2, 2]), value_range: [0, 1], scale: 0.1,
                  captions: ['original', 'perturbation', 'attacked'], max_abs: 0, view_revision: 0};
  const handlers = {};
  const model = {
    get: (key) => values[key],
    on: (events, f) => { for (const e of events.split(' ')) (handlers[e] = handlers[e] || []).push(f); },
    off: (events, f) => { for (const e of events.split(' ')) handlers[e] = (handlers[e] || []).filter(g => g !== f); },
  };
  const el = document.createElement('div');
  document.body.append(el);
  view.render({model, el});
  const frames = () => new Promise(done => requestAnimationFrame(() => requestAnimationFrame(done)));
  await frames();  // the first paint and the resize observer's, once the root is in the page
  const root = el.querySelector('[data-testid=image-panels-root]');
  const before = Number(root.dataset.revision);
  // One message: every trait set first, then one change event each, as Backbone's set does.
  const update = {original: wire([1, 0.5, 0, 0.75], [2, 2]), perturbation: wire([0.1, -0.1, 0.1, -0.1], [2, 2]),
                  attacked: wire([1, 0.4, 0.1, 0.65], [2, 2]), scale: 0.1, max_abs: 0.1,
                  captions: ['original: 3', 'perturbation', 'attacked: 5'], view_revision: 1};
  Object.assign(values, update);
  for (const key of Object.keys(update)) for (const f of handlers['change:' + key] || []) f();
  await frames();
  return {before, after: Number(root.dataset.revision), viewRevision: root.dataset.viewRevision,
          maxAbs: root.dataset.maxAbs, caption: root.querySelector('figcaption').textContent};
}"""


def test_one_paint_per_kernel_message_marked_with_its_view(page):
    page.set_content("<!doctype html><html><body></body></html>")
    seen = page.evaluate(_RENDER_JS, canvas_module("image_panels.js"))
    assert seen["after"] == seen["before"] + 1, seen  # seven change events, one paint
    assert seen["viewRevision"] == "1" and seen["maxAbs"] == "0.1" and seen["caption"] == "original: 3"
