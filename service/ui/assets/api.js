// The one place that talks to /api/v1: adds the bearer token, turns problem+json into ApiError.

const TOKEN_KEY = "henrybook.token";
const ROLE_KEY = "henrybook.role";
const RANK = { reader: 1, inspector: 2, engineer: 3 };

export class ApiError extends Error {
  constructor(status, problem) {
    super(problem.detail || problem.title || `HTTP ${status}`);
    this.status = status;
    this.problem = problem;
  }
  // "bad-sweep-file" from "urn:henrybook:problem:bad-sweep-file".
  get kind() {
    return String(this.problem.type || "").split(":").pop();
  }
}

export const auth = {
  token: () => localStorage.getItem(TOKEN_KEY),
  role: () => localStorage.getItem(ROLE_KEY),
  save(token, role) {
    localStorage.setItem(TOKEN_KEY, token);
    localStorage.setItem(ROLE_KEY, role);
  },
  clear() {
    localStorage.removeItem(TOKEN_KEY);
    localStorage.removeItem(ROLE_KEY);
  },
  // The role the server last reported; the server checks every request anyway.
  atLeast(role) {
    return (RANK[auth.role()] ?? 0) >= RANK[role];
  },
};

async function request(method, path, { body, form, token, raw } = {}) {
  const headers = { Accept: "application/json, application/problem+json" };
  const t = token ?? auth.token();
  if (t) headers.Authorization = `Bearer ${t}`;
  let payload;
  if (form) payload = form;
  else if (body !== undefined) {
    headers["Content-Type"] = "application/json";
    payload = JSON.stringify(body);
  }
  let res;
  try {
    res = await fetch(`/api/v1${path}`, { method, headers, body: payload });
  } catch (e) {
    throw new ApiError(0, { title: "The server did not answer", detail: `${method} /api/v1${path}: ${e.message}` });
  }
  if (!res.ok) {
    let problem;
    const text = await res.text();
    try {
      problem = JSON.parse(text);
    } catch {
      problem = { title: res.statusText, detail: text.trim() || `${method} /api/v1${path} answered ${res.status}` };
    }
    if (typeof problem !== "object" || problem === null) problem = { detail: String(problem) };
    problem.status ??= res.status;
    throw new ApiError(res.status, problem);
  }
  if (raw) return res;
  if (res.status === 204) return null;
  const type = res.headers.get("Content-Type") || "";
  return type.includes("json") ? res.json() : res.text();
}

export const api = {
  get: (path, opts) => request("GET", path, opts),
  post: (path, body, opts = {}) => request("POST", path, { ...opts, body }),
  put: (path, body, opts = {}) => request("PUT", path, { ...opts, body }),
  upload: (path, form) => request("POST", path, { form }),
  raw: (path) => request("GET", path, { raw: true }),
};

// `{a: 1, b: null, c: ""}` -> "?a=1": empty filters are left out, so the server applies no limit.
export function query(params) {
  const q = new URLSearchParams();
  for (const [k, v] of Object.entries(params)) {
    if (v === null || v === undefined || v === "" || v === false) continue;
    q.set(k, String(v));
  }
  const s = q.toString();
  return s ? `?${s}` : "";
}

// Downloads need the bearer token, so a plain link will not do: fetch, then hand the bytes to the browser.
export async function download(path, fallbackName) {
  const res = await api.raw(path);
  const blob = await res.blob();
  const cd = res.headers.get("Content-Disposition") || "";
  const m = /filename\*?=(?:UTF-8'')?"?([^";]+)"?/i.exec(cd);
  const name = m ? decodeURIComponent(m[1]) : fallbackName;
  const url = URL.createObjectURL(blob);
  const a = document.createElement("a");
  a.href = url;
  a.download = name;
  document.body.append(a);
  a.click();
  a.remove();
  setTimeout(() => URL.revokeObjectURL(url), 10000);
  return { name, bytes: blob.size };
}

// Calls `fn` now and then every `ms` after the previous call finished (never two at once); returns the
// function that stops it. A hidden tab is polled less often.
export function poll(fn, ms) {
  let stopped = false;
  let timer = null;
  const tick = async () => {
    if (stopped) return;
    try {
      await fn();
    } catch {
      // the view shows its own errors; keep polling so a restarted server is picked up again
    }
    if (!stopped) timer = setTimeout(tick, document.hidden ? ms * 5 : ms);
  };
  tick();
  return () => {
    stopped = true;
    clearTimeout(timer);
  };
}
