// How the expected gradient's size changes with network width and training size: a grid of
// cells on a log colour scale, or the size against the sample count S with the 1/sqrt(S) rate.
// Every string from the kernel (notes, labels) is set as text only.

const SIZE = { width: 440, height: 320, left: 58, right: 14, top: 12, bottom: 40 };
const RAMP = 5; // --jostle-limit-0 .. --jostle-limit-4 in limit_chart.css

// position on the log scale, 0 at the least value shown and 1 at the greatest
function logPosition(scale, value) {
  const lo = Math.log(scale.low), hi = Math.log(scale.high);
  return Math.min(1, Math.max(0, (Math.log(value) - lo) / (hi - lo || 1)));
}

function colourAt(stops, t) {
  const x = t * (stops.length - 1), i = Math.min(stops.length - 2, Math.floor(x)), f = x - i;
  const rgb = stops[i].map((c, k) => Math.round(c + f * (stops[i + 1][k] - c)));
  return `rgb(${rgb[0]},${rgb[1]},${rgb[2]})`;
}

function showTip(tip, text, x, y) {
  tip.textContent = text;
  tip.hidden = false;
  tip.style.left = `${x + 10}px`;
  tip.style.top = `${y + 10}px`;
}

function axisTitles(svg, xTitle, yTitle) {
  node("text", { x: (SIZE.left + SIZE.width) / 2, y: SIZE.height - 6, "text-anchor": "middle", class: "jostle-limit-title" },
    svg, SVG).textContent = xTitle;
  node("text", { x: 12, y: SIZE.height / 2, transform: `rotate(-90 12 ${SIZE.height / 2})`, "text-anchor": "middle",
    class: "jostle-limit-title" }, svg, SVG).textContent = yTitle;
}

function drawGrid(model, svg, tip, stops) {
  const widths = model.get("widths"), sizes = model.get("train_sizes");
  const values = typed(model.get("values")), saved = typed(model.get("saved"));
  const keys = model.get("cell_keys"), notes = model.get("cell_notes"), scale = model.get("colour_scale");
  const selected = model.get("selected_key");
  const w = (SIZE.width - SIZE.left - SIZE.right) / Math.max(1, widths.length);
  const h = (SIZE.height - SIZE.top - SIZE.bottom) / Math.max(1, sizes.length);
  const axes = node("g", { class: "jostle-limit-axes" }, svg, SVG);
  widths.forEach((width, j) => {
    node("text", { x: SIZE.left + (j + 0.5) * w, y: SIZE.height - SIZE.bottom + 14, "text-anchor": "middle" }, axes, SVG)
      .textContent = String(width);
  });
  sizes.forEach((size, i) => {
    node("text", { x: SIZE.left - 4, y: SIZE.height - SIZE.bottom - (i + 0.5) * h + 4, "text-anchor": "end" }, axes, SVG)
      .textContent = String(size);
  });
  axisTitles(svg, "network width (hidden units)", "training size");
  let filled = 0;
  for (let i = 0; i < sizes.length; i++) {
    for (let j = 0; j < widths.length; j++) {
      const k = i * widths.length + j, x = SIZE.left + j * w, y = SIZE.height - SIZE.bottom - (i + 1) * h;
      const empty = !keys[k] || !isFinite(values[k]);
      const cell = node("rect", { x: x + 1, y: y + 1, width: w - 2, height: h - 2, class: "jostle-limit-cell",
        "data-testid": "limit-cell", "data-key": keys[k] || "", "data-width": widths[j], "data-size": sizes[i],
        "data-empty": empty ? "true" : "false", "data-saved": saved[k] ? "true" : "false",
        "aria-selected": keys[k] && keys[k] === selected ? "true" : "false" }, svg, SVG);
      if (empty) continue;
      filled += 1;
      const t = logPosition(scale, values[k]);
      cell.setAttribute("fill", colourAt(stops, t));
      cell.setAttribute("tabindex", "0");
      const label = node("text", { x: x + w / 2, y: y + h / 2 + 4, "text-anchor": "middle", class: "jostle-limit-value",
        fill: t > 0.5 ? "#ffffff" : "#26241f" }, svg, SVG);
      label.textContent = values[k].toPrecision(2);
      const show = () => showTip(tip, notes[k], x + w / 2, y + h / 2);
      const choose = () => { model.set("selected_key", keys[k]); model.save_changes(); };
      cell.addEventListener("mouseenter", show);
      cell.addEventListener("focus", show);
      cell.addEventListener("mouseleave", () => { tip.hidden = true; });
      cell.addEventListener("blur", () => { tip.hidden = true; });
      cell.addEventListener("click", choose);
      cell.addEventListener("keydown", (e) => { if (e.key === "Enter" || e.key === " ") { e.preventDefault(); choose(); } });
    }
  }
  return filled;
}

function drawCurves(model, svg, tip, stops) {
  const curves = model.get("curves"), ref = model.get("reference"), scale = model.get("colour_scale");
  const all = curves.flatMap((c) => c.values).concat(ref.values).filter((v) => isFinite(v) && v > 0);
  const counts = curves.flatMap((c) => c.samples).concat(ref.samples);
  if (!all.length || !counts.length) return 0;
  const [v0, v1] = [Math.min(...all) / 1.3, Math.max(...all) * 1.3], [s0, s1] = [1, Math.max(2, ...counts)];
  const px = (s) => SIZE.left + (Math.log(s / s0) / Math.log(s1 / s0)) * (SIZE.width - SIZE.left - SIZE.right);
  const py = (v) => SIZE.height - SIZE.bottom - (Math.log(v / v0) / Math.log(v1 / v0)) * (SIZE.height - SIZE.top - SIZE.bottom);
  const axes = node("g", { class: "jostle-limit-axes" }, svg, SVG);
  for (const s of [...new Set(counts)].sort((a, b) => a - b)) {
    node("line", { x1: px(s), x2: px(s), y1: SIZE.top, y2: SIZE.height - SIZE.bottom }, axes, SVG);
    node("text", { x: px(s), y: SIZE.height - SIZE.bottom + 14, "text-anchor": "middle" }, axes, SVG).textContent = String(s);
  }
  (scale.ticks || []).filter((v) => v >= v0 && v <= v1).forEach((v, i) => {
    node("line", { x1: SIZE.left, x2: SIZE.width - SIZE.right, y1: py(v), y2: py(v) }, axes, SVG);
    node("text", { x: SIZE.left - 4, y: py(v) + 4, "text-anchor": "end" }, axes, SVG).textContent = String(v);
  });
  axisTitles(svg, "posterior samples averaged, S (log)", model.get("measure_titles")[model.get("measure_options")
    .indexOf(model.get("measure"))] || "");
  const line = (xs, ys) => xs.map((s, i) => `${i ? "L" : "M"}${px(s).toFixed(1)},${py(ys[i]).toFixed(1)}`).join("");
  const notes = model.get("cell_notes"), widths = model.get("widths");
  for (const c of curves) {
    const keep = c.values.map((v) => isFinite(v) && v > 0);
    const xs = c.samples.filter((_, i) => keep[i]), ys = c.values.filter((_, i) => keep[i]);
    if (!xs.length) continue;
    const path = node("path", { d: line(xs, ys), class: "jostle-limit-curve", "data-testid": "limit-curve",
      // the ramp's pale end would vanish on the surface as a thin line, so lines start at 30% of it
      stroke: colourAt(stops, 0.3 + 0.7 * logPosition(scale, ys[ys.length - 1])) }, svg, SVG);
    const note = notes[c.row * widths.length + c.column];
    path.addEventListener("mouseenter", () => showTip(tip, note, px(xs[0]), py(ys[0])));
    path.addEventListener("mouseleave", () => { tip.hidden = true; });
  }
  if (ref.values.length && isFinite(ref.values[0])) {
    node("path", { d: line(ref.samples, ref.values), class: "jostle-limit-reference", "data-testid": "limit-reference" },
      svg, SVG);
  }
  return curves.length;
}

function drawLegend(model, legend, stops) {
  legend.replaceChildren();
  const scale = model.get("colour_scale");
  const titles = model.get("measure_titles"), index = model.get("measure_options").indexOf(model.get("measure"));
  node("span", {}, legend).textContent = `${titles[index] || ""} (log colour scale)`;
  const svg = node("svg", { viewBox: "0 0 360 34", "data-testid": "limit-legend" }, legend, SVG);
  const steps = 48;
  for (let s = 0; s < steps; s++) {
    node("rect", { x: 10 + (s * 340) / steps, y: 2, width: 340 / steps + 0.5, height: 12, fill: colourAt(stops, s / (steps - 1)) },
      svg, SVG);
  }
  (scale.ticks || []).forEach((v, i) => {
    const x = 10 + logPosition(scale, v) * 340;
    node("line", { x1: x, x2: x, y1: 14, y2: 18, stroke: "currentColor" }, svg, SVG);
    node("text", { x, y: 30, "text-anchor": "middle" }, svg, SVG).textContent = String(scale.labels[i] ?? v);
  });
}

function render({ model, el }) {
  const root = node("div", { class: "jostle-root jostle-limit" }, el);
  const bar = node("div", { class: "jostle-limit-bar" }, root);
  const controls = { method: pick(bar, "method", "limit-method-select"), samples: pick(bar, "samples S", "limit-samples-select"),
    measure: pick(bar, "colour", "limit-measure-select"), view: pick(bar, "view", "limit-view-select") };
  for (const name of Object.keys(controls)) {
    controls[name].addEventListener("change", () => { model.set(name, controls[name].value); model.save_changes(); });
  }
  const frame = node("div", { class: "jostle-limit-frame" }, root);
  const svg = node("svg", { viewBox: `0 0 ${SIZE.width} ${SIZE.height}`, "data-testid": "limit-chart", role: "img",
    "aria-label": "expected gradient size by network width and training size" }, frame, SVG);
  const tip = node("div", { class: "jostle-limit-tooltip", "data-testid": "limit-tooltip", role: "tooltip" }, frame);
  tip.hidden = true;
  const legend = node("div", { class: "jostle-limit-legend" }, root);
  const note = node("div", { class: "jostle-limit-note", "data-testid": "limit-note" }, root);
  const draw = () => {
    const style = getComputedStyle(root);
    const stops = [...Array(RAMP).keys()].map((i) => rgb(style.getPropertyValue(`--jostle-limit-${i}`) || "#777777"));
    svg.replaceChildren();
    const view = model.get("view");
    const drawn = view === "curves" ? drawCurves(model, svg, tip, stops) : drawGrid(model, svg, tip, stops);
    svg.dataset.view = view;
    svg.dataset.cellCount = String(drawn);
    svg.dataset.revision = String(Number(svg.dataset.revision || 0) + 1);
    drawLegend(model, legend, stops);
  };
  const update = () => {
    fillSelect(controls.method, model.get("method_options"), model.get("method"));
    fillSelect(controls.samples, model.get("sample_options"), model.get("samples"));
    fillSelect(controls.measure, model.get("measure_options"), model.get("measure"), model.get("measure_titles"));
    fillSelect(controls.view, ["grid", "curves"], model.get("view"), ["cells by width and size", "size against S"]);
    draw();
    note.textContent = model.get("note");
  };
  requestAnimationFrame(update);
  update();
  model.on("change:revision", update);
  model.on("change:selected_key", draw);
  model.on("change:view", update);
  return () => {
    model.off("change:revision", update);
    model.off("change:selected_key", draw);
    model.off("change:view", update);
  };
}

export default { render };
