// Talking to the HTTP API under /v1/: JSON requests with the optional bearer
// token, the one error shape, and job event streams read with fetch().

const TOKEN_KEY = "beliefd.token";

// The token lives in this tab's session storage only.
export function getToken() {
  try {
    return sessionStorage.getItem(TOKEN_KEY) || "";
  } catch {
    return "";
  }
}

export function setToken(t) {
  try {
    if (t) sessionStorage.setItem(TOKEN_KEY, t);
    else sessionStorage.removeItem(TOKEN_KEY);
  } catch {
    // storage refused (private mode): the token lasts until reload
  }
}

function headers(extra) {
  const h = new Headers(extra || {});
  const t = getToken();
  if (t) h.set("Authorization", "Bearer " + t);
  return h;
}

// ApiError carries the API's error shape: status, code, reason, message,
// field_violations.
export class ApiError extends Error {
  constructor(status, body) {
    const e = (body && body.error) || {};
    super(e.message || `the server answered ${status}`);
    this.status = status;
    this.code = e.code || "";
    this.reason = e.reason || "";
    this.violations = e.field_violations || [];
  }
}

async function errorOf(res) {
  let body = null;
  try {
    body = await res.json();
  } catch {
    // not the error shape: a proxy's page, say
  }
  const err = new ApiError(res.status, body);
  if (res.status === 401 || res.status === 403) onAuthProblem(err);
  return err;
}

let authListener = () => {};
export function onAuth(fn) {
  authListener = fn;
}
function onAuthProblem(err) {
  authListener(err);
}

// call sends a request and returns the decoded JSON body (null for 204).
export async function call(method, path, body, opts = {}) {
  const init = { method, headers: headers(opts.headers), signal: opts.signal };
  if (body !== undefined) {
    init.body = typeof body === "string" ? body : JSON.stringify(body);
    init.headers.set("Content-Type", "application/json");
  }
  const res = await fetch(path, init);
  if (!res.ok) throw await errorOf(res);
  if (res.status === 204) return { body: null, res };
  return { body: await res.json(), res };
}

export async function get(path, opts) {
  return (await call("GET", path, undefined, opts)).body;
}

// followJob reads GET /v1/jobs/{id}/events with fetch() and a stream reader
// (so the Authorization header can be sent), calling onView with each job
// view. It resolves with the final view, reconnecting after a dropped
// stream or an "error" event, and rejects with an ApiError when the server
// refuses the stream (no such job, no token) or when signal aborts.
export async function followJob(id, onView, signal) {
  const url = "/v1/jobs/" + encodeURIComponent(id) + "/events";
  let failures = 0;
  for (;;) {
    let outcome;
    try {
      outcome = await readStream(url, onView, signal);
    } catch (e) {
      if (signal.aborted || e instanceof ApiError) throw e;
      outcome = { final: null }; // the connection dropped
    }
    if (outcome.final) return outcome.final;
    failures = outcome.gotEvents ? 1 : failures + 1;
    if (failures > 8) throw new Error("the event stream keeps ending before the job does");
    await sleep(Math.min(8000, 400 * 2 ** failures), signal);
  }
}

async function readStream(url, onView, signal) {
  const res = await fetch(url, { headers: headers({ Accept: "text/event-stream" }), signal, cache: "no-store" });
  if (!res.ok) throw await errorOf(res);
  const reader = res.body.pipeThrough(new TextDecoderStream()).getReader();
  let buf = "";
  let name = "";
  let data = [];
  let gotEvents = false;
  for (;;) {
    const { value, done } = await reader.read();
    if (done) return { final: null, gotEvents };
    buf += value;
    let nl;
    while ((nl = buf.indexOf("\n")) >= 0) {
      let line = buf.slice(0, nl);
      buf = buf.slice(nl + 1);
      if (line.endsWith("\r")) line = line.slice(0, -1);
      if (line === "") {
        // dispatch
        if (data.length) {
          const ev = name || "message";
          const text = data.join("\n");
          name = "";
          data = [];
          if (ev === "error") {
            await reader.cancel().catch(() => {});
            return { final: null, gotEvents };
          }
          let view;
          try {
            view = JSON.parse(text);
          } catch {
            continue;
          }
          gotEvents = true;
          onView(view);
          if (ev === "final") {
            await reader.cancel().catch(() => {});
            return { final: view, gotEvents };
          }
        }
        name = "";
        continue;
      }
      if (line.startsWith(":")) continue; // heartbeat comment
      const colon = line.indexOf(":");
      const field = colon < 0 ? line : line.slice(0, colon);
      let val = colon < 0 ? "" : line.slice(colon + 1);
      if (val.startsWith(" ")) val = val.slice(1);
      if (field === "event") name = val;
      else if (field === "data") data.push(val);
    }
  }
}

export function sleep(ms, signal) {
  return new Promise((resolve, reject) => {
    const t = setTimeout(resolve, ms);
    if (signal) {
      signal.addEventListener(
        "abort",
        () => {
          clearTimeout(t);
          reject(signal.reason || new DOMException("aborted", "AbortError"));
        },
        { once: true }
      );
    }
  });
}
