// The page router: one document, a view per path under /ui/. Each view renders into <main> and may
// return a cleanup function (to stop its polling) that runs when the user navigates away.

import { api, auth, ApiError } from "./api.js";
import { h, clear, errorBox } from "./dom.js";
import { navigate, setRouter } from "./nav.js";
import { renderQueue } from "./queue.js";
import { renderParts } from "./parts.js";
import { renderPart } from "./part.js";
import { renderFit } from "./fit.js";
import { renderUpload } from "./upload.js";
import { renderSignIn } from "./signin.js";

const ROUTES = [
  [/^\/ui\/queue\/?$/, "queue", renderQueue],
  [/^\/ui\/parts\/?$/, "parts", renderParts],
  [/^\/ui\/parts\/(.+)$/, "parts", renderPart],
  [/^\/ui\/fits\/([^/]+)\/?$/, "queue", renderFit],
  [/^\/ui\/upload\/?$/, "upload", renderUpload],
  [/^\/ui\/sign-in\/?$/, "sign-in", renderSignIn],
];

let cleanup = null;


function showWho() {
  const who = document.getElementById("who");
  clear(who);
  if (auth.token()) {
    who.append(
      h("span", { class: "role", "data-role": auth.role() ?? "" }, auth.role() ?? "signed in"),
      h("button", { class: "link", type: "button", onclick: () => { auth.clear(); navigate("/ui/sign-in"); } }, "Sign out"),
    );
  } else {
    who.append(h("a", { href: "/ui/sign-in", "data-nav": "" }, "Sign in"));
  }
}

async function route() {
  if (cleanup) {
    try { cleanup(); } catch { /* a view's cleanup never blocks navigation */ }
    cleanup = null;
  }
  let path = location.pathname;
  if (path === "/" || path === "/ui" || path === "/ui/") {
    history.replaceState(null, "", "/ui/queue");
    path = "/ui/queue";
  }
  const match = ROUTES.map(([re, nav, view]) => [re.exec(path), nav, view]).find(([m]) => m);
  const main = clear(document.getElementById("main"));
  if (!match) {
    main.append(h("h1", {}, "No such page"), h("p", {}, `Nothing lives at ${path}. `, h("a", { href: "/ui/queue", "data-nav": "" }, "Go to the queue.")));
    return;
  }
  const [m, nav, view] = match;
  if (!auth.token() && view !== renderSignIn) {
    navigate(`/ui/sign-in?next=${encodeURIComponent(path + location.search)}`, { replace: true });
    return;
  }
  for (const a of document.querySelectorAll("#nav a")) a.classList.toggle("active", a.dataset.page === nav);
  showWho();
  const params = m.slice(1).map(decodeURIComponent);
  try {
    const c = await view(main, params, new URLSearchParams(location.search));
    if (typeof c === "function") cleanup = c;
  } catch (e) {
    if (e instanceof ApiError && e.status === 401) {
      auth.clear();
      navigate(`/ui/sign-in?next=${encodeURIComponent(path)}`, { replace: true });
      return;
    }
    main.append(errorBox(e, "This page could not be shown"));
  }
}

document.addEventListener("click", (ev) => {
  const a = ev.target.closest?.("a[data-nav]");
  if (!a || ev.defaultPrevented || ev.button !== 0 || ev.metaKey || ev.ctrlKey || ev.shiftKey) return;
  const url = new URL(a.href, location.href);
  if (url.origin !== location.origin) return;
  ev.preventDefault();
  navigate(url.pathname + url.search);
});
window.addEventListener("popstate", route);
setRouter(route);

async function start() {
  // Refresh the role once per load: a token's role can change on the server.
  if (auth.token()) {
    try {
      const me = await api.get("/whoami");
      auth.save(auth.token(), me.role);
    } catch (e) {
      if (e instanceof ApiError && e.status === 401) auth.clear();
    }
  }
  route();
}
start();
