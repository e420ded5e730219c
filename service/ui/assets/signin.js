import { api, auth } from "./api.js";
import { h, errorBox } from "./dom.js";
import { navigate } from "./nav.js";

export function renderSignIn(main, _params, search) {
  const next = search.get("next") || "/ui/queue";
  const token = h("textarea", { id: "token", name: "token", rows: 3, required: true, spellcheck: "false", autocomplete: "off", placeholder: "paste the bearer token you were given" });
  const status = h("div", { class: "form-status" });
  const form = h(
    "form",
    {
      class: "card narrow",
      id: "sign-in-form",
      onsubmit: async (ev) => {
        ev.preventDefault();
        status.replaceChildren("Checking the token…");
        const t = token.value.trim();
        try {
          const me = await api.get("/whoami", { token: t });
          auth.save(t, me.role);
          navigate(next.startsWith("/ui/") ? next : "/ui/queue", { replace: true });
        } catch (e) {
          status.replaceChildren(errorBox(e, "Sign-in refused"));
        }
      },
    },
    h("h1", {}, "Sign in"),
    h("p", {}, "The dashboard uses the same bearer tokens as the API. Ask an administrator for one (", h("code", {}, "henrybook token create"), "). It is kept in this browser only."),
    h("label", { for: "token" }, "Token"),
    token,
    h("div", { class: "actions" }, h("button", { type: "submit", class: "primary" }, "Sign in")),
    status,
  );
  if (auth.token()) form.append(h("p", { class: "muted" }, `Currently signed in as ${auth.role() ?? "unknown role"}.`));
  main.append(form);
  token.focus();
}
