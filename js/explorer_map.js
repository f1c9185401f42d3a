// jostle input map: background layer, member boundaries, training points, eps-ball, attack path.
// Pick the input by click/drag or arrow keys (Shift for larger steps). User strings are text only.
// typed(), rgb() and ball() come from _canvas_helpers.js, served ahead of this module.

const VIEW_KEYS = ["view_revision", "background", "layer_values", "layer_shown", "layer_max", "segments", "path", "ball_budget",
  "ball_norm", "ball_centre", "success", "train_points", "train_labels", "bounds", "point",
  "certified_radius", "flip_budget", "radius_layer", "radius_layer_max", "layer"];

/** @param {HTMLElement} root */
function palette(root) {
  const css = getComputedStyle(root);
  const v = (name) => css.getPropertyValue(name).trim();
  const classes = [];
  for (let c = 0; c < 10; c++) classes.push(rgb(v(`--jostle-class-${c}`)));
  return { classes, attack: v("--jostle-attack"), ink: v("--jostle-ink"), surface: v("--jostle-surface"),
    uncertain: rgb(v("--jostle-uncertain")), muted: v("--jostle-muted"), certified: v("--jostle-certified"),
    certifiedRgb: rgb(v("--jostle-certified")) };
}

/** Paint the gridded layer into a small offscreen canvas (row 0 = lowest y). */
function paintLayer(model, colours) {
  if (model.get("layer") === "certified") return paintRadius(model, colours);
  const bg = model.get("background");
  const probs = typed(bg);
  if (!bg || bg.shape.length !== 3 || probs.length === 0) return null;
  const [ny, nx, nc] = bg.shape;
  const values = typed(model.get("layer_values"));
  const shown = model.get("layer_shown");
  const top = model.get("layer_max") || 1;
  const off = document.createElement("canvas");
  off.width = nx; off.height = ny;
  const ctx = off.getContext("2d");
  const img = ctx.createImageData(nx, ny);
  for (let j = 0; j < ny; j++) {
    for (let i = 0; i < nx; i++) {
      const cell = j * nx + i, out = ((ny - 1 - j) * nx + i) * 4;
      let r = 0, g = 0, b = 0, a = 0;
      if (shown === "predictive") {
        let best = 0;
        for (let c = 0; c < nc; c++) {
          const p = probs[cell * nc + c], col = colours.classes[c % colours.classes.length];
          r += p * col[0]; g += p * col[1]; b += p * col[2]; best = Math.max(best, p);
        }
        a = 0.1 + 0.45 * Math.max(0, (best - 1 / nc) / (1 - 1 / nc));
      } else {
        [r, g, b] = colours.uncertain;
        a = 0.85 * Math.min(1, Math.max(0, values[cell] / top));
      }
      img.data[out] = r; img.data[out + 1] = g; img.data[out + 2] = b; img.data[out + 3] = Math.round(255 * a);
    }
  }
  ctx.putImageData(img, 0, 0);
  return off;
}

function draw(model, canvas, root, state) {
  if (!root.isConnected) return; // theme colours resolve only in the page; the resize observer calls again
  const [x0, x1, y0, y1] = model.get("bounds");
  const dpr = window.devicePixelRatio || 1;
  const width = Math.max(200, root.clientWidth || 360);
  const height = Math.round(width * Math.min(1.5, Math.max(0.5, (y1 - y0) / (x1 - x0))));
  if (canvas.width !== Math.round(width * dpr) || canvas.height !== Math.round(height * dpr)) {
    canvas.width = Math.round(width * dpr); canvas.height = Math.round(height * dpr);
    canvas.style.height = `${height}px`;
  }
  const sx = width / (x1 - x0), sy = height / (y1 - y0);
  const px = (x) => (x - x0) * sx, py = (y) => height - (y - y0) * sy;
  state.toData = (cx, cy) => [x0 + cx / sx, y0 + (height - cy) / sy];
  const colours = palette(root);
  const ctx = canvas.getContext("2d");
  ctx.setTransform(dpr, 0, 0, dpr, 0, 0);
  ctx.clearRect(0, 0, width, height);
  if (state.layerDirty) {
    state.layer = paintLayer(model, colours); state.layerDirty = false; state.layerRevision += 1;
  }
  if (state.layer) { ctx.imageSmoothingEnabled = true; ctx.drawImage(state.layer, 0, 0, width, height); }
  const seg = typed(model.get("segments"));
  ctx.strokeStyle = colours.ink; ctx.globalAlpha = 0.4; ctx.lineWidth = 1; ctx.beginPath();
  for (let k = 0; k + 3 < seg.length; k += 4) { ctx.moveTo(px(seg[k]), py(seg[k + 1])); ctx.lineTo(px(seg[k + 2]), py(seg[k + 3])); }
  ctx.stroke(); ctx.globalAlpha = 1;
  const pts = typed(model.get("train_points")), labels = typed(model.get("train_labels"));
  ctx.lineWidth = 0.8; ctx.strokeStyle = colours.ink;
  for (let n = 0; 2 * n + 1 < pts.length; n++) {
    const col = colours.classes[(labels[n] || 0) % colours.classes.length];
    ctx.fillStyle = `rgb(${col[0]},${col[1]},${col[2]})`;
    ctx.beginPath(); ctx.arc(px(pts[2 * n]), py(pts[2 * n + 1]), 3, 0, 2 * Math.PI); ctx.fill(); ctx.stroke();
  }
  const centre = model.get("ball_centre"), eps = model.get("ball_budget");
  let radius = 0;
  if (centre && centre.length === 2) {
    radius = eps * sx;
    ctx.strokeStyle = colours.attack; ctx.lineWidth = 1.5; ctx.setLineDash([4, 3]);
    ball(ctx, px, py, centre, eps, sx, sy, model.get("ball_norm")); ctx.setLineDash([]);
  }
  const proved = model.get("certified_radius"), flip = model.get("flip_budget");
  if (centre && centre.length === 2 && proved >= 0) {
    for (const [style, width] of [[colours.surface, 5], [colours.certified, 2.5]]) { // halo: visible on the blue layer
      ctx.strokeStyle = style; ctx.lineWidth = width; ball(ctx, px, py, centre, proved, sx, sy, model.get("ball_norm"));
    }
  }
  if (centre && centre.length === 2 && flip >= 0) {
    ctx.strokeStyle = colours.attack; ctx.lineWidth = 1; ctx.setLineDash([1, 3]);
    ball(ctx, px, py, centre, flip, sx, sy, model.get("ball_norm")); ctx.setLineDash([]);
  }
  const path = typed(model.get("path"));
  const steps = Math.floor(path.length / 2);
  if (steps > 0) {
    ctx.strokeStyle = colours.attack; ctx.fillStyle = colours.attack; ctx.lineWidth = 2; ctx.beginPath();
    for (let s = 0; s < steps; s++) (s ? ctx.lineTo : ctx.moveTo).call(ctx, px(path[2 * s]), py(path[2 * s + 1]));
    ctx.stroke();
    for (let s = 1; s < steps; s++) { ctx.beginPath(); ctx.arc(px(path[2 * s]), py(path[2 * s + 1]), 1.8, 0, 2 * Math.PI); ctx.fill(); }
    const ex = px(path[2 * steps - 2]), ey = py(path[2 * steps - 1]);
    ctx.beginPath(); ctx.moveTo(ex, ey - 6); ctx.lineTo(ex + 6, ey); ctx.lineTo(ex, ey + 6); ctx.lineTo(ex - 6, ey); ctx.closePath();
    ctx.fill(); ctx.strokeStyle = colours.surface; ctx.lineWidth = 1; ctx.stroke();
  }
  const p = state.localPoint || model.get("point");
  ctx.strokeStyle = colours.ink; ctx.lineWidth = 2;
  ctx.beginPath(); ctx.arc(px(p[0]), py(p[1]), 6, 0, 2 * Math.PI); ctx.stroke();
  ctx.beginPath(); ctx.moveTo(px(p[0]) - 9, py(p[1])); ctx.lineTo(px(p[0]) + 9, py(p[1]));
  ctx.moveTo(px(p[0]), py(p[1]) - 9); ctx.lineTo(px(p[0]), py(p[1]) + 9); ctx.stroke();
  state.revision += 1;
  root.dataset.revision = String(state.revision);
  root.dataset.pathLength = String(steps);
  root.dataset.ballRadiusPx = radius.toFixed(2);
  root.dataset.point = `${p[0]},${p[1]}`;
  root.dataset.layer = model.get("layer_shown");
  root.dataset.boundaries = String(model.get("members_drawn"));
  root.dataset.success = String(model.get("success"));
  root.dataset.viewRevision = String(model.get("view_revision"));
  root.dataset.layerRevision = String(state.layerRevision);
  root.dataset.certifiedRadiusPx = proved >= 0 ? (proved * sx).toFixed(2) : "";
  root.dataset.flipRadiusPx = flip >= 0 ? (flip * sx).toFixed(2) : "";
  root.dataset.radiusLayer = String(typed(model.get("radius_layer")).length);
  root.dataset.pathEnd = steps > 0 ? `${path[2 * steps - 2]},${path[2 * steps - 1]}` : "";
}

/** Legend and layer picker; every class name goes in as textContent. */
function buildBar(model, bar, select) {
  const legend = bar.querySelector(".jostle-legend");
  legend.replaceChildren();
  // var() strings, not computed values: the view may not be in the page yet when this runs
  model.get("classes").forEach((name, c) => {
    const item = document.createElement("span"), dot = document.createElement("i");
    dot.className = "jostle-swatch"; dot.style.background = `var(--jostle-class-${c % 10})`;
    item.append(dot, document.createTextNode(String(name)));
    legend.append(item);
  });
  for (const [cls, text] of [["--jostle-attack", "attack path / eps-ball (dotted: attack flip e)"],
    ["--jostle-certified", "certified radius r"], ["--jostle-ink", "member boundaries"]]) {
    const item = document.createElement("span"), line = document.createElement("i");
    line.className = "jostle-swatch jostle-line"; line.style.background = `var(${cls})`;
    item.append(line, document.createTextNode(text)); legend.append(item);
  }
  select.replaceChildren();
  for (const [value, text] of Object.entries(model.get("layer_labels"))) {
    const option = document.createElement("option");
    option.value = value; option.textContent = text; select.append(option);
  }
  select.value = model.get("layer");
}

const ABOUT_EVENTS = "change:layer_shown change:layer_labels change:ball_centre change:predicted change:success";

/** The map's description: the layer shown, the input the view was computed for, its predicted class. */
function describe(model) {
  const shown = model.get("layer_shown"), centre = model.get("ball_centre") || [];
  const layer = (model.get("layer_labels") || {})[shown] || shown;
  const point = centre.length === 2 ? `x ${centre[0].toFixed(3)}, y ${centre[1].toFixed(3)}` : "not computed yet";
  const predicted = model.get("predicted") || "not computed yet";
  return `Input map, layer: ${layer}. Picked point: ${point}. Predicted class: ${predicted}.` +
    (model.get("predicted") ? ` Attack ${model.get("success") ? "flips" : "does not flip"} the prediction.` : "");
}

function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "jostle-root jostle-map"; root.dataset.testid = "explorer-map-root";
  const canvas = document.createElement("canvas");
  canvas.tabIndex = 0; canvas.dataset.testid = "explorer-map";
  canvas.setAttribute("role", "application");
  canvas.setAttribute("aria-label", "input map: click or drag to pick the input, arrow keys move it");
  // What the map shows, for screen readers: the layer, the computed input and its predicted class.
  const about = document.createElement("p");
  about.className = "jostle-sr-only"; about.dataset.testid = "explorer-map-description";
  about.id = `jostle-map-about-${Math.random().toString(36).slice(2, 9)}`;
  canvas.setAttribute("aria-describedby", about.id);
  const bar = document.createElement("div"); bar.className = "jostle-map-bar";
  const select = document.createElement("select"); select.dataset.testid = "layer-select";
  select.setAttribute("aria-label", "background layer");
  const legend = document.createElement("div"); legend.className = "jostle-legend"; legend.dataset.testid = "map-legend";
  const radiusLegend = Object.assign(document.createElement("div"), { className: "jostle-radius-legend" });
  radiusLegend.dataset.testid = "radius-legend";
  bar.append(select, legend, radiusLegend); root.append(canvas, about, bar); el.append(root);
  const state = { revision: 0, layerRevision: 0, layer: null, layerDirty: true, toData: null, localPoint: null, frame: 0, dragging: false };
  const redraw = () => { if (!state.frame) state.frame = requestAnimationFrame(() => { state.frame = 0; draw(model, canvas, root, state); }); };
  const send = (p) => { state.localPoint = p; model.set("point", p); model.save_changes(); redraw(); };
  const clampPoint = (p) => { const [x0, x1, y0, y1] = model.get("bounds"); return [Math.min(x1, Math.max(x0, p[0])), Math.min(y1, Math.max(y0, p[1]))]; };
  const pick = (ev) => {
    if (!state.toData) return;
    const box = canvas.getBoundingClientRect();
    send(clampPoint(state.toData(ev.clientX - box.left, ev.clientY - box.top)));
  };
  const down = (ev) => { state.dragging = true; canvas.focus(); canvas.setPointerCapture?.(ev.pointerId); pick(ev); };
  const move = (ev) => { if (state.dragging) pick(ev); };
  const up = () => { state.dragging = false; };
  const key = (ev) => {
    const moves = { ArrowLeft: [-1, 0], ArrowRight: [1, 0], ArrowUp: [0, 1], ArrowDown: [0, -1] };
    if (!(ev.key in moves)) return;
    ev.preventDefault();
    const [x0, x1, y0, y1] = model.get("bounds"), f = ev.shiftKey ? 10 / 64 : 1 / 64;
    const p = state.localPoint || model.get("point");
    send(clampPoint([p[0] + moves[ev.key][0] * f * (x1 - x0), p[1] + moves[ev.key][1] * f * (y1 - y0)]));
  };
  const onSelect = () => { model.set("layer", select.value); model.save_changes(); };
  canvas.addEventListener("pointerdown", down); canvas.addEventListener("pointermove", move);
  canvas.addEventListener("pointerup", up); canvas.addEventListener("pointercancel", up);
  canvas.addEventListener("keydown", key); select.addEventListener("change", onSelect);
  const onLayer = () => { state.layerDirty = true; redraw(); };
  const onPoint = () => { state.localPoint = null; redraw(); };
  const onBar = () => { buildBar(model, bar, select); buildRadiusLegend(model, radiusLegend); };
  const onAbout = () => { about.textContent = describe(model); };
  const onRadius = () => { buildRadiusLegend(model, radiusLegend); state.layerDirty = true; redraw(); };
  model.on("change:background change:layer_values change:layer_shown change:layer_max", onLayer);
  model.on("change:point", onPoint); model.on("change:radius_layer change:radius_layer_max change:radius_layer_note", onRadius);
  model.on("change:classes change:layer_labels change:layer", onBar); model.on("change:layer", onLayer);
  for (const k of VIEW_KEYS) model.on(`change:${k}`, redraw);
  model.on(ABOUT_EVENTS, onAbout);
  const offTheme = onThemeChange(onLayer);
  const resize = new ResizeObserver(redraw); resize.observe(root);
  buildBar(model, bar, select); buildRadiusLegend(model, radiusLegend); onAbout(); redraw();
  return () => {
    resize.disconnect(); offTheme(); cancelAnimationFrame(state.frame);
    model.off("change:background change:layer_values change:layer_shown change:layer_max", onLayer);
    model.off("change:point", onPoint); model.off("change:layer", onLayer);
    model.off("change:radius_layer change:radius_layer_max change:radius_layer_note", onRadius); model.off("change:classes change:layer_labels change:layer", onBar);
    for (const k of VIEW_KEYS) model.off(`change:${k}`, redraw);
    model.off(ABOUT_EVENTS, onAbout);
  };
}

export default { render };
