// jostle test-set gradients: for each sample count S, a heat map of every input component's
// expected gradient (test inputs down, components across, its own symmetric scale) and the
// mean |component| over the inputs (one scale for every S). Captions are text only.
// typed() and rgb() come from _canvas_helpers.js, served ahead of this module.

const blend = (a, b, t) => a.map((v, c) => Math.round(v + t * (b[c] - v)));

/** Paint rows x cols values of `values` from `offset` with `colour`. */
function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "jostle-root jostle-components"; root.dataset.testid = "gradient-components";
  el.append(root);
  let revision = 0;
  const draw = () => {
    if (!root.isConnected) return; // theme colours resolve only in the page; the observer calls again
    const css = getComputedStyle(root);
    const light = rgb(css.getPropertyValue("--jostle-surface"));
    const low = rgb(css.getPropertyValue("--jostle-diverge-low")), high = rgb(css.getPropertyValue("--jostle-diverge-high"));
    const heat = model.get("heat"), heatValues = typed(heat), summary = model.get("summary"), summaryValues = typed(summary);
    const scales = model.get("heat_scales"), counts = model.get("sample_counts"), captions = model.get("captions");
    const top = model.get("summary_scale") || 1;
    root.replaceChildren();
    for (const text of ["S", "test inputs x components", "mean |component|", ""]) {
      const head = document.createElement("div"); head.className = "jostle-components-head"; head.textContent = text;
      root.append(head);
    }
    if (heat && heat.shape.length === 3 && heatValues.length) {
      const [n, rows, cols] = heat.shape;
      const [, height, width] = summary.shape.length === 3 ? summary.shape : [0, 0, 0];
      for (let k = 0; k < n; k++) {
        const label = document.createElement("div"); label.className = "jostle-components-label";
        label.textContent = `S = ${counts[k]}`;
        const map = document.createElement("canvas"); map.className = "jostle-heat";
        map.dataset.testid = "gradient-components-heat"; map.dataset.samples = String(counts[k]);
        map.setAttribute("role", "img"); map.setAttribute("aria-label", `S = ${counts[k]}: ${rows} inputs by ${cols} components`);
        map.style.height = `${Math.max(40, Math.min(240, 4 * rows))}px`;
        const scale = scales[k] || 1;
        paintValues(map, heatValues, k * rows * cols, rows, cols, (v) => {
          const t = Math.max(-1, Math.min(1, v / scale));
          return t < 0 ? blend(light, low, -t) : blend(light, high, t);
        });
        const mean = document.createElement("canvas"); mean.className = "jostle-summary";
        mean.dataset.testid = "gradient-components-summary"; mean.setAttribute("role", "img");
        mean.setAttribute("aria-label", `S = ${counts[k]}: mean absolute component`);
        if (height * width) {
          paintValues(mean, summaryValues, k * height * width, height, width, (v) => blend(light, high, Math.min(1, v / top)));
          mean.style.height = `${Math.max(8, Math.round(72 * height / width))}px`;
        }
        const caption = document.createElement("div"); caption.className = "jostle-components-caption";
        caption.textContent = captions[k] === undefined ? "" : String(captions[k]);
        root.append(label, map, mean, caption);
      }
    }
    const note = document.createElement("div"); note.className = "jostle-components-note";
    note.dataset.testid = "gradient-components-note"; note.textContent = model.get("note");
    root.append(note);
    revision += 1;
    root.dataset.revision = String(revision); root.dataset.rows = String(counts.length);
  };
  const events = "change:heat change:heat_scales change:summary change:summary_scale change:sample_counts change:captions change:note";
  model.on(events, draw);
  const attached = new ResizeObserver(() => { if (root.isConnected && !root.dataset.revision) draw(); });
  attached.observe(root);
  draw();
  return () => { attached.disconnect(); model.off(events, draw); };
}

export default { render };
