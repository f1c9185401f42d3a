// jostle attack controls: native range inputs and selects, so keyboard and screen readers work.

/** @typedef {{key: string, label: string, kind: "range"|"select", max?: string, step?: (m: any) => number,
 *             min?: number, testid: string, format?: (v: number) => string}} Control */

/** @type {Control[]} */
const CONTROLS = [
  { key: "budget", label: "budget eps", kind: "range", max: "budget_max", min: 0,
    step: (m) => m.get("budget_max") / 200, testid: "budget-slider", format: (v) => v.toFixed(3) },
  { key: "samples", label: "attacker samples", kind: "range", max: "samples_max", min: 1, step: () => 1,
    testid: "samples-slider", format: (v) => String(v) },
  { key: "steps", label: "steps", kind: "range", max: "steps_max", min: 1, step: () => 1,
    testid: "steps-slider", format: (v) => String(v) },
  { key: "method", label: "method", kind: "select", testid: "method-select" },
  { key: "norm", label: "norm", kind: "select", testid: "norm-select" },
  { key: "objective", label: "objective", kind: "select", testid: "objective-select" },
];
const NORM_LABELS = { inf: "L-inf", 2: "L2" };

/** Values a select offers: the registered methods, or the chosen method's norms or objectives
 *  (from the `attacks` trait, default first). A current value outside them is still shown, so
 *  the select never hides the state the status line complains about. */
function optionsFor(model, key) {
  const attacks = model.get("attacks") || {};
  const values = key === "method" ? Object.keys(attacks) : [...((attacks[model.get("method")] || {})[`${key}s`] || [])];
  const current = model.get(key);
  if (current && !values.includes(current)) values.push(current);
  return values;
}

function fillOptions(model, control, select) {
  const attacks = model.get("attacks") || {};
  select.replaceChildren();
  for (const value of optionsFor(model, control.key)) {
    const option = document.createElement("option");
    option.value = value;
    option.textContent = control.key === "norm" ? (NORM_LABELS[value] || value) : String(value).replace("_", " ");
    if (control.key === "method" && attacks[value]) option.title = attacks[value].description;
    select.append(option);
  }
  select.value = model.get(control.key);
}

/** A new method keeps the norm and objective it supports, else takes its defaults. */
function chooseMethod(model, method) {
  const spec = (model.get("attacks") || {})[method];
  model.set("method", method);
  if (spec) {
    for (const key of ["norm", "objective"]) {
      const allowed = spec[`${key}s`];
      if (allowed.length && !allowed.includes(model.get(key))) model.set(key, allowed[0]);
    }
  }
  model.save_changes();
}

function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "jostle-root jostle-controls";
  root.dataset.testid = "attack-controls";
  const listeners = [];
  for (const control of CONTROLS) {
    const id = `jostle-${control.key}-${Math.random().toString(36).slice(2, 9)}`;
    const label = document.createElement("label");
    label.htmlFor = id; label.textContent = control.label;
    const output = document.createElement("output");
    output.htmlFor = id;
    let input;
    if (control.kind === "range") {
      input = document.createElement("input");
      input.type = "range";
      // A comparison spans its largest ensemble; a smaller one says what it really uses ("1 of 1").
      const shown = (v) => (control.key === "samples" && model.get("samples_note")) || control.format(v);
      const sync = () => {
        input.min = String(control.min); input.max = String(model.get(control.max));
        input.step = String(control.step(model));
        const v = model.get(control.key);
        input.value = String(v); input.dataset.value = String(v); output.textContent = shown(v);
      };
      input.addEventListener("input", () => {
        const v = Number(input.value);
        output.textContent = control.format(v);
        model.set(control.key, control.key === "budget" ? v : Math.round(v));
        model.save_changes();
      });
      sync();
      if (control.key === "samples") output.dataset.testid = "samples-note";
      const events = `change:${control.key} change:${control.max}` + (control.key === "samples" ? " change:samples_note" : "");
      model.on(events, sync); listeners.push([events, sync]);
    } else {
      input = document.createElement("select");
      const sync = () => { fillOptions(model, control, input); input.dataset.value = model.get(control.key); };
      input.addEventListener("change", () => {
        if (control.key === "method") { chooseMethod(model, input.value); return; }
        model.set(control.key, input.value); model.save_changes();
      });
      sync();
      const events = `change:${control.key} change:attacks` + (control.key === "method" ? "" : " change:method");
      model.on(events, sync); listeners.push([events, sync]);
    }
    input.id = id; input.dataset.testid = control.testid;
    root.append(label, input, output);
  }
  el.append(root);
  return () => { for (const [events, fn] of listeners) model.off(events, fn); };
}

export default { render };
