// A layered drawing of a model's network, computed from the parents in the
// model document: layers by longest path from the roots (roots moved down
// next to their first child), long edges cut by waypoints, layer orders
// from barycentre sweeps that keep the ordering with the fewest crossings,
// and x positions that pull each node towards its neighbours while keeping
// the order and the spacing (isotonic regression by pooling adjacent
// violators).

import { svg } from "./fmt.js";

const FONT = '"DejaVu Sans Mono", "Menlo", "Consolas", monospace';
const NAME_PX = 12;
const STATES_PX = 10;
const NODE_H = 36;
const LAYER_GAP = 78;
const GAP = 18;
const WAY_GAP = 10;
const MARGIN = 20;

let measureCtx = null;
function textWidth(s, px) {
  if (!measureCtx) measureCtx = document.createElement("canvas").getContext("2d");
  measureCtx.font = `${px}px ${FONT}`;
  return measureCtx.measureText(s).width;
}

// layout returns {nodes: Map(name -> node), layers: [[node]], edges: [{from, to, points}], width, height}.
// A node is {name, real, layer, w, x, y, parents, children, role, states}.
export function layout(doc) {
  const vars = doc.variables || [];
  const nodes = new Map();
  for (const v of vars) {
    nodes.set(v.name, {
      name: v.name, real: true, states: v.states || [], parents: (v.parents || []).slice(), children: [], layer: 0,
    });
  }
  for (const n of nodes.values()) {
    n.parents = n.parents.filter((p) => nodes.has(p));
    for (const p of n.parents) nodes.get(p).children.push(n.name);
  }
  // Topological order (Kahn, document order among ready nodes).
  const indeg = new Map([...nodes.values()].map((n) => [n.name, n.parents.length]));
  const ready = [...nodes.values()].filter((n) => n.parents.length === 0).map((n) => n.name);
  const topo = [];
  while (ready.length) {
    const name = ready.shift();
    topo.push(name);
    for (const c of nodes.get(name).children) {
      indeg.set(c, indeg.get(c) - 1);
      if (indeg.get(c) === 0) ready.push(c);
    }
  }
  if (topo.length !== nodes.size) throw new Error("the model's parents form a cycle");
  for (const name of topo) {
    const n = nodes.get(name);
    n.layer = n.parents.length ? 1 + Math.max(...n.parents.map((p) => nodes.get(p).layer)) : 0;
  }
  for (const n of nodes.values()) {
    if (n.parents.length === 0 && n.children.length) n.layer = Math.min(...n.children.map((c) => nodes.get(c).layer)) - 1;
    n.role = n.parents.length === 0 ? "root" : n.children.length === 0 ? "leaf" : "inner";
    const states = n.states.join(" · ");
    n.statesText = states;
    n.w = Math.ceil(Math.max(textWidth(n.name, NAME_PX), textWidth(states, STATES_PX))) + 18;
  }

  // Layers, with a waypoint per layer crossed by a long edge.
  const depth = Math.max(0, ...[...nodes.values()].map((n) => n.layer)) + 1;
  const layers = Array.from({ length: depth }, () => []);
  for (const name of topo) layers[nodes.get(name).layer].push(nodes.get(name));
  const up = new Map(); // node -> nodes in the layer above it is linked to
  const down = new Map();
  const link = (a, b) => {
    if (!down.has(a)) down.set(a, []);
    if (!up.has(b)) up.set(b, []);
    down.get(a).push(b);
    up.get(b).push(a);
  };
  const edges = [];
  for (const n of nodes.values()) {
    for (const p of n.parents) {
      const from = nodes.get(p);
      const chain = [from];
      for (let l = from.layer + 1; l < n.layer; l++) {
        const w = { name: `${p}->${n.name}@${l}`, real: false, layer: l, w: 0 };
        layers[l].push(w);
        chain.push(w);
      }
      chain.push(n);
      for (let i = 0; i + 1 < chain.length; i++) link(chain[i], chain[i + 1]);
      edges.push({ from: p, to: n.name, chain });
    }
  }

  orderLayers(layers, up, down);
  placeX(layers, up, down);
  let minX = Infinity;
  let maxX = -Infinity;
  for (const layer of layers) {
    for (const n of layer) {
      minX = Math.min(minX, n.x - n.w / 2);
      maxX = Math.max(maxX, n.x + n.w / 2);
    }
  }
  if (!Number.isFinite(minX)) minX = maxX = 0;
  for (const layer of layers) {
    for (const n of layer) {
      n.x += MARGIN - minX;
      n.y = MARGIN + n.layer * LAYER_GAP;
    }
  }
  for (const e of edges) {
    e.points = e.chain.map((n, i) =>
      i === 0 ? [n.x, n.y + NODE_H] : i === e.chain.length - 1 ? [n.x, n.y] : [n.x, n.y + NODE_H / 2]);
  }
  return {
    nodes, layers, edges, width: maxX - minX + 2 * MARGIN, height: 2 * MARGIN + (depth - 1) * LAYER_GAP + NODE_H,
  };
}

function crossings(layers, down) {
  let total = 0;
  for (let l = 0; l + 1 < layers.length; l++) {
    const pos = new Map(layers[l + 1].map((n, i) => [n, i]));
    const pairs = [];
    layers[l].forEach((n, i) => {
      for (const c of down.get(n) || []) pairs.push([i, pos.get(c)]);
    });
    for (let a = 0; a < pairs.length; a++) {
      for (let b = a + 1; b < pairs.length; b++) {
        if ((pairs[a][0] - pairs[b][0]) * (pairs[a][1] - pairs[b][1]) < 0) total++;
      }
    }
  }
  return total;
}

function orderLayers(layers, up, down) {
  const snapshot = () => layers.map((l) => l.slice());
  let best = snapshot();
  let bestCross = crossings(layers, down);
  const sortBy = (layer, neighbours, posOf) => {
    const key = new Map();
    layer.forEach((n, i) => {
      const ns = neighbours.get(n) || [];
      key.set(n, ns.length ? ns.reduce((s, m) => s + posOf.get(m), 0) / ns.length : i);
    });
    layer.sort((a, b) => key.get(a) - key.get(b));
  };
  for (let sweep = 0; sweep < 24 && bestCross > 0; sweep++) {
    if (sweep % 2 === 0) {
      for (let l = 1; l < layers.length; l++) sortBy(layers[l], up, new Map(layers[l - 1].map((n, i) => [n, i])));
    } else {
      for (let l = layers.length - 2; l >= 0; l--) sortBy(layers[l], down, new Map(layers[l + 1].map((n, i) => [n, i])));
    }
    const c = crossings(layers, down);
    if (c < bestCross) {
      bestCross = c;
      best = snapshot();
    }
  }
  best.forEach((l, i) => (layers[i] = l));
}

// placeAt sets the x of one layer's nodes as close as possible (least
// squares) to want, keeping their order and spacing.
function placeAt(layer, want) {
  const sep = (a, b) => (a.w + b.w) / 2 + (a.real && b.real ? GAP : WAY_GAP);
  const off = [0];
  for (let i = 1; i < layer.length; i++) off.push(off[i - 1] + sep(layer[i - 1], layer[i]));
  // Non-decreasing fit of want[i] - off[i]: pool adjacent violators.
  const blocks = [];
  for (let i = 0; i < layer.length; i++) {
    blocks.push({ sum: want[i] - off[i], n: 1 });
    while (blocks.length > 1) {
      const b = blocks[blocks.length - 1];
      const a = blocks[blocks.length - 2];
      if (a.sum / a.n <= b.sum / b.n) break;
      blocks.pop();
      a.sum += b.sum;
      a.n += b.n;
    }
  }
  let i = 0;
  for (const b of blocks) {
    for (let k = 0; k < b.n; k++, i++) layer[i].x = b.sum / b.n + off[i];
  }
}

function placeX(layers, up, down) {
  for (const layer of layers) placeAt(layer, layer.map(() => 0));
  const centre = (ns) => ns.reduce((s, m) => s + m.x, 0) / ns.length;
  for (let round = 0; round < 16; round++) {
    const order = round % 2 === 0 ? layers : layers.slice().reverse();
    for (const layer of order) {
      const want = layer.map((n) => {
        const ns = [...(up.get(n) || []), ...(down.get(n) || [])];
        return ns.length ? centre(ns) : n.x;
      });
      placeAt(layer, want);
    }
  }
}

function edgePath(points) {
  let d = `M${points[0][0].toFixed(1)},${points[0][1].toFixed(1)}`;
  for (let i = 1; i < points.length; i++) {
    const [x0, y0] = points[i - 1];
    const [x1, y1] = points[i];
    const my = (y0 + y1) / 2;
    d += ` C${x0.toFixed(1)},${my.toFixed(1)} ${x1.toFixed(1)},${my.toFixed(1)} ${x1.toFixed(1)},${y1.toFixed(1)}`;
  }
  return d;
}

// drawNetwork returns {element, mark(evidence, targets), select(name)}.
export function drawNetwork(doc, onSelect) {
  const g = layout(doc);
  const root = svg("svg", {
    class: "net-drawing", viewBox: `0 0 ${g.width.toFixed(0)} ${g.height.toFixed(0)}`,
    width: g.width.toFixed(0), height: g.height.toFixed(0), role: "img",
    "aria-label": `network of ${doc.name}: ${g.nodes.size} variables`, "data-model": doc.name,
  });
  root.append(svg("defs", null,
    svg("marker", { id: "arrowhead", viewBox: "0 0 10 10", refX: 9, refY: 5, markerWidth: 7, markerHeight: 7, orient: "auto-start-reverse" },
      svg("path", { d: "M0,1 L10,5 L0,9 z", class: "arrow" }))));
  const edgeLayer = svg("g", { class: "edges" });
  const nodeLayer = svg("g", { class: "nodes" });
  root.append(edgeLayer, nodeLayer);
  const edgeEls = [];
  for (const e of g.edges) {
    const p = svg("path", { class: "edge", d: edgePath(e.points), "marker-end": "url(#arrowhead)", "data-from": e.from, "data-to": e.to });
    edgeEls.push(p);
    edgeLayer.append(p);
  }
  const nodeEls = new Map();
  for (const n of g.nodes.values()) {
    const grp = svg("g", {
      class: `node role-${n.role}`, transform: `translate(${(n.x - n.w / 2).toFixed(1)},${n.y.toFixed(1)})`,
      "data-var": n.name, "data-layer": n.layer, tabindex: 0, role: "button", "aria-label": `variable ${n.name}`,
    },
    svg("rect", { class: "box", width: n.w.toFixed(1), height: NODE_H, rx: 6 }),
    svg("text", { class: "name", x: 9, y: 15, "font-family": FONT, "font-size": NAME_PX, text: n.name }),
    svg("text", { class: "states", x: 9, y: 29, "font-family": FONT, "font-size": STATES_PX, text: n.statesText }));
    grp.addEventListener("click", () => onSelect(n.name));
    grp.addEventListener("keydown", (ev) => {
      if (ev.key === "Enter" || ev.key === " ") {
        ev.preventDefault();
        onSelect(n.name);
      }
    });
    nodeEls.set(n.name, grp);
    nodeLayer.append(grp);
  }
  return {
    element: root,
    layout: g,
    // mark shows the form's evidence (variable -> state) and targets on the drawing.
    mark(evidence, targets) {
      for (const [name, grp] of nodeEls) {
        grp.classList.toggle("is-evidence", Object.hasOwn(evidence, name));
        grp.classList.toggle("is-target", targets.has(name));
        const st = grp.querySelector("text.states");
        const n = g.nodes.get(name);
        st.textContent = Object.hasOwn(evidence, name) ? `= ${evidence[name]}` : n.statesText;
      }
    },
    select(name) {
      for (const [n, grp] of nodeEls) grp.classList.toggle("is-selected", n === name);
      for (const p of edgeEls) {
        p.classList.toggle("is-near", p.dataset.from === name || p.dataset.to === name);
      }
    },
  };
}
