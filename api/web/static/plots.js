// Posterior bars with interval whiskers, and the convergence plot: the
// estimate and its interval against the samples drawn.

import { svg, prob, interval, isExact } from "./fmt.js";

const MONO = '"DejaVu Sans Mono", "Menlo", "Consolas", monospace';

// orderedTargets lists [variable, [states]] in the model's order (targets
// missing from the model last, states as the result has them).
export function orderedTargets(result, doc) {
  const marg = result.marginals || {};
  const out = [];
  const seen = new Set();
  for (const v of (doc && doc.variables) || []) {
    if (marg[v.name]) {
      const states = v.states.filter((s) => marg[v.name][s]);
      for (const s of Object.keys(marg[v.name])) if (!states.includes(s)) states.push(s);
      out.push([v.name, states]);
      seen.add(v.name);
    }
  }
  for (const name of Object.keys(marg).sort()) {
    if (!seen.has(name)) out.push([name, Object.keys(marg[name])]);
  }
  return out;
}

function niceStep(span, n) {
  const raw = span / n;
  const mag = 10 ** Math.floor(Math.log10(raw));
  for (const m of [1, 2, 2.5, 5, 10]) if (raw <= m * mag) return m * mag;
  return 10 * mag;
}

function ticks(lo, hi, n) {
  if (hi <= lo) return [lo];
  const step = niceStep(hi - lo, n);
  const out = [];
  for (let t = Math.ceil(lo / step) * step; t <= hi + step * 1e-9; t += step) out.push(+t.toPrecision(12));
  return out;
}

function compact(n) {
  if (n >= 1e6) return +(n / 1e6).toPrecision(3) + "M";
  if (n >= 1e3) return +(n / 1e3).toPrecision(3) + "k";
  return String(n);
}

// posteriorBars draws every target state's estimate as a bar with its
// interval as a whisker; onPick(variable, state) when a row is clicked.
export function posteriorBars(result, doc, opts = {}) {
  const rows = orderedTargets(result, doc);
  const W = Math.max(360, Math.round(opts.width || 520));
  // Columns: state names (DejaVu Sans Mono advances 0.6 em), the 0..1
  // track, and the estimate with its interval.
  const longest = Math.max(4, ...rows.flatMap(([, states]) => states.map((s) => s.length)));
  const LABEL = Math.min(200, 24 + Math.ceil(longest * 11.5 * 0.6));
  const VALUE = 190;
  const TRACK = Math.max(120, W - LABEL - VALUE);
  const x0 = LABEL;
  const x1 = LABEL + TRACK;
  const ROW = 21;
  const HEAD = 22;
  const top = 18;
  let y = top;
  const body = svg("g", null);
  for (const [name, states] of rows) {
    body.append(svg("text", { class: "var-label", x: 0, y: y + 15, "font-family": MONO, text: name }));
    y += HEAD;
    for (const s of states) {
      const iv = result.marginals[name][s];
      const sx = (v) => x0 + Math.max(0, Math.min(1, v)) * TRACK;
      const row = svg("g", {
        class: "post-row" + (opts.picked && opts.picked[0] === name && opts.picked[1] === s ? " is-picked" : ""),
        "data-var": name, "data-state": s, "data-p": iv.p, "data-lo": iv.lo, "data-hi": iv.hi,
        transform: `translate(0,${y})`,
      });
      const cy = ROW / 2;
      row.append(
        svg("rect", { class: "row-hit", x: 0, y: 0, width: W, height: ROW }),
        svg("text", { class: "state-label", x: 14, y: cy + 4, "font-family": MONO, text: s }),
        svg("rect", { class: "track", x: x0, y: cy - 6, width: TRACK, height: 12, rx: 2 }),
        svg("rect", { class: "bar", x: x0, y: cy - 6, width: (sx(iv.p) - x0).toFixed(2), height: 12, rx: 2 }),
      );
      if (!isExact(iv)) {
        row.append(
          svg("line", { class: "whisker", x1: sx(iv.lo).toFixed(2), x2: sx(iv.hi).toFixed(2), y1: cy, y2: cy }),
          svg("line", { class: "whisker cap", x1: sx(iv.lo).toFixed(2), x2: sx(iv.lo).toFixed(2), y1: cy - 8, y2: cy + 8 }),
          svg("line", { class: "whisker cap", x1: sx(iv.hi).toFixed(2), x2: sx(iv.hi).toFixed(2), y1: cy - 8, y2: cy + 8 }),
        );
      }
      row.append(svg("text", { class: "value", x: x1 + 10, y: cy + 4, "font-family": MONO, text: interval(iv) }));
      row.append(svg("title", null, `P(${name} = ${s}) = ${interval(iv)}`));
      if (opts.onPick) row.addEventListener("click", () => opts.onPick(name, s));
      body.append(row);
      y += ROW;
    }
    y += 6;
  }
  const H = y + 4;
  const axis = svg("g", { class: "axis" });
  for (const t of [0, 0.25, 0.5, 0.75, 1]) {
    const x = x0 + t * TRACK;
    axis.append(
      svg("line", { class: "grid", x1: x, x2: x, y1: top - 4, y2: H - 4 }),
      svg("text", { class: "tick", x, y: top - 7, "text-anchor": "middle", text: String(t) }),
    );
  }
  const root = svg("svg", { class: "posterior", viewBox: `0 0 ${W} ${H}`, width: W, height: H, role: "img", "aria-label": "posterior probabilities with intervals" });
  root.append(axis, body);
  return root;
}

// convergencePlot draws the history [{samples, p, lo, hi}] of one target
// state: the interval as a band, the estimate as a line.
export function convergencePlot(points, label, confidence, width) {
  const W = Math.max(420, Math.round(width || 660));
  const H = 260;
  const L = 62;
  const R = 18;
  const T = 16;
  const B = 40;
  const root = svg("svg", {
    class: "convergence", viewBox: `0 0 ${W} ${H}`, width: W, height: H, role: "img",
    "aria-label": `convergence of ${label}`, "data-points": points.length,
    "data-last-samples": points.length ? points[points.length - 1].samples : null,
    "data-last-p": points.length ? points[points.length - 1].p : null,
  });
  if (!points.length) return root;
  const xmax = Math.max(...points.map((p) => p.samples)) || 1;
  let ylo = Math.min(...points.map((p) => p.lo));
  let yhi = Math.max(...points.map((p) => p.hi));
  const pad = Math.max((yhi - ylo) * 0.12, Math.max(Math.abs(yhi), 1e-12) * 0.002);
  ylo = Math.max(0, ylo - pad);
  yhi = Math.min(1, yhi + pad);
  if (yhi <= ylo) yhi = ylo + 1e-9;
  const sx = (v) => L + (v / xmax) * (W - L - R);
  const sy = (v) => T + (1 - (v - ylo) / (yhi - ylo)) * (H - T - B);
  const axis = svg("g", { class: "axis" });
  for (const t of ticks(0, xmax, 5)) {
    axis.append(
      svg("line", { class: "grid", x1: sx(t), x2: sx(t), y1: T, y2: H - B }),
      svg("text", { class: "tick", x: sx(t), y: H - B + 15, "text-anchor": "middle", text: compact(t) }),
    );
  }
  for (const t of ticks(ylo, yhi, 5)) {
    axis.append(
      svg("line", { class: "grid", x1: L, x2: W - R, y1: sy(t), y2: sy(t) }),
      svg("text", { class: "tick", x: L - 6, y: sy(t) + 4, "text-anchor": "end", text: prob(t) }),
    );
  }
  axis.append(
    svg("line", { class: "frame", x1: L, x2: L, y1: T, y2: H - B }),
    svg("line", { class: "frame", x1: L, x2: W - R, y1: H - B, y2: H - B }),
    svg("text", { class: "axis-label", x: (L + W - R) / 2, y: H - 6, "text-anchor": "middle", text: "samples drawn" }),
  );
  root.append(axis);
  const fwd = points.map((p) => `${sx(p.samples).toFixed(1)},${sy(p.hi).toFixed(1)}`);
  const back = points.slice().reverse().map((p) => `${sx(p.samples).toFixed(1)},${sy(p.lo).toFixed(1)}`);
  root.append(svg("path", { class: "band", d: `M${fwd.join(" L")} L${back.join(" L")} Z` }));
  if (points.length > 1) {
    root.append(svg("path", {
      class: "estimate", d: "M" + points.map((p) => `${sx(p.samples).toFixed(1)},${sy(p.p).toFixed(1)}`).join(" L"),
    }));
  }
  for (const p of points) {
    root.append(svg("circle", { class: "point", cx: sx(p.samples).toFixed(1), cy: sy(p.p).toFixed(1), r: 2.6 },
      svg("title", null, `${compact(p.samples)} samples: ${interval(p)}`)));
    if (points.length === 1) {
      root.append(svg("line", { class: "whisker", x1: sx(p.samples), x2: sx(p.samples), y1: sy(p.lo), y2: sy(p.hi) }));
    }
  }
  const conf = Math.round((confidence || 0.95) * 100);
  const key = svg("g", { class: "key", transform: `translate(${W - R - 250},${T + 4})` },
    svg("rect", { class: "key-bg", x: 0, y: 0, width: 250, height: 22, rx: 3 }),
    svg("line", { class: "estimate-key", x1: 8, x2: 28, y1: 11, y2: 11 }),
    svg("text", { class: "tick", x: 33, y: 15, text: "estimate" }),
    svg("rect", { class: "band", x: 102, y: 5, width: 20, height: 12 }),
    svg("text", { class: "tick", x: 127, y: 15, text: `${conf}% interval` }));
  root.append(key);
  return root;
}
