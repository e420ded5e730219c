// Building DOM nodes from data without innerHTML, so nothing a user typed (part numbers, reasons,
// error texts) is ever parsed as markup.

export function h(tag, attrs = {}, ...children) {
  const el = document.createElement(tag);
  setAttrs(el, attrs);
  append(el, children);
  return el;
}

const SVG_NS = "http://www.w3.org/2000/svg";
export function s(tag, attrs = {}, ...children) {
  const el = document.createElementNS(SVG_NS, tag);
  setAttrs(el, attrs);
  append(el, children);
  return el;
}

function setAttrs(el, attrs) {
  for (const [k, v] of Object.entries(attrs ?? {})) {
    if (v === null || v === undefined || v === false) continue;
    if (k.startsWith("on") && typeof v === "function") el.addEventListener(k.slice(2), v);
    else if (k === "class") el.setAttribute("class", Array.isArray(v) ? v.filter(Boolean).join(" ") : v);
    else if (k === "dataset") Object.assign(el.dataset, v);
    else if (k === "value" && "value" in el) el.value = v;
    else if (k === "checked" || k === "disabled" || k === "selected") el[k] = !!v;
    else el.setAttribute(k, v === true ? "" : String(v));
  }
}

function append(el, children) {
  for (const c of children.flat(Infinity)) {
    if (c === null || c === undefined || c === false) continue;
    el.append(c instanceof Node ? c : document.createTextNode(String(c)));
  }
}

export function clear(el) {
  while (el.firstChild) el.firstChild.remove();
  return el;
}

// A link handled by the page router (no full reload).
export function link(href, ...children) {
  return h("a", { href, "data-nav": "" }, ...children);
}

export function errorBox(err, context) {
  const p = err?.problem ?? {};
  return h(
    "div",
    { class: "error", role: "alert", "data-problem": p.type ?? "" },
    h("strong", {}, context ? `${context}: ` : "", p.title ?? "Something went wrong"),
    p.detail && p.detail !== p.title ? h("div", { class: "detail" }, p.detail) : null,
    p.line ? h("div", { class: "where" }, `at line ${p.line}`) : null,
    !p.detail && !p.title ? h("div", {}, String(err?.message ?? err)) : null,
  );
}

export function badge(value, kind = value) {
  if (value === null || value === undefined) return h("span", { class: "badge none" }, "—");
  return h("span", { class: `badge b-${kind}`, "data-badge": value }, value);
}

export function safetyNote({ analyserPorts = false } = {}) {
  return h(
    "aside",
    { class: "safety", role: "note", "data-safety": "" },
    h("strong", {}, "Measuring power components safely. "),
    "A choke taken out of a circuit stores no energy; the hazards are around it. The equipment it came from can " +
      "hold a dangerous charge in its capacitors after power-off: de-energise it, discharge and verify before you " +
      "touch a part. Interrupting current through an inductor (pulling a lead from a biased or in-circuit part) " +
      "drives a voltage kick that can arc and shock: bring bias and supplies to zero first. DC-bias and " +
      "high-voltage test sets can deliver a dangerous shock. Follow your local electrical codes and licensed " +
      "practice — this dashboard does not replace them.",
    analyserPorts
      ? h(
          "p",
          { "data-analyser-caution": "" },
          h("strong", {}, "Analyser ports. "),
          "The analyser's ports take only small DC and RF levels: use a DC block or bias tee rated for any bias, " +
            "and never connect a part that is still in a powered circuit.",
        )
      : null,
  );
}
