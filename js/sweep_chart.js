// Robustness against accuracy, one mark per sweep run, with filters and per-family correlations.
// Every string that comes from the kernel (method names, run descriptions) is set as text only.

const SIZE = { width: 460, height: 340, left: 52, right: 14, top: 12, bottom: 40 };
const SHAPES = {
  // family 0 (deterministic): triangle; family 1 (Bayesian): circle; both about 7 px across
  0: "M0,-5L4.6,3.4L-4.6,3.4Z",
  1: "M4,0A4,4 0 1,1 -4,0A4,4 0 1,1 4,0Z",
};
const FAMILY_NAMES = ["deterministic", "Bayesian"];

// The kernel sends each axis: its domain (shares padded a little, within [0, 1]) and round
// 1-2-5 ticks with their labels, from the same helper as the explorer's charts.
function axisOf(model, name) {
  const axis = model.get(name) || {};
  const low = Number(axis.low), high = Number(axis.high);
  const ok = isFinite(low) && isFinite(high) && high > low;
  return { low: ok ? low : 0, high: ok ? high : 1, ticks: axis.ticks || [], labels: axis.labels || [] };
}

// ipywidgets containers cannot carry attributes; their jostle-tid-<id> classes become data-testids.
function copyTestIds() {
  for (const el of document.querySelectorAll('[class*="jostle-tid-"]')) {
    for (const name of el.classList) {
      if (name.startsWith("jostle-tid-") && !el.dataset.testid) el.dataset.testid = name.slice(11);
    }
  }
}

function buildControls(model, root) {
  const bar = node("div", { class: "jostle-sweep-bar" }, root);
  const methods = node("fieldset", { "data-testid": "sweep-method-filter", class: "jostle-sweep-methods" }, bar);
  node("legend", {}, methods).textContent = "methods";
  const budget = pick(bar, "budget eps", "sweep-budget-select");
  const attack = pick(bar, "attack", "sweep-attack-select");
  const measure = pick(bar, "robustness", "sweep-measure-select");
  budget.addEventListener("change", () => { model.set("budget", Number(budget.value)); model.save_changes(); });
  attack.addEventListener("change", () => { model.set("attack", attack.value); model.save_changes(); });
  measure.addEventListener("change", () => { model.set("measure", measure.value); model.save_changes(); });
  return { methods, budget, attack, measure };
}

function fillMethods(model, fieldset) {
  for (const old of fieldset.querySelectorAll("label")) old.remove();
  const chosen = new Set(model.get("methods"));
  for (const name of model.get("method_options")) {
    const label = node("label", {}, fieldset);
    const box = node("input", { type: "checkbox" }, label);
    box.checked = chosen.has(name);
    box.addEventListener("change", () => {
      const now = new Set(model.get("methods"));
      box.checked ? now.add(name) : now.delete(name);
      model.set("methods", model.get("method_options").filter((m) => now.has(m)));
      model.save_changes();
    });
    label.appendChild(document.createTextNode(" " + name));
  }
}

function drawChart(model, svg, tooltip) {
  svg.replaceChildren();
  const x = typed(model.get("accuracy")), y = typed(model.get("value"));
  const family = typed(model.get("family")), keys = model.get("point_keys");
  const notes = model.get("point_notes"), selected = model.get("selected_key");
  const xAxis = axisOf(model, "x_axis"), yAxis = axisOf(model, "y_axis");
  const [x0, x1] = [xAxis.low, xAxis.high], [y0, y1] = [yAxis.low, yAxis.high];
  const px = (v) => SIZE.left + ((v - x0) / (x1 - x0)) * (SIZE.width - SIZE.left - SIZE.right);
  const py = (v) => SIZE.height - SIZE.bottom - ((v - y0) / (y1 - y0)) * (SIZE.height - SIZE.top - SIZE.bottom);
  const axes = node("g", { class: "jostle-sweep-axes" }, svg, SVG);
  xAxis.ticks.forEach((t, i) => {
    node("line", { x1: px(t), x2: px(t), y1: SIZE.top, y2: SIZE.height - SIZE.bottom }, axes, SVG);
    node("text", { x: px(t), y: SIZE.height - SIZE.bottom + 14, "text-anchor": "middle" }, axes, SVG).textContent =
      String(xAxis.labels[i] ?? t);
  });
  yAxis.ticks.forEach((t, i) => {
    node("line", { x1: SIZE.left, x2: SIZE.width - SIZE.right, y1: py(t), y2: py(t) }, axes, SVG);
    node("text", { x: SIZE.left - 4, y: py(t) + 4, "text-anchor": "end" }, axes, SVG).textContent =
      String(yAxis.labels[i] ?? t);
  });
  node("text", { x: (SIZE.left + SIZE.width) / 2, y: SIZE.height - 6, "text-anchor": "middle", class: "jostle-sweep-title" },
    svg, SVG).textContent = model.get("x_title");
  node("text", { x: 12, y: SIZE.height / 2, transform: `rotate(-90 12 ${SIZE.height / 2})`, "text-anchor": "middle",
    class: "jostle-sweep-title" }, svg, SVG).textContent = model.get("y_title");
  const marks = node("g", { role: "listbox", "aria-label": "runs: Enter or Space opens one" }, svg, SVG);
  for (let i = 0; i < keys.length; i++) {
    const mark = node("path", {
      d: SHAPES[family[i]], transform: `translate(${px(x[i])},${py(y[i])})`, tabindex: 0,
      class: `jostle-sweep-point jostle-family-${family[i]}`, "data-testid": "sweep-point", "data-key": keys[i],
      "data-family": FAMILY_NAMES[family[i]], "aria-selected": keys[i] === selected ? "true" : "false",
      role: "option", "aria-label": String(notes[i] ?? keys[i]),
    }, marks, SVG);
    const show = () => {
      tooltip.textContent = notes[i];
      tooltip.hidden = false;
      tooltip.style.left = `${px(x[i]) + 10}px`;
      tooltip.style.top = `${py(y[i]) + 10}px`;
    };
    const choose = () => { model.set("selected_key", keys[i]); model.save_changes(); };
    mark.addEventListener("mouseenter", show);
    mark.addEventListener("focus", show);
    mark.addEventListener("mouseleave", () => { tooltip.hidden = true; });
    mark.addEventListener("blur", () => { tooltip.hidden = true; });
    mark.addEventListener("click", choose);
    mark.addEventListener("keydown", (e) => { if (e.key === "Enter" || e.key === " ") { e.preventDefault(); choose(); } });
  }
  svg.dataset.pointCount = String(keys.length);
  svg.dataset.revision = String(Number(svg.dataset.revision || 0) + 1);
}

function fillTable(model, table) {
  table.replaceChildren();
  const head = node("tr", {}, node("thead", {}, table));
  for (const title of ["family", "n", "Pearson r", "p", "Spearman rho", "p", "p from"]) node("th", {}, head).textContent = title;
  const body = node("tbody", {}, table);
  for (const row of model.get("correlations")) {
    const tr = node("tr", {}, body);
    for (const cell of row) node("td", {}, tr).textContent = cell;
  }
}

function render({ model, el }) {
  const root = node("div", { class: "jostle-root jostle-sweep" }, el);
  const controls = buildControls(model, root);
  const frame = node("div", { class: "jostle-sweep-frame" }, root);
  const svg = node("svg", { viewBox: `0 0 ${SIZE.width} ${SIZE.height}`, "data-testid": "sweep-chart", role: "group",
    "aria-label": "robustness against accuracy, one mark per run" }, frame, SVG);
  const tooltip = node("div", { class: "jostle-sweep-tooltip", "data-testid": "sweep-tooltip", role: "tooltip" }, frame);
  tooltip.hidden = true;
  const legend = node("div", { class: "jostle-legend", "data-testid": "sweep-legend" }, root);
  FAMILY_NAMES.forEach((name, code) => {
    const item = node("span", {}, legend);
    const swatch = node("svg", { width: 12, height: 12, viewBox: "-6 -6 12 12" }, item, SVG);
    node("path", { d: SHAPES[code], class: `jostle-sweep-point jostle-family-${code}` }, swatch, SVG);
    item.appendChild(document.createTextNode(name));
  });
  const table = node("table", { class: "jostle-sweep-table", "data-testid": "sweep-correlations" }, root);
  const note = node("div", { class: "jostle-sweep-note", "data-testid": "sweep-note" }, root);
  const update = () => {
    fillMethods(model, controls.methods);
    fillSelect(controls.budget, model.get("budget_options"), model.get("budget"));
    fillSelect(controls.attack, model.get("attack_options"), model.get("attack"));
    fillSelect(controls.measure, model.get("measure_options"), model.get("measure"), model.get("measure_titles"));
    drawChart(model, svg, tooltip);
    fillTable(model, table);
    note.textContent = model.get("note");
  };
  update();
  const redraw = () => drawChart(model, svg, tooltip);
  model.on("change:revision", update);
  model.on("change:selected_key", redraw);
  requestAnimationFrame(copyTestIds);
  const timer = setTimeout(copyTestIds, 500);
  return () => {
    clearTimeout(timer);
    model.off("change:revision", update);
    model.off("change:selected_key", redraw);
  };
}

export default { render };
