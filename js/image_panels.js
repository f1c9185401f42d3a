// jostle image panels: the chosen image, the perturbation on a diverging scale, the attacked image.
// typed(), rgb() and oncePerMessage() come from _canvas_helpers.js, served ahead of this module.

/**
 * (H, W) is drawn with `colour`; (3, H, W) as RGB (`rgbOf` maps a value to 0..255), or with
 * `tile` its three channels side by side, one pixel apart, each with `colour`.
 * @param {HTMLCanvasElement} canvas @param {WireArray} w @param {(v: number) => number[]} colour
 */
function paint(canvas, w, colour, rgbOf, tile) {
  const values = typed(w);
  const ok = w && values.length > 0 && (w.shape.length === 2 || (w.shape.length === 3 && w.shape[0] === 3));
  if (!ok) { canvas.width = canvas.width; return; }
  const [height, width] = w.shape.slice(-2), plane = height * width, channels = w.shape.length === 3;
  const total = channels && tile ? 3 * width + 2 : width;
  canvas.width = total; canvas.height = height;
  canvas.style.width = `${Math.round(88 * total / height)}px`; // the theme's 88px height, pixels kept square
  const ctx = canvas.getContext("2d"), img = ctx.createImageData(total, height);
  const put = (x, y, [r, g, b]) => {
    const o = 4 * (y * total + x);
    img.data[o] = r; img.data[o + 1] = g; img.data[o + 2] = b; img.data[o + 3] = 255;
  };
  for (let y = 0; y < height; y++) for (let x = 0; x < width; x++) {
    const k = y * width + x;
    if (!channels) put(x, y, colour(values[k]));
    else if (!tile) put(x, y, [0, 1, 2].map((c) => rgbOf(values[c * plane + k])));
    else for (let c = 0; c < 3; c++) put(c * (width + 1) + x, y, colour(values[c * plane + k]));
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
    const level = (v) => Math.round(255 * Math.min(1, Math.max(0, (v - lo) / (hi - lo || 1))));
    paint(panels[0].canvas, model.get("original"), grey, level, false);
    paint(panels[1].canvas, model.get("perturbation"), diverging, level, true);
    paint(panels[2].canvas, model.get("attacked"), grey, level, false);
    const captions = model.get("captions");
    panels.forEach((p, k) => {
      p.caption.textContent = captions[k] === undefined ? "" : String(captions[k]);
      p.canvas.setAttribute("aria-label", p.caption.textContent);
    });
    revision += 1;
    root.dataset.revision = String(revision);
    root.dataset.maxAbs = String(model.get("max_abs"));
    root.dataset.viewRevision = String(model.get("view_revision"));
  };
  const events = "change:view_revision change:original change:perturbation change:attacked change:value_range change:scale change:captions change:max_abs";
  const redraw = oncePerMessage(draw); // one paint per kernel message, which sets up to seven of these
  model.on(events, redraw);
  const attached = new ResizeObserver(() => draw());
  attached.observe(root);
  const offTheme = onThemeChange(draw);
  draw();
  return () => { attached.disconnect(); offTheme(); model.off(events, redraw); };
}

export default { render };
