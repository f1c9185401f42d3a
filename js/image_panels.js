// jostle image panels: the chosen image, the perturbation on a diverging scale, the attacked image.
// typed() and rgb() come from _canvas_helpers.js, served ahead of this module.

/** @param {HTMLCanvasElement} canvas @param {WireArray} w @param {(v: number) => number[]} colour */
function paint(canvas, w, colour) {
  const values = typed(w);
  if (!w || w.shape.length !== 2 || values.length === 0) { canvas.width = canvas.width; return; }
  const [height, width] = w.shape;
  canvas.width = width; canvas.height = height;
  const ctx = canvas.getContext("2d"), img = ctx.createImageData(width, height);
  for (let k = 0; k < values.length; k++) {
    const [r, g, b] = colour(values[k]);
    img.data[4 * k] = r; img.data[4 * k + 1] = g; img.data[4 * k + 2] = b; img.data[4 * k + 3] = 255;
  }
  ctx.putImageData(img, 0, 0);
}

const mix = (a, b, t) => a.map((v, c) => Math.round(v + t * (b[c] - v)));

function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "jostle-root jostle-panels"; root.dataset.testid = "image-panels-root";
  const panels = ["image-original", "image-perturbation", "image-attacked"].map((testid) => {
    const figure = document.createElement("figure"), canvas = document.createElement("canvas");
    const caption = document.createElement("figcaption");
    canvas.dataset.testid = testid; canvas.setAttribute("role", "img");
    figure.append(canvas, caption); root.append(figure);
    return { canvas, caption };
  });
  el.append(root);
  let revision = 0;
  const draw = () => {
    if (!root.isConnected) return; // theme colours resolve only in the page; the observer calls again
    const css = getComputedStyle(root);
    const light = rgb(css.getPropertyValue("--jostle-surface")), dark = rgb(css.getPropertyValue("--jostle-ink"));
    const low = rgb(css.getPropertyValue("--jostle-diverge-low")), high = rgb(css.getPropertyValue("--jostle-diverge-high"));
    const [lo, hi] = model.get("value_range"), scale = model.get("scale") || 1;
    const grey = (v) => mix(light, dark, Math.min(1, Math.max(0, (v - lo) / (hi - lo || 1))));
    const diverging = (v) => {
      const t = Math.max(-1, Math.min(1, v / scale));
      return t < 0 ? mix(light, low, -t) : mix(light, high, t);
    };
    paint(panels[0].canvas, model.get("original"), grey);
    paint(panels[1].canvas, model.get("perturbation"), diverging);
    paint(panels[2].canvas, model.get("attacked"), grey);
    const captions = model.get("captions");
    panels.forEach((p, k) => {
      p.caption.textContent = captions[k] === undefined ? "" : String(captions[k]);
      p.canvas.setAttribute("aria-label", p.caption.textContent);
    });
    revision += 1;
    root.dataset.revision = String(revision);
    root.dataset.maxAbs = String(model.get("max_abs"));
  };
  const events = "change:original change:perturbation change:attacked change:value_range change:scale change:captions change:max_abs";
  model.on(events, draw);
  const attached = new ResizeObserver(() => draw());
  attached.observe(root);
  const offTheme = onThemeChange(draw);
  draw();
  return () => { attached.disconnect(); offTheme(); model.off(events, draw); };
}

export default { render };
