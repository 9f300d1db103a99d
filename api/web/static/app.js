// The page: a rail with the models and jobs, and a view chosen by the
// address's fragment: #/ (standing queries), #/models/NAME (the network,
// variable details and the query form), #/jobs/ID (the live job).

import * as api from "./api.js";
import { el, add, clear, prob, interval, count, seconds, ago, stopReason } from "./fmt.js";
import { drawNetwork } from "./graph.js";
import { posteriorBars, convergencePlot, orderedTargets } from "./plots.js";

const view = document.getElementById("view");
const notice = document.getElementById("notice");
let current = new AbortController();

const DRAW_LIMIT = 250;
const TERMINAL = new Set(["succeeded", "failed", "cancelled"]);
const METHODS = [
  ["auto", "exact inference when it fits, otherwise a sampler chosen for the query"],
  ["exact", "junction tree: exact posteriors, no sampling error"],
  ["likelihood-weighting", "samples the network, weighs each sample by the evidence"],
  ["adaptive-importance", "learns an importance function: for rare events and unlikely evidence"],
  ["gibbs", "Markov chain over the unobserved variables, with R-hat and ESS"],
  ["rejection", "forward samples that disagree with the evidence are dropped"],
  ["forward", "forward sampling, no evidence"],
];

// ---- notices, token, health ----

function say(text, kind = "error") {
  if (!text) {
    notice.hidden = true;
    return;
  }
  notice.hidden = false;
  notice.dataset.kind = kind;
  add(clear(notice), el("span", null, text), el("button", { type: "button", class: "link", onclick: () => say("") }, "dismiss"));
}

api.onAuth((err) => {
  const has = api.getToken() !== "";
  say(`The API answered ${err.status} (${err.reason || err.code}): ${err.message}. ` +
    (has ? "The token kept for this tab was not accepted; check it in the token field." : "It needs a token: enter one in the token field above."));
});

function tokenSetup() {
  const form = document.getElementById("token-form");
  const input = document.getElementById("token-input");
  const note = document.getElementById("token-note");
  const show = () => (note.textContent = api.getToken() ? "kept for this tab" : "none kept");
  input.value = api.getToken();
  show();
  form.addEventListener("submit", (ev) => {
    ev.preventDefault();
    api.setToken(input.value.trim());
    show();
    say("");
    refreshRail();
    route();
  });
  document.getElementById("token-clear").addEventListener("click", () => {
    input.value = "";
    api.setToken("");
    show();
    refreshRail();
    route();
  });
}

async function health() {
  const h = document.getElementById("health");
  try {
    const res = await fetch("/readyz", { cache: "no-store" });
    h.dataset.state = res.ok ? "ready" : "unready";
    h.textContent = res.ok ? "ready" : "not ready";
  } catch {
    h.dataset.state = "down";
    h.textContent = "unreachable";
  }
}

// ---- model documents, cached by name@version ----

const docs = new Map();
async function modelDoc(name, version) {
  const key = version ? `${name}@${version}` : name;
  if (version && docs.has(key)) return docs.get(key);
  const { body, res } = await api.call("GET", "/v1/models/" + encodeURIComponent(key));
  const meta = {
    name: res.headers.get("Beliefd-Model-Name") || name,
    version: res.headers.get("Beliefd-Model-Version") || version || "",
    hash: res.headers.get("Beliefd-Model-Hash") || "",
  };
  const entry = { doc: body, meta };
  docs.set(`${meta.name}@${meta.version}`, entry);
  return entry;
}

// ---- the rail ----

async function loadModels() {
  const ul = document.getElementById("model-list");
  try {
    const body = await api.get("/v1/models?page_size=100");
    clear(ul);
    if (!body.models.length) add(ul, el("li", { class: "muted" }, "no models stored"));
    for (const m of body.models) {
      add(ul, el("li", null, el("a", { href: "#/models/" + encodeURIComponent(m.name), "data-model": m.name },
        el("span", { class: "mono" }, m.name),
        el("span", { class: "sub" }, `v${m.version} · ${m.variables} variables · ${m.hash.slice(0, 8)}`))));
    }
  } catch (e) {
    add(clear(ul), el("li", { class: "muted" }, "models unavailable: " + e.message));
  }
  markRail();
}

async function loadJobs() {
  const ul = document.getElementById("job-list");
  try {
    const body = await api.get("/v1/jobs?page_size=25");
    clear(ul);
    if (!body.jobs.length) add(ul, el("li", { class: "muted" }, "no jobs yet"));
    for (const j of body.jobs) {
      const targets = (j.query.targets || []).length;
      add(ul, el("li", null, el("a", { href: "#/jobs/" + encodeURIComponent(j.id), "data-job": j.id },
        el("span", { class: "row" }, stateChip(j.state), el("span", { class: "mono" }, j.id.slice(0, 10))),
        el("span", { class: "sub" }, `${j.model.name} · ${j.method} · ${targets ? targets + " targets" : "all targets"} · ${ago(j.created_at)}`))));
    }
  } catch (e) {
    add(clear(ul), el("li", { class: "muted" }, "jobs unavailable: " + e.message));
  }
  markRail();
}

function refreshRail() {
  loadModels();
  loadJobs();
}

function markRail() {
  const h = location.hash;
  for (const a of document.querySelectorAll(".rail a")) a.classList.toggle("is-here", a.getAttribute("href") === h);
}

function stateChip(state) {
  return el("span", { class: "chip state", "data-state": state }, state);
}

// ---- routing ----

function route() {
  current.abort();
  current = new AbortController();
  const signal = current.signal;
  const h = location.hash.replace(/^#\/?/, "");
  const slash = h.indexOf("/");
  const kind = slash < 0 ? h : h.slice(0, slash);
  const arg = slash < 0 ? "" : decodeURIComponent(h.slice(slash + 1));
  markRail();
  clear(view);
  const done = (p) => p.catch((e) => {
    if (signal.aborted) return;
    add(view, el("p", { class: "error" }, e.message));
  });
  if (kind === "models" && arg) done(showModel(arg, signal));
  else if (kind === "jobs" && arg) done(showJob(arg, signal));
  else done(showHome(signal));
}

// ---- home: standing queries ----

async function showHome(signal) {
  const list = el("div", { id: "standing", class: "standing" }, el("p", { class: "muted" }, "loading…"));
  add(view, 
    el("section", { class: "panel intro" },
      el("h1", null, "Live posteriors"),
      el("p", null, "Pick a model on the left to see its network and ask it a question. A job's posteriors and their intervals tighten here while its samples are drawn.")),
    el("section", { class: "panel" },
      el("h2", null, "Standing queries"),
      el("p", { class: "hint" }, "Queries the service keeps answering; each shows its latest result."),
      list));
  for (;;) {
    await renderStanding(list, signal);
    await api.sleep(5000, signal);
  }
}

function standingItems(body) {
  if (Array.isArray(body)) return body;
  if (!body || typeof body !== "object") return [];
  for (const k of ["standing_queries", "queries", "items"]) if (Array.isArray(body[k])) return body[k];
  return [];
}

async function renderStanding(list, signal) {
  let items;
  try {
    items = standingItems(await api.get("/v1/standing-queries", { signal }));
  } catch (e) {
    if (signal.aborted) throw e;
    if (e.status === 404) items = [];
    else {
      add(clear(list), el("p", { class: "error" }, "standing queries unavailable: " + e.message));
      return;
    }
  }
  clear(list);
  if (!items.length) {
    add(list, el("p", { class: "muted empty" }, "no standing queries"));
    return;
  }
  for (const q of items) {
    const res = q.result || null;
    const model = q.model || (res && res.model) || "";
    let doc = null;
    try {
      if (model) doc = (await modelDoc(model.split("@")[0], model.split("@")[1])).doc;
    } catch {
      // drawn in the result's own order
    }
    const status = q.status || (res ? "current" : "pending");
    const card = el("article", { class: "card", "data-standing": q.id || "" },
      el("header", null, el("span", { class: "mono strong" }, q.id || "standing query"),
        el("span", { class: "chip state", "data-state": status }, status),
        el("span", { class: "sub" }, model + (q.interval ? ` · recomputed every ${q.interval}` : ""))),
      evidenceLine(q.evidence || {}),
      el("p", { class: "sub" }, "targets: " + ((q.targets || []).join(", ") || "every variable without evidence")));
    if (q.error) add(card, el("p", { class: "error" }, "latest recompute failed: " + q.error));
    if (res && res.marginals && Object.keys(res.marginals).length) {
      const stale = q.result_revision && q.revision && q.result_revision < q.revision;
      add(card,
        el("p", { class: "sub" }, `result for evidence revision ${q.result_revision ?? "?"}` +
          (q.result_at ? `, computed ${ago(q.result_at)}` : "") +
          (stale ? ": the evidence has changed since, a new result is on its way" : "")),
        stale ? evidenceLine(q.result_evidence || {}, "answers evidence ") : null,
        posteriorBars(res, doc, { width: 460 }), resultFacts(res), cautionBox(res.caution));
    } else {
      add(card, el("p", { class: "muted" }, "no result yet"));
    }
    add(list, card);
  }
}

function evidenceLine(ev, label = "evidence ") {
  const names = Object.keys(ev);
  if (!names.length) return el("p", { class: "sub" }, "no evidence");
  return el("p", { class: "chips" }, el("span", { class: "sub" }, label),
    names.map((n) => el("span", { class: "chip evidence" }, el("span", { class: "mono" }, n), " = ", el("strong", null, ev[n]))));
}

// resultFacts: method, samples, ESS, stop reason, elapsed, P(evidence).
function resultFacts(r) {
  const exact = r.method === "exact";
  const facts = [
    ["method", r.method + (r.method_reason ? ` (${r.method_reason})` : "")],
    ["samples", exact ? "none: exact" : count(r.samples)],
    ["effective samples (ESS)", exact ? "none: exact" : `${count(r.effective_samples)}${r.samples ? ` (${((100 * r.effective_samples) / r.samples).toFixed(1)}% of samples)` : ""}`],
    ["stop reason", stopReason(r.stop_reason)],
    ["confidence", r.confidence ? `${(r.confidence * 100).toFixed(0)}% intervals` : "–"],
    ["elapsed", seconds(r.elapsed_seconds)],
  ];
  if (r.evidence_probability) {
    const e = r.evidence_probability;
    facts.push(["P(evidence)", interval(e) + (e.log10 !== null && e.log10 !== undefined ? `, log10 ${e.log10.toFixed(3)}` : "")]);
  }
  return el("dl", { class: "facts" }, facts.map(([k, v]) => [el("dt", null, k), el("dd", { "data-fact": k }, v)]));
}

function cautionBox(text) {
  return el("p", { class: "caution" }, text || "Model-based estimates: they support, and do not replace, the analyses that local codes, standards and licensed practice require for safety decisions.");
}

// ---- a model: drawing, details, query form ----

async function showModel(name, signal) {
  const { doc, meta } = await modelDoc(name);
  if (signal.aborted) return;
  const byName = new Map(doc.variables.map((v) => [v.name, v]));
  const children = new Map(doc.variables.map((v) => [v.name, []]));
  for (const v of doc.variables) for (const p of v.parents || []) children.get(p)?.push(v.name);
  const form = { evidence: {}, targets: new Set() };
  let selected = null;

  const details = el("div", { id: "details", class: "details" },
    el("p", { class: "muted" }, "Pick a variable in the drawing to see its states, parents, children and distribution, and to use it in a question."));
  // Past DRAW_LIMIT variables a drawing is unreadable and slow to lay out:
  // a searchable list takes its place.
  const drawing = doc.variables.length <= DRAW_LIMIT ? drawNetwork(doc, (n) => select(n)) : variableIndex(doc, (n) => select(n));
  const sync = () => {
    drawing.mark(form.evidence, form.targets);
    renderForm();
    if (selected) renderDetails(selected);
  };
  function select(n) {
    selected = n;
    drawing.select(n);
    renderDetails(n);
  }

  add(view, 
    el("section", { class: "panel" },
      el("div", { class: "title-row" },
        el("h1", { class: "mono" }, meta.name),
        el("span", { class: "sub" }, `version ${meta.version} · ${doc.variables.length} variables · content hash ${meta.hash.slice(0, 12)}`)),
      doc.description ? el("p", { class: "desc" }, doc.description) : null,
      drawing.layout && el("div", { class: "legend" },
        el("span", { class: "key role-root" }, "no parents"),
        el("span", { class: "key role-inner" }, "parents and children"),
        el("span", { class: "key role-leaf" }, "no children"),
        el("span", { class: "key is-evidence" }, "evidence set"),
        el("span", { class: "key is-target" }, "target")),
      el("div", { class: "drawing-box" }, drawing.element)),
    el("div", { class: "two" },
      el("section", { class: "panel" }, el("h2", null, "Variable"), details),
      el("section", { class: "panel" }, el("h2", null, "Ask this model"), el("div", { id: "query-form" }))));

  function renderDetails(n) {
    const v = byName.get(n);
    clear(details);
    const ev = form.evidence[n];
    add(details, 
      el("h3", { class: "mono", "data-detail": n }, n),
      v.description ? el("p", { class: "desc" }, v.description) : null,
      el("div", { class: "kv" }, el("span", { class: "k" }, "states"),
        el("span", { class: "chips" }, v.states.map((s) => el("span", { class: "chip" + (ev === s ? " evidence" : "") }, s)))),
      el("div", { class: "kv" }, el("span", { class: "k" }, "parents"), links(v.parents || [])),
      el("div", { class: "kv" }, el("span", { class: "k" }, "children"), links(children.get(n))),
      el("div", { class: "kv" }, el("span", { class: "k" }, "use"),
        el("span", { class: "chips" },
          el("span", { class: "sub" }, "observed as"),
          v.states.map((s) => el("button", {
            type: "button", class: "chip-btn" + (ev === s ? " on" : ""), "data-evidence-state": s,
            onclick: () => {
              if (form.evidence[n] === s) delete form.evidence[n];
              else form.evidence[n] = s;
              form.targets.delete(n);
              sync();
            },
          }, s)),
          el("button", {
            type: "button", class: "chip-btn target" + (form.targets.has(n) ? " on" : ""), "data-target-toggle": n,
            onclick: () => {
              if (form.targets.has(n)) form.targets.delete(n);
              else {
                form.targets.add(n);
                delete form.evidence[n];
              }
              sync();
            },
          }, form.targets.has(n) ? "is a target" : "make target"))),
      distribution(v, byName));
  }
  function links(names) {
    if (!names || !names.length) return el("span", { class: "muted" }, "none");
    return el("span", { class: "chips" }, names.map((p) => el("button", { type: "button", class: "link mono", onclick: () => select(p) }, p)));
  }

  const formBox = view.querySelector("#query-form");
  const extra = { method: "likelihood-weighting", max_samples: "", abs_err: "0.005", rel_err: "", confidence: "0.95", timeout: "60s", seed: "", mpe: false };
  let filter = "";
  function renderForm() {
    clear(formBox);
    const evRows = Object.keys(form.evidence).map((n) => el("div", { class: "ev-row", "data-ev": n },
      el("select", { "aria-label": "evidence variable", onchange: (e) => {
        const s = form.evidence[n];
        delete form.evidence[n];
        const nv = e.target.value;
        const states = byName.get(nv).states;
        form.evidence[nv] = states.includes(s) ? s : states[states.length - 1];
        form.targets.delete(nv);
        sync();
      } }, doc.variables.map((v) => el("option", { value: v.name, selected: v.name === n }, v.name))),
      el("span", null, "="),
      el("select", { "aria-label": "evidence state", onchange: (e) => {
        form.evidence[n] = e.target.value;
        sync();
      } }, byName.get(n).states.map((s) => el("option", { value: s, selected: s === form.evidence[n] }, s))),
      el("button", { type: "button", class: "link", onclick: () => {
        delete form.evidence[n];
        sync();
      } }, "remove")));
    const free = doc.variables.filter((v) => !Object.hasOwn(form.evidence, v.name));
    const addEv = el("button", { type: "button", class: "link", onclick: () => {
      const pick = free.find((v) => v.name.startsWith("alarm_")) || free[0];
      if (!pick) return;
      form.evidence[pick.name] = pick.states[pick.states.length - 1];
      form.targets.delete(pick.name);
      sync();
    } }, "+ add evidence");
    const matching = free.filter((v) => !filter || v.name.includes(filter));
    const shown = matching.slice(0, 400);
    const targetBox = el("div", { class: "target-box" }, shown.map((v) => el("label", { class: "mono" },
      el("input", { type: "checkbox", name: "target", value: v.name, checked: form.targets.has(v.name), onchange: (e) => {
        if (e.target.checked) form.targets.add(v.name);
        else form.targets.delete(v.name);
        drawing.mark(form.evidence, form.targets);
        if (selected) renderDetails(selected);
        summary.textContent = targetSummary();
      } }), v.name)));
    const targetSummary = () => form.targets.size ? `${form.targets.size} chosen: ${[...form.targets].join(", ")}` : "none chosen: every variable without evidence";
    const summary = el("p", { class: "sub", id: "target-summary" }, targetSummary());
    const field = (key, label, attrs, hint) => el("label", { class: "field" }, el("span", null, label),
      el("input", { name: key, value: extra[key], ...attrs, oninput: (e) => (extra[key] = e.target.value) }),
      hint ? el("small", null, hint) : null);
    const methodSel = el("select", { name: "method", onchange: (e) => {
      extra.method = e.target.value;
      methodHint.textContent = METHODS.find((m) => m[0] === extra.method)[1];
    } }, METHODS.map(([m]) => el("option", { value: m, selected: m === extra.method }, m)));
    const methodHint = el("small", null, METHODS.find((m) => m[0] === extra.method)[1]);
    const errBox = el("div", { class: "form-error", id: "form-error" });
    const submit = el("button", { type: "submit", class: "primary", id: "submit-query" }, "Start job");
    const f = el("form", { class: "query", novalidate: true },
      el("fieldset", null, el("legend", null, "Evidence"),
        evRows.length ? evRows : el("p", { class: "muted" }, "none: the prior. Add a row, or pick a state in the variable panel."), addEv),
      el("fieldset", null, el("legend", null, "Targets"),
        el("input", { type: "search", placeholder: "filter variables", value: filter, class: "filter", oninput: (e) => {
          filter = e.target.value.trim();
          renderForm();
          formBox.querySelector("input.filter").focus();
        } }),
        targetBox, matching.length > shown.length ? el("p", { class: "sub" }, `${shown.length} of ${matching.length} shown; filter to find others`) : null, summary),
      el("fieldset", null, el("legend", null, "Method and stopping rule"),
        el("label", { class: "field" }, el("span", null, "method"), methodSel, methodHint),
        el("div", { class: "grid" },
          field("abs_err", "absolute half-width", { inputmode: "decimal", placeholder: "e.g. 0.005" }, "stop when every interval is this narrow"),
          field("rel_err", "relative half-width", { inputmode: "decimal", placeholder: "e.g. 0.1" }, "half-width over estimate"),
          field("confidence", "confidence", { inputmode: "decimal", placeholder: "0.95" }),
          field("max_samples", "at most samples", { inputmode: "numeric", placeholder: "no limit" }),
          field("timeout", "time limit", { placeholder: "e.g. 60s, 5m" }),
          field("seed", "seed", { inputmode: "numeric", placeholder: "random" })),
        el("label", { class: "check" }, el("input", { type: "checkbox", name: "mpe", checked: extra.mpe, onchange: (e) => (extra.mpe = e.target.checked) }),
          "also the most probable explanation (exact)")),
      errBox, submit);
    f.addEventListener("submit", async (ev) => {
      ev.preventDefault();
      clear(errBox);
      // Read the fields as they are now (a browser may fill them without input events).
      for (const k of ["abs_err", "rel_err", "confidence", "max_samples", "timeout", "seed"]) extra[k] = f.elements[k].value;
      extra.method = f.elements.method.value;
      extra.mpe = f.elements.mpe.checked;
      let q;
      try {
        q = buildQuery(meta.name, form, extra);
      } catch (e) {
        add(errBox, el("p", null, e.message));
        return;
      }
      submit.disabled = true;
      try {
        const key = globalThis.crypto?.randomUUID ? crypto.randomUUID() : String(Math.random()).slice(2);
        const { body } = await api.call("POST", "/v1/jobs", q, { headers: { "Idempotency-Key": key } });
        location.hash = "#/jobs/" + encodeURIComponent(body.id);
        loadJobs();
      } catch (e) {
        submit.disabled = false;
        add(errBox, el("p", null, e.message));
        if (e.violations && e.violations.length) {
          add(errBox, el("ul", null, e.violations.map((v) => el("li", null, el("span", { class: "mono" }, v.field), ": ", v.description))));
        }
      }
    });
    add(formBox, f);
  }
  renderForm();
  drawing.mark(form.evidence, form.targets);
}

// variableIndex stands in for the drawing of a large model: a filterable
// list of the variables, with the same interface as drawNetwork's.
function variableIndex(doc, onSelect) {
  const list = el("div", { class: "var-index" });
  let marks = { evidence: {}, targets: new Set() };
  let chosen = null;
  let filter = "";
  const render = () => {
    clear(list);
    const shown = doc.variables.filter((v) => !filter || v.name.includes(filter)).slice(0, 300);
    for (const v of shown) {
      const cls = ["var-item"];
      if (Object.hasOwn(marks.evidence, v.name)) cls.push("is-evidence");
      if (marks.targets.has(v.name)) cls.push("is-target");
      if (chosen === v.name) cls.push("is-selected");
      add(list, el("button", { type: "button", class: cls.join(" "), "data-var": v.name, onclick: () => onSelect(v.name) },
        v.name, Object.hasOwn(marks.evidence, v.name) ? ` = ${marks.evidence[v.name]}` : ""));
    }
    if (shown.length === 300) add(list, el("p", { class: "sub" }, "the first 300 matches; narrow the filter to see others"));
  };
  const box = el("div", null,
    el("p", { class: "sub" }, `${doc.variables.length} variables: too many to draw legibly. Filter and pick a variable instead.`),
    el("input", { type: "search", class: "filter", placeholder: "filter variables", oninput: (e) => {
      filter = e.target.value.trim();
      render();
    } }), list);
  render();
  return {
    element: box,
    mark(evidence, targets) {
      marks = { evidence, targets };
      render();
    },
    select(name) {
      chosen = name;
      render();
    },
  };
}

function num(s, what, check) {
  const x = Number(s);
  if (s.trim() === "" || !Number.isFinite(x) || !check(x)) throw new Error(`${what}: "${s}" is not ${check.want}`);
  return x;
}
const positive = Object.assign((x) => x > 0, { want: "a positive number" });
const inOpen = Object.assign((x) => x > 0 && x < 1, { want: "a number between 0 and 1" });
const whole = Object.assign((x) => Number.isInteger(x) && x > 0, { want: "a positive whole number" });
const seedOK = Object.assign((x) => Number.isInteger(x) && x >= 0, { want: "a whole number, 0 or more" });

function buildQuery(model, form, x) {
  const stop = {};
  if (x.abs_err.trim()) stop.abs_err = num(x.abs_err, "absolute half-width", positive);
  if (x.rel_err.trim()) stop.rel_err = num(x.rel_err, "relative half-width", positive);
  if (x.confidence.trim()) stop.confidence = num(x.confidence, "confidence", inOpen);
  if (x.max_samples.trim()) stop.max_samples = num(x.max_samples, "at most samples", whole);
  if (x.timeout.trim()) stop.timeout = x.timeout.trim();
  const q = { model, evidence: { ...form.evidence }, method: x.method, stop };
  if (form.targets.size) q.targets = [...form.targets];
  if (x.seed.trim()) q.seed = num(x.seed, "seed", seedOK);
  if (x.mpe) q.mpe = true;
  return q;
}

function distribution(v, byName) {
  const box = el("div", { class: "dist" });
  const parents = v.parents || [];
  if (v.table) {
    add(box, el("p", { class: "k" }, parents.length ? "table: one row per parent configuration (last parent varies fastest)" : "table: prior"));
    add(box, cptTable(v, parents, v.table.map((row, i) => [configOf(i, parents, byName), row])));
  } else if (v.rows) {
    add(box, el("p", { class: "k" }, "table, rows keyed by the parents' states"));
    add(box, cptTable(v, parents, v.rows.map((r) => [parents.map((p) => (r.given || {})[p] ?? "?"), r.p])));
  } else if (v.noisy_or) {
    const no = v.noisy_or;
    add(box, el("p", { class: "k" }, "noisy-OR: each active parent alone causes the fault with its link probability; the leak covers causes not modelled"),
      el("table", null, el("tr", null, el("th", null, "cause"), el("th", null, "probability")),
        el("tr", null, el("td", null, "leak"), el("td", { class: "num" }, prob(no.leak))),
        Object.entries(no.links || {}).map(([p, c]) => el("tr", null, el("td", { class: "mono" }, p), el("td", { class: "num" }, prob(c))))));
  } else if (v.noisy_max) {
    const nm = v.noisy_max;
    add(box, el("p", { class: "k" }, "noisy-MAX: each active cause and the leak produce a level; the variable takes the worst"));
    const head = el("tr", null, el("th", null, "cause"), el("th", null, "when"), v.states.map((s) => el("th", { class: "mono" }, s)));
    const rows = [el("tr", null, el("td", null, "leak"), el("td", null, ""), (nm.leak || []).map((p) => el("td", { class: "num" }, prob(p))))];
    for (const [p, byState] of Object.entries(nm.links || {})) {
      for (const [ps, dist] of Object.entries(byState)) {
        rows.push(el("tr", null, el("td", { class: "mono" }, p), el("td", { class: "mono" }, ps), dist.map((x) => el("td", { class: "num" }, prob(x)))));
      }
    }
    add(box, el("table", null, head, rows));
  } else if (v.gate) {
    const g = v.gate;
    const what = { any_of: "in its fault state when any parent is", all_of: "in its fault state when all parents are", k_of_n: `in its fault state when at least ${g.k} of ${parents.length} parents are` }[g.type] || g.type;
    add(box, el("p", { class: "k" }, `gate ${g.type}${g.k ? ` (k = ${g.k})` : ""}: deterministic, ${what}`));
  } else if (v.failure_rate) {
    const fr = v.failure_rate;
    const p = 1 - Math.exp(-fr.lambda * fr.mission_time);
    add(box, el("p", { class: "k" }, "failure rate over a mission time"),
      el("p", { class: "mono" }, `λ = ${fr.lambda}, t = ${fr.mission_time}: p = 1 − exp(−λt) = ${prob(p)} (a model parameter, not an estimate)`));
  }
  if (v.fault_states) add(box, el("p", { class: "sub" }, "fault states: " + v.fault_states.join(", ")));
  return box;
}

// configOf names row i's parent states: rows run over the parents'
// configurations with the last parent varying fastest.
function configOf(i, parents, byName) {
  const out = [];
  let rest = i;
  for (let k = parents.length - 1; k >= 0; k--) {
    const states = byName.get(parents[k])?.states || [];
    const n = states.length || 1;
    out.unshift(states[rest % n] ?? String(rest % n));
    rest = Math.floor(rest / n);
  }
  return out;
}
function cptTable(v, parents, rows) {
  return el("table", null,
    el("tr", null, parents.map((p) => el("th", { class: "mono" }, p)), v.states.map((s) => el("th", { class: "mono" }, "P(" + s + ")"))),
    rows.map(([cfg, ps]) => el("tr", null, cfg.map((c) => el("td", { class: "mono" }, c)), ps.map((p) => el("td", { class: "num" }, prob(p))))));
}

// ---- a job, live ----

const histories = new Map(); // job id -> Map("var\u0000state" -> [{samples, p, lo, hi}])

function record(view) {
  if (!histories.has(view.id)) histories.set(view.id, new Map());
  const h = histories.get(view.id);
  if (!view.samples || view.method === "exact") return;
  for (const [name, states] of Object.entries(view.marginals || {})) {
    for (const [s, iv] of Object.entries(states)) {
      const key = name + "\u0000" + s;
      if (!h.has(key)) h.set(key, []);
      const pts = h.get(key);
      const last = pts[pts.length - 1];
      if (last && last.samples >= view.samples) continue;
      pts.push({ samples: view.samples, p: iv.p, lo: iv.lo, hi: iv.hi });
    }
  }
}

async function showJob(id, signal) {
  const parts = {
    head: el("section", { class: "panel", id: "job-head" }),
    facts: el("section", { class: "panel", id: "job-facts" }),
    bars: el("section", { class: "panel", id: "job-posteriors" }),
    conv: el("section", { class: "panel", id: "job-convergence" }),
    more: el("section", { class: "panel", id: "job-more" }),
  };
  add(view, parts.head, el("div", { class: "two wide-left" }, parts.bars, parts.facts), parts.conv, parts.more);
  let picked = null;
  let last = null;
  let doc = null;
  let openedLive = false;

  const onPick = (n, s) => {
    picked = [n, s];
    renderJob(last, doc, parts, { picked, openedLive, onPick });
  };
  const render = (v) => {
    last = v;
    record(v);
    if (!picked) {
      // Follow the first target's last state (the worst, by convention).
      const t = orderedTargets(v, doc)[0];
      if (t) picked = [t[0], t[1][t[1].length - 1]];
    }
    renderJob(v, doc, parts, { picked, openedLive, onPick });
  };

  const first = await api.get("/v1/jobs/" + encodeURIComponent(id), { signal });
  try {
    const m = first.job.model;
    doc = (await modelDoc(m.name, m.version)).doc;
  } catch {
    // the model may have been deleted: the result's own order will do
  }
  if (signal.aborted) return;
  openedLive = !TERMINAL.has(first.state);
  render(first);
  if (TERMINAL.has(first.state)) return;
  const final = await api.followJob(id, (v) => { if (!signal.aborted) render(v); }, signal);
  if (!signal.aborted) {
    render(final);
    loadJobs();
  }
}

// innerWidth is the width available inside a panel (its padding is 16 px a side).
function innerWidth(node) {
  return Math.max(0, node.clientWidth - 34);
}

function renderJob(v, doc, parts, o) {
  const j = v.job || {};
  const running = !TERMINAL.has(v.state);
  // head
  add(clear(parts.head), 
    el("div", { class: "title-row" },
      el("h1", null, "Job ", el("span", { class: "mono" }, v.id)),
      el("span", { id: "job-state", class: "chip state big", "data-state": v.state }, v.state),
      running ? el("button", { type: "button", class: "link danger", onclick: async () => {
        try {
          await api.call("POST", `/v1/jobs/${encodeURIComponent(v.id)}/cancel`);
        } catch (e) {
          say(e.message);
        }
      } }, "cancel") : null),
    el("p", { class: "sub" },
      "model ", el("a", { class: "mono", href: "#/models/" + encodeURIComponent(j.model?.name || v.model) }, `${j.model?.name || v.model}@${j.model?.version ?? "?"}`),
      ` · ${v.method}${v.method_reason ? " (" + v.method_reason + ")" : ""} · seed ${v.seed}`,
      j.created_at ? ` · submitted ${ago(j.created_at)}` : "",
      v.method !== "exact" && j.blocks ? ` · blocks merged ${count(j.merged_blocks)} of at most ${count(j.blocks)}` : ""),
    evidenceLine(j.query?.evidence || {}),
    j.error ? el("p", { class: "error" }, "failed: " + j.error) : null,
    running && v.state === "queued" ? el("p", { class: "muted" }, "waiting for a worker…") : null);

  // facts
  add(clear(parts.facts), el("h2", null, "How sure"), resultFacts(v),
    v.warnings && v.warnings.length ? el("ul", { class: "warnings" }, v.warnings.map((w) => el("li", null, w))) : null,
    cautionBox(v.caution));

  // posteriors
  const hasMarg = v.marginals && Object.keys(v.marginals).length;
  add(clear(parts.bars), el("h2", null, "Posteriors"),
    hasMarg
      ? [posteriorBars(v, doc, { picked: o.picked, onPick: o.onPick, width: innerWidth(parts.bars) }),
        el("p", { class: "hint" }, v.method === "exact"
          ? "Exact posteriors: each interval has zero width, so no whiskers."
          : "Bars are estimates, whiskers their intervals. Click a row to follow it in the convergence plot.")]
      : el("p", { class: "muted" }, running ? "no estimate yet: the first partial result is on its way" : "no posteriors in this result"));

  // convergence
  add(clear(parts.conv), el("h2", null, "Convergence"));
  if (v.method === "exact") {
    add(parts.conv, el("p", { class: "muted", id: "conv-note" }, "Exact inference: the answer has no sampling error (every interval has zero width), so there is nothing to converge."));
  } else if (o.picked) {
    const pts = histories.get(v.id)?.get(o.picked[0] + "\u0000" + o.picked[1]) || [];
    add(parts.conv, 
      el("p", { class: "sub" }, "P(", el("span", { class: "mono" }, o.picked[0]), " = ", el("strong", null, o.picked[1]), ") as the samples were drawn",
        pts.length ? ` · now ${interval(pts[pts.length - 1])}` : ""),
      convergencePlot(pts, `${o.picked[0]} = ${o.picked[1]}`, v.confidence, Math.min(900, innerWidth(parts.conv))),
      el("p", { class: "hint", id: "conv-note" }, o.openedLive
        ? "Drawn from the updates this page received while the job ran."
        : "This page opened the job after it finished, so the plot has its final point only; watch a running job to see the curve."));
  } else {
    add(parts.conv, el("p", { class: "muted" }, "no samples yet"));
  }

  // MPE and diagnostics
  clear(parts.more);
  if (v.mpe) {
    add(parts.more, el("h2", null, "Most probable explanation"),
      el("p", { class: "sub" }, `P(assignment | evidence) = ${prob(v.mpe.p)} exact · P(assignment, evidence) = ${prob(v.mpe.joint)} exact (junction tree)`),
      el("p", { class: "chips" }, Object.entries(v.mpe.assignment).sort().map(([n, s]) => el("span", { class: "chip" }, el("span", { class: "mono" }, n), " = ", el("strong", null, s)))));
  }
  const d = v.diagnostics;
  if (d) {
    const rows = [];
    if (d.acceptance_rate !== undefined) rows.push(["acceptance rate", d.acceptance_rate.toFixed(4)]);
    if (d.max_weight_share !== undefined) rows.push(["largest weight share", d.max_weight_share.toExponential(2)]);
    for (const [n, x] of Object.entries(d.ess || {})) rows.push([`ESS ${n}`, count(x)]);
    for (const [n, x] of Object.entries(d.r_hat || {})) rows.push([`R-hat ${n}`, x.toFixed(4)]);
    if (rows.length) add(parts.more, el("h2", null, "Sampler diagnostics"), el("dl", { class: "facts" }, rows.map(([k, x]) => [el("dt", null, k), el("dd", null, x)])));
  }
  parts.more.hidden = !parts.more.firstChild;
}

// ---- start ----

tokenSetup();
health();
setInterval(health, 10000);
refreshRail();
setInterval(() => {
  if (!document.hidden) loadJobs();
}, 3000);
document.getElementById("jobs-refresh").addEventListener("click", loadJobs);
window.addEventListener("hashchange", route);
route();
