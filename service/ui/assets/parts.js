// Parts: the registry's own query (/api/v1/parts) with its filters and cursor pagination. Nothing is
// fetched beyond the page on screen, so ten thousand parts cost the same as ten.

import { api, query } from "./api.js";
import { h, link, badge, errorBox } from "./dom.js";
import { si, parseSI } from "./si.js";
import { partHref, fitHref } from "./common.js";

const PAGE = 50;

// Form fields: [query parameter, label, unit (for SI input), placeholder]
const RANGE_FIELDS = [
  ["srf_min_hz", "SRF from", "Hz", "e.g. 10 MHz"],
  ["srf_max_hz", "SRF to", "Hz", "e.g. 100 MHz"],
  ["series_resonance_min_hz", "Series resonance from", "Hz", "e.g. 30 MHz"],
  ["series_resonance_max_hz", "Series resonance to", "Hz", "e.g. 80 MHz"],
  ["l_min_h", "L from", "H", "e.g. 4.7 µH"],
  ["l_max_h", "L to", "H", "e.g. 22 µH"],
  ["l_at_hz", "L measured at", "Hz", "default: L0"],
  ["dcr_max_ohm", "DCR at most", "Ω", "e.g. 50 mΩ"],
];

export function renderParts(main, _params, search) {
  const state = Object.fromEntries(search.entries());
  const cursors = [];
  let cursor = state.cursor ?? null;
  delete state.cursor;

  const q = h("input", { type: "search", id: "part-q", name: "q", value: state.q ?? "", placeholder: "part number or description", autocomplete: "off" });
  const approved = h("input", { type: "checkbox", id: "approved-only", name: "approved_only", checked: state.approved_only === "true" });
  const inputs = Object.fromEntries(
    RANGE_FIELDS.map(([key, , unit, ph]) => [key, h("input", { type: "text", id: `f-${key}`, name: key, placeholder: ph, value: state[key] != null ? si(Number(state[key]), unit) : "", "data-unit": unit, autocomplete: "off" })]),
  );
  const sort = h(
    "select",
    { id: "part-sort", name: "sort" },
    [["", "part number"], ["srf_hz", "SRF, lowest first"], ["-srf_hz", "SRF, highest first"], ["l0_h", "L0, lowest first"], ["-l0_h", "L0, highest first"], ["rdc_ohm", "DCR, lowest first"]].map(([v, t]) => h("option", { value: v, selected: (state.sort ?? "") === v }, t)),
  );
  const formMsg = h("div", { class: "form-status" });
  const body = h("tbody", {});
  const pager = h("div", { class: "pager" });
  const summary = h("span", { class: "muted", id: "parts-summary" });

  function params() {
    const p = { q: q.value.trim(), approved_only: approved.checked ? "true" : "false", sort: sort.value };
    for (const [key, , unit] of RANGE_FIELDS) {
      const v = parseSI(inputs[key].value, unit);
      if (v !== null && !(v > 0)) throw new Error(`${key}: the value must be positive`);
      p[key] = v;
    }
    return p;
  }

  let timer = null;
  let seq = 0;
  async function load() {
    let p;
    try {
      p = params();
      formMsg.replaceChildren();
    } catch (e) {
      formMsg.replaceChildren(h("div", { class: "error", role: "alert" }, e.message));
      return;
    }
    history.replaceState(null, "", `/ui/parts${query(p)}`);
    const mine = ++seq;
    summary.textContent = "loading…";
    try {
      const res = await api.get(`/parts${query({ ...p, limit: PAGE, cursor })}`);
      if (mine !== seq) return;
      body.replaceChildren(...(res.items.length ? res.items.map(row) : [h("tr", { class: "empty" }, h("td", { colspan: 9 }, "No part matches these filters."))]));
      summary.textContent = `page ${cursors.length + 1} · ${res.items.length} part${res.items.length === 1 ? "" : "s"} shown${res.next_cursor ? " · more on the next page" : ""}`;
      pager.replaceChildren(
        h("button", { type: "button", id: "prev-page", disabled: cursors.length === 0, onclick: () => { cursor = cursors.pop() ?? null; load(); } }, "← Previous"),
        h("button", { type: "button", id: "next-page", disabled: !res.next_cursor, onclick: () => { cursors.push(cursor); cursor = res.next_cursor; load(); } }, "Next →"),
      );
    } catch (e) {
      if (mine !== seq) return;
      summary.textContent = "";
      body.replaceChildren(h("tr", {}, h("td", { colspan: 9 }, errorBox(e, "The registry refused the query"))));
    }
  }
  // A changed filter starts again from the first page.
  const changed = () => {
    clearTimeout(timer);
    timer = setTimeout(() => { cursors.length = 0; cursor = null; load(); }, 350);
  };
  q.addEventListener("input", changed);
  approved.addEventListener("change", changed);
  sort.addEventListener("change", changed);
  for (const el of Object.values(inputs)) el.addEventListener("change", changed);

  const form = h(
    "form",
    { class: "filters card", id: "part-filters", onsubmit: (ev) => { ev.preventDefault(); cursors.length = 0; cursor = null; load(); } },
    h("div", { class: "filter-row" }, h("label", { class: "grow" }, "Search ", q), h("label", {}, h("span", {}, "Sort by"), sort), h("label", { class: "check" }, approved, " approved parts only")),
    h("div", { class: "filter-grid" }, RANGE_FIELDS.map(([key, label]) => h("label", {}, h("span", {}, label), inputs[key]))),
    h("div", { class: "actions" }, h("button", { type: "submit", class: "primary" }, "Apply"), h("button", { type: "button", class: "link", onclick: () => { q.value = ""; approved.checked = false; for (const el of Object.values(inputs)) el.value = ""; sort.value = ""; changed(); } }, "clear filters")),
    formMsg,
  );

  main.append(
    h("div", { class: "page-head" }, h("h1", {}, "Parts"), summary),
    form,
    h(
      "section",
      { class: "card" },
      h(
        "table",
        { class: "parts", id: "parts" },
        h("thead", {}, h("tr", {}, ["Part", "Description", "L0", "DCR", "SRF", "Series resonances", "Latest verdict", "Approved model", "Drift"].map((t) => h("th", {}, t)))),
        body,
      ),
      pager,
    ),
  );
  load();
  return () => clearTimeout(timer);
}

function row(p) {
  const drift = p.drift_max_sigma;
  const pct = p.drift_l0_percent;
  // L0's change against the part's inductance tolerance (±10 % without one); σ second.
  const limit = p.l_tolerance_percent ?? 10;
  const cls = pct == null ? "" : Math.abs(pct) > limit ? "drift-high" : Math.abs(pct) > limit / 2 ? "drift-mid" : "";
  return h(
    "tr",
    { "data-part": p.part_number },
    h("td", {}, link(partHref(p.part_number), p.part_number)),
    h("td", { class: "desc" }, p.description ?? ""),
    h("td", { class: "num" }, si(p.l0_h, "H"), p.l_eff_h != null ? h("div", { class: "pname" }, `L_eff ${si(p.l_eff_h, "H")}`) : null),
    h("td", { class: "num" }, si(p.rdc_ohm, "Ω")),
    h("td", { class: "num" }, si(p.srf_hz, "Hz")),
    h("td", { class: "num" }, (p.series_resonances_hz ?? []).length ? p.series_resonances_hz.map((f) => si(f, "Hz", 3)).join(", ") : "—"),
    h("td", {}, p.latest_fit_id != null ? link(fitHref(p.latest_fit_id), badge(p.latest_verdict ?? "no verdict", p.latest_verdict ?? "none")) : badge(null)),
    h("td", {}, p.approved_fit_id != null ? link(fitHref(p.approved_fit_id), `#${p.approved_fit_id}`) : h("span", { class: "muted" }, "none")),
    h("td", { class: `num ${cls}`, "data-drift-l0": pct ?? "" }, pct != null ? `L0 ${pct > 0 ? "+" : ""}${pct.toFixed(1)} %` : "—", drift != null ? h("div", { class: "pname" }, `largest ${drift.toFixed(1)} σ`) : null),
  );
}
