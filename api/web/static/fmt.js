// Number formatting and small DOM helpers. Every probability is shown with
// its interval, or marked exact when the interval has no width.

// prob formats a probability: four decimals from 0.001 up, three
// significant digits in exponent form below.
export function prob(x) {
  if (x === null || x === undefined || Number.isNaN(x)) return "–";
  if (x === 0) return "0";
  if (x === 1) return "1";
  if (Math.abs(x) >= 0.001) return x.toFixed(4);
  return x.toExponential(2);
}

export function isExact(iv) {
  return iv && iv.lo === iv.p && iv.hi === iv.p;
}

// interval formats {p, lo, hi}: "0.4323 (0.4304 to 0.4341)" or "0.4323 exact".
export function interval(iv) {
  if (!iv) return "–";
  if (isExact(iv)) return prob(iv.p) + " exact";
  return `${prob(iv.p)} (${prob(iv.lo)} to ${prob(iv.hi)})`;
}

export function count(n) {
  if (n === null || n === undefined) return "–";
  if (!Number.isFinite(n)) return String(n);
  return Math.round(n).toLocaleString("en-US").replace(/,/g, "\u2009");
}

export function seconds(s) {
  if (!s && s !== 0) return "–";
  if (s < 1) return (s * 1000).toFixed(0) + " ms";
  if (s < 120) return s.toFixed(2) + " s";
  return (s / 60).toFixed(1) + " min";
}

export function ago(iso) {
  if (!iso) return "";
  const t = Date.parse(iso);
  if (!Number.isFinite(t)) return "";
  const s = Math.max(0, (Date.now() - t) / 1000);
  if (s < 60) return Math.floor(s) + " s ago";
  if (s < 3600) return Math.floor(s / 60) + " min ago";
  if (s < 86400) return Math.floor(s / 3600) + " h ago";
  return Math.floor(s / 86400) + " d ago";
}

export const stopReasons = {
  max_samples: "the sample limit was reached",
  abs_err: "every interval is within the absolute half-width asked for",
  rel_err: "every interval is within the relative half-width asked for",
  timeout: "the time limit was reached",
  cancelled: "the job was cancelled",
  exact: "exact answer",
};

export function stopReason(r) {
  if (!r) return "still sampling";
  return stopReasons[r] ? `${r}: ${stopReasons[r]}` : r;
}

// el builds an element: el("div", {class: "x", onclick: fn}, child, "text").
export function el(tag, attrs, ...children) {
  const n = document.createElement(tag);
  setAttrs(n, attrs);
  append(n, children);
  return n;
}

const SVGNS = "http://www.w3.org/2000/svg";

export function svg(tag, attrs, ...children) {
  const n = document.createElementNS(SVGNS, tag);
  setAttrs(n, attrs);
  append(n, children);
  return n;
}

function setAttrs(n, attrs) {
  if (!attrs) return;
  for (const [k, v] of Object.entries(attrs)) {
    if (v === undefined || v === null || v === false) continue;
    if (k.startsWith("on") && typeof v === "function") n.addEventListener(k.slice(2), v);
    else if (k === "text") n.textContent = v;
    else n.setAttribute(k, v === true ? "" : String(v));
  }
}

// add appends children to n, flattening arrays and skipping null,
// undefined and false; it returns n.
export function add(n, ...children) {
  append(n, children);
  return n;
}

function append(n, children) {
  for (const c of children.flat(Infinity)) {
    if (c === null || c === undefined || c === false) continue;
    n.append(c instanceof Node ? c : document.createTextNode(String(c)));
  }
}

export function clear(n) {
  while (n.firstChild) n.firstChild.remove();
  return n;
}
