// jostle status line: what is computing, how long the last update took, or the error (text only).
// It also turns `jostle-tid-<id>` classes in the surrounding widget into data-testid attributes,
// because ipywidgets containers and bqplot figures cannot set attributes themselves.

const PREFIX = "jostle-tid-";

/** @param {Element} scope */
function tag(scope) {
  for (const node of [scope, ...scope.querySelectorAll(`[class*="${PREFIX}"]`)]) {
    const cls = [...node.classList].find((c) => c.startsWith(PREFIX));
    if (cls && node.getAttribute("data-testid") !== cls.slice(PREFIX.length)) {
      node.setAttribute("data-testid", cls.slice(PREFIX.length));
    }
  }
}

/** Outermost `.jostle-tag-scope` around el, once el is in the page. */
function outerScope(el) {
  let scope = null;
  for (let node = el.parentElement; node; node = node.parentElement) {
    if (node.classList.contains("jostle-tag-scope")) scope = node;
  }
  return scope;
}

function render({ model, el }) {
  const root = document.createElement("div");
  root.className = "jostle-root jostle-status";
  const text = document.createElement("div");
  text.className = "jostle-status-text"; text.dataset.testid = "status-line";
  text.setAttribute("role", "status"); text.setAttribute("aria-live", "polite");
  const caution = document.createElement("div");
  caution.className = "jostle-caution"; caution.dataset.testid = "caution-note";
  root.append(text, caution); el.append(root);
  const update = () => {
    text.textContent = model.get("message");
    text.dataset.state = model.get("state");
    caution.textContent = model.get("caution");
  };
  model.on("change:message change:state change:caution", update);
  update();
  let observer = null, tries = 0, timer = 0;
  const attach = () => {
    const scope = outerScope(el);
    if (!scope) { if (tries++ < 200) timer = setTimeout(attach, 50); return; }
    tag(scope);
    observer = new MutationObserver(() => tag(scope));
    observer.observe(scope, { subtree: true, childList: true, attributes: true, attributeFilter: ["class"] });
  };
  attach();
  return () => {
    clearTimeout(timer);
    if (observer) observer.disconnect();
    model.off("change:message change:state change:caution", update);
  };
}

export default { render };
