// Small helpers to build elements without HTML strings, so no text from the server is ever
// parsed as markup and the content security policy needs no inline anything.

const SVG_NS = "http://www.w3.org/2000/svg";
// Set as properties; everything else (selected and checked too, as their defaults) as attributes.
const PROPERTIES = new Set(["value", "disabled", "open"]);

function append(parent, children) {
  for (const child of children.flat(Infinity)) {
    if (child === null || child === undefined || child === false) continue;
    parent.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
}

export function h(tag, props, ...children) {
  const element = document.createElement(tag);
  for (const [name, value] of Object.entries(props || {})) {
    if (value === null || value === undefined || value === false) continue;
    if (name === "class") element.className = value;
    else if (name === "dataset") Object.assign(element.dataset, value);
    else if (name.startsWith("on")) element.addEventListener(name.slice(2), value);
    else if (PROPERTIES.has(name)) element[name] = value;
    else element.setAttribute(name, value === true ? "" : String(value));
  }
  append(element, children);
  return element;
}

export function svg(tag, attributes, ...children) {
  const element = document.createElementNS(SVG_NS, tag);
  for (const [name, value] of Object.entries(attributes || {})) {
    if (value === null || value === undefined) continue;
    element.setAttribute(name, String(value));
  }
  append(element, children);
  return element;
}

export function link(path, params, ...children) {
  return h("a", { href: hashFor(path, params) }, ...children);
}

export function hashFor(path, params) {
  const query = new URLSearchParams();
  for (const [name, value] of Object.entries(params || {})) {
    if (value !== null && value !== undefined && value !== "") query.set(name, String(value));
  }
  const text = query.toString();
  return `#${path}${text ? `?${text}` : ""}`;
}

export function go(path, params) {
  goTo(hashFor(path, params));
}

/** Show ``target`` (a hash), rendering again when it is the one already shown. */
export function goTo(target) {
  if (location.hash === target) window.dispatchEvent(new HashChangeEvent("hashchange"));
  else location.hash = target;
}

export function formValues(form) {
  const values = {};
  for (const [name, value] of new FormData(form)) {
    if (name in values) values[name] = [].concat(values[name], value);
    else values[name] = value;
  }
  return values;
}

export function definitionList(pairs) {
  return h(
    "dl",
    { class: "facts" },
    pairs
      .filter(([, value]) => value !== null && value !== undefined && value !== "")
      .map(([term, value]) => [h("dt", null, term), h("dd", null, value)]),
  );
}

export function panel(title, ...children) {
  return h("section", { class: "panel" }, title ? h("h2", null, title) : null, ...children);
}

export function number(value) {
  if (value === null || value === undefined) return "—";
  if (typeof value !== "number") return String(value);
  if (Number.isInteger(value)) return value.toLocaleString("en");
  return Math.abs(value) >= 100 ? value.toFixed(1) : value.toPrecision(4);
}

export function milliseconds(value) {
  if (value === null || value === undefined) return "—";
  return `${value < 10 ? value.toFixed(2) : value.toFixed(1)} ms`;
}

export function json(value) {
  return h("pre", { class: "raw" }, JSON.stringify(value, null, 2));
}
