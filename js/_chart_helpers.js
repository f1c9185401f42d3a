// jostle chart helpers, placed after _canvas_helpers.js and ahead of the SVG charts' modules
// when they are served (widgets/_assets.py: canvas_module): elements with attributes, labelled selects.

const SVG = "http://www.w3.org/2000/svg";

/** A new element (in namespace ``ns`` when given) with ``attrs``, appended to ``parent``. */
function node(tag, attrs = {}, parent = null, ns = null) {
  const el = ns ? document.createElementNS(ns, tag) : document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) el.setAttribute(k, String(v));
  if (parent) parent.appendChild(el);
  return el;
}

/** Replace the options of ``select`` (shown as ``labels`` when given), selecting ``current``. */
function fillSelect(select, options, current, labels = null) {
  select.replaceChildren();
  options.forEach((value, i) => {
    const opt = node("option", { value }, select);
    opt.textContent = labels ? labels[i] : String(value);
    if (String(value) === String(current)) opt.selected = true;
  });
}

/** A labelled select appended to ``bar``. */
function pick(bar, label, testid) {
  const wrap = node("label", {}, bar);
  wrap.appendChild(document.createTextNode(label + " "));
  return node("select", { "data-testid": testid }, wrap);
}
