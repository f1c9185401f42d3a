// Helpers of the input map's certified-radius layer (served ahead of explorer_map.js by
// widgets/_assets.py: canvas_module): its picture and the numbers beside its colour ramp.

/** The certified-radius layer: one hue, darker where the proved radius is larger (row 0 = lowest y). */
function paintRadius(model, colours) {
  const grid = model.get("radius_layer"), values = typed(grid);
  if (!grid || grid.shape.length !== 2 || values.length === 0) return null;
  const [ny, nx] = grid.shape, top = model.get("radius_layer_max") || 1;
  const off = Object.assign(document.createElement("canvas"), { width: nx, height: ny });
  const ctx = off.getContext("2d"), img = ctx.createImageData(nx, ny), [r, g, b] = colours.certifiedRgb;
  for (let j = 0; j < ny; j++) {
    for (let i = 0; i < nx; i++) {
      const out = ((ny - 1 - j) * nx + i) * 4;
      img.data[out] = r; img.data[out + 1] = g; img.data[out + 2] = b;
      img.data[out + 3] = Math.round(255 * 0.85 * Math.min(1, Math.max(0, values[j * nx + i] / top)));
    }
  }
  ctx.putImageData(img, 0, 0);
  return off;
}

/** Numbers beside the certified-radius colour ramp (text only), shown with that layer. */
function buildRadiusLegend(model, box) {
  const grid = model.get("radius_layer"), shown = model.get("layer") === "certified";
  box.hidden = !shown;
  if (!shown) return;
  const top = model.get("radius_layer_max") || 0, ramp = Object.assign(document.createElement("i"), { className: "jostle-ramp" });
  const [low, high, note] = [0, 1, 2].map(() => document.createElement("span"));
  low.textContent = "r = 0"; high.textContent = `${top.toPrecision(3)}`;
  note.textContent = grid && grid.shape.length === 2 && grid.shape[0] > 0
    ? ` certified radius per cell (${model.get("radius_layer_note")})` : " certified radius: computing";
  box.replaceChildren(low, ramp, high, note);
}

