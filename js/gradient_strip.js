// jostle gradient strip: the expected gradient at one input for S = 1, 4, 16, 64, all,
// each image on its own scale, its L-inf norm written under it. Captions are text only.
// typed() and rgb() come from _canvas_helpers.js, served ahead of this module.

const mixColour = (a, b, t) => a.map((v, c) => Math.round(v + t * (b[c] - v)));

/** Colour of one value: diverging around the surface colour, or a one-hue ramp for magnitudes. */
function colourScale(root, scale, signed) {
  const css = getComputedStyle(root);
  const light = rgb(css.getPropertyValue("--jostle-surface"));
  const low = rgb(css.getPropertyValue("--jostle-diverge-low")), high = rgb(css.getPropertyValue("--jostle-diverge-high"));
  return (v) => {
    const t = Math.max(-1, Math.min(1, v / (scale || 1)));
    if (!signed) return mixColour(light, high, Math.max(0, t));
    return t < 0 ? mixColour(light, low, -t) : mixColour(light, high, t);
  };
}

function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "jostle-root jostle-gradients"; root.dataset.testid = "gradient-strip";
  const row = document.createElement("div"); row.className = "jostle-gradient-row";
  const note = document.createElement("div"); note.className = "jostle-gradient-note";
  note.dataset.testid = "gradient-strip-note";
  root.append(row, note); el.append(root);
  let revision = 0;
  const draw = () => {
    if (!root.isConnected) return; // theme colours resolve only in the page; the observer calls again
    const w = model.get("images"), values = typed(w);
    const scales = model.get("scales"), counts = model.get("sample_counts"), norms = model.get("norms");
    const captions = model.get("captions"), signed = model.get("signed"), highlighted = model.get("highlighted");
    row.replaceChildren();
    if (w && w.shape.length === 3 && values.length) {
      const [n, height, width] = w.shape;
      for (let k = 0; k < n; k++) {
        const figure = document.createElement("figure"), canvas = document.createElement("canvas");
        const caption = document.createElement("figcaption");
        figure.dataset.testid = "gradient-strip-item";
        figure.dataset.samples = String(counts[k]); figure.dataset.linf = String(norms[k]);
        figure.dataset.highlighted = String(k === highlighted);
        caption.textContent = captions[k] === undefined ? "" : String(captions[k]);
        canvas.setAttribute("role", "img"); canvas.setAttribute("aria-label", caption.textContent.replace(/\n/g, ", "));
        paintValues(canvas, values, k * height * width, height, width, colourScale(root, scales[k], signed));
        figure.append(canvas, caption); row.append(figure);
      }
    }
    note.textContent = model.get("note");
    revision += 1;
    root.dataset.revision = String(revision); root.dataset.count = String(row.children.length);
  };
  const events = "change:images change:scales change:signed change:sample_counts change:norms change:captions change:highlighted change:note";
  model.on(events, draw);
  const attached = new ResizeObserver(() => { if (root.isConnected && !root.dataset.revision) draw(); });
  attached.observe(root);
  draw();
  return () => { attached.disconnect(); model.off(events, draw); };
}

export default { render };
