// jostle canvas helpers, placed ahead of the canvas views' modules when they are served
// (widgets/_assets.py: canvas_module): binary wire arrays, theme colours, theme changes and eps-balls.

/** @typedef {{shape: number[], dtype: string, buffer: DataView}} WireArray */

const TYPED = { float32: Float32Array, float64: Float64Array, int32: Int32Array, uint8: Uint8Array };

/** The wire array's values as a typed array of its dtype (copied when misaligned). @param {WireArray} w */
function typed(w) {
  if (!w || !w.buffer) return new Float32Array(0);
  const T = TYPED[w.dtype] || Float32Array;
  const b = w.buffer;
  if (b.byteOffset % T.BYTES_PER_ELEMENT) return new T(b.buffer.slice(b.byteOffset, b.byteOffset + b.byteLength));
  return new T(b.buffer, b.byteOffset, b.byteLength / T.BYTES_PER_ELEMENT);
}

/** Any CSS colour (hex, rgb(), names) as [r, g, b], resolved by the canvas itself. */
const probe = document.createElement("canvas").getContext("2d");
function rgb(colour) {
  probe.fillStyle = "#888888";
  probe.fillStyle = (colour || "").trim() || "#888888";
  const value = String(probe.fillStyle);
  if (value.startsWith("#")) {
    const n = parseInt(value.slice(1, 7), 16);
    return [(n >> 16) & 255, (n >> 8) & 255, n & 255];
  }
  const parts = value.match(/[\d.]+/g) || [];
  return parts.length >= 3 ? parts.slice(0, 3).map(Number) : [136, 136, 136];
}

/** `draw` run once after the current task's change events: a kernel message that sets several traits
 *  fires one change event per trait, synchronously, and the view is painted once, not once per trait. */
function oncePerMessage(draw) {
  let queued = false;
  return () => {
    if (queued) return;
    queued = true;
    queueMicrotask(() => { queued = false; draw(); });
  };
}

/** Call `repaint` whenever JupyterLab switches its theme: the theme manager marks <body> with the
 *  theme's name once its CSS is in, and canvas colours are read at paint time. Returns the disconnect. */
function onThemeChange(repaint) {
  const observer = new MutationObserver(() => requestAnimationFrame(() => repaint()));
  observer.observe(document.body, { attributes: true, attributeFilter: ["data-jp-theme-name", "data-jp-theme-light"] });
  return () => observer.disconnect();
}

/** Draw a ball of radius eps (L-inf: square, L2: disc) around the centre. */
function ball(ctx, px, py, centre, eps, sx, sy, norm) {
  ctx.beginPath();
  if (norm === "2") ctx.ellipse(px(centre[0]), py(centre[1]), eps * sx, eps * sy, 0, 0, 2 * Math.PI);
  else ctx.rect(px(centre[0] - eps), py(centre[1] + eps), 2 * eps * sx, 2 * eps * sy);
  ctx.stroke();
}

/** Paint rows x cols values (from `offset`) into `canvas`, one pixel each, coloured by `colour(v)` -> [r, g, b]. */
function paintValues(canvas, values, offset, rows, cols, colour) {
  canvas.width = cols; canvas.height = rows;
  const ctx = canvas.getContext("2d"), img = ctx.createImageData(cols, rows);
  for (let k = 0; k < rows * cols; k++) {
    const [r, g, b] = colour(values[offset + k]);
    img.data[4 * k] = r; img.data[4 * k + 1] = g; img.data[4 * k + 2] = b; img.data[4 * k + 3] = 255;
  }
  ctx.putImageData(img, 0, 0);
}
