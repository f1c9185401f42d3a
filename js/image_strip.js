// jostle image strip: choose a test image by click, or Enter / Space on a focused thumbnail.
// Arrow keys move the focus along the strip. Captions are text only.
// typed() and rgb() come from _canvas_helpers.js, served ahead of this module.

/** Grey ramp from the theme's surface (low) to its ink (high). */
function paintImage(canvas, values, offset, height, width, range, root, colour) {
  const css = getComputedStyle(root);
  const light = rgb(css.getPropertyValue("--jostle-surface")), dark = rgb(css.getPropertyValue("--jostle-ink"));
  canvas.width = width; canvas.height = height;
  const ctx = canvas.getContext("2d"), img = ctx.createImageData(width, height);
  const [lo, hi] = range;
  for (let k = 0; k < width * height; k++) {
    const level = (v) => Math.min(1, Math.max(0, (v - lo) / (hi - lo || 1)));
    const t = level(values[offset + k]);
    for (let c = 0; c < 3; c++) {
      img.data[4 * k + c] = colour ? Math.round(255 * level(values[offset + c * width * height + k]))
        : Math.round(light[c] + t * (dark[c] - light[c]));
    }
    img.data[4 * k + 3] = 255;
  }
  ctx.putImageData(img, 0, 0);
}

function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "jostle-root jostle-strip"; root.dataset.testid = "image-strip";
  root.setAttribute("role", "listbox"); root.setAttribute("aria-label", "test images");
  el.append(root);
  /** @type {HTMLCanvasElement[]} */
  let items = [];
  const choose = (k) => { model.set("selected", k); model.save_changes(); };
  const build = () => {
    if (!root.isConnected) return; // theme colours resolve only in the page; the observer calls again
    const w = model.get("images"), values = typed(w), captions = model.get("captions");
    root.replaceChildren(); items = [];
    // (n, H, W) greyscale or (n, 3, H, W) colour, drawn as RGB
    const colour = w && w.shape.length === 4 && w.shape[1] === 3;
    if (!w || !(w.shape.length === 3 || colour)) return;
    const n = w.shape[0], [height, width] = w.shape.slice(-2), size = (colour ? 3 : 1) * height * width;
    for (let k = 0; k < n; k++) {
      const canvas = document.createElement("canvas");
      canvas.dataset.testid = "image-strip-item"; canvas.dataset.index = String(k);
      canvas.tabIndex = 0; canvas.setAttribute("role", "option");
      const caption = captions[k] === undefined ? `image ${k}` : String(captions[k]);
      canvas.setAttribute("aria-label", caption); canvas.title = caption;
      paintImage(canvas, values, k * size, height, width, model.get("value_range"), root, colour);
      canvas.addEventListener("click", () => choose(k));
      canvas.addEventListener("keydown", (ev) => {
        if (ev.key === "Enter" || ev.key === " ") { ev.preventDefault(); choose(k); }
        if (ev.key === "ArrowRight" || ev.key === "ArrowLeft") {
          ev.preventDefault();
          const next = items[Math.min(n - 1, Math.max(0, k + (ev.key === "ArrowRight" ? 1 : -1)))];
          if (next) next.focus();
        }
      });
      items.push(canvas); root.append(canvas);
    }
    mark();
  };
  const mark = () => {
    const selected = model.get("selected");
    items.forEach((c, k) => c.setAttribute("aria-selected", String(k === selected)));
    root.dataset.selected = String(selected); root.dataset.count = String(items.length);
  };
  model.on("change:images change:captions change:value_range", build);
  model.on("change:selected", mark);
  let built = false;
  const attached = new ResizeObserver(() => { if (!built && root.isConnected) { built = true; build(); } });
  attached.observe(root);
  const offTheme = onThemeChange(build);
  build();
  built = root.isConnected;
  return () => {
    attached.disconnect(); offTheme();
    model.off("change:images change:captions change:value_range", build);
    model.off("change:selected", mark);
  };
}

export default { render };
