// Part: limits (editable by engineers), lots, the baseline, every fit revision, the approval trail.

import { api, auth } from "./api.js";
import { h, link, errorBox, safetyNote } from "./dom.js";
import { si, parseSI, time } from "./si.js";
import { fitRows, fitTableHead, fitHref, approvalControls } from "./common.js";
import { renderHistory } from "./part-history.js";

export const LIMIT_FIELDS = [
  ["l_nominal_h", "Nominal inductance", "H"],
  ["l_test_frequency_hz", "Inductance test frequency", "Hz"],
  ["l_tolerance_percent", "Inductance tolerance", "%"],
  ["dcr_max_ohm", "DCR at most", "Ω"],
  ["srf_min_hz", "SRF at least", "Hz"],
  ["q_min", "Q at least", ""],
  ["q_test_frequency_hz", "Q test frequency", "Hz"],
  ["z_min_ohm", "|Z| at least", "Ω"],
  ["z_band_min_hz", "|Z| band from", "Hz"],
  ["z_band_max_hz", "|Z| band to", "Hz"],
];

export async function renderPart(main, [partNumber]) {
  const path = `/parts/${encodeURIComponent(partNumber)}`;
  const part = await api.get(path);
  const rerender = () => {
    main.replaceChildren();
    return renderPart(main, [partNumber]);
  };

  const limitsBox = h("section", { class: "card", id: "limits" });
  const showLimits = () => {
    const rows = LIMIT_FIELDS.map(([key, label, unit]) => h("tr", { "data-limit": key }, h("th", {}, label), h("td", { class: "num" }, part.limits?.[key] == null ? h("span", { class: "muted" }, "no limit") : si(part.limits[key], unit))));
    limitsBox.replaceChildren(
      h("div", { class: "card-head" }, h("h2", {}, "Limits"), auth.atLeast("engineer") ? h("button", { type: "button", id: "edit-limits", class: "small", onclick: editLimits } , "Edit limits") : null),
      h("table", { class: "kv" }, h("tbody", {}, rows)),
    );
  };
  const editLimits = () => {
    const inputs = Object.fromEntries(LIMIT_FIELDS.map(([key, , unit]) => [key, h("input", { type: "text", name: key, id: `limit-${key}`, value: part.limits?.[key] == null ? "" : si(part.limits[key], unit, 6), placeholder: "no limit", autocomplete: "off" })]));
    const msg = h("div", { class: "form-status" });
    limitsBox.replaceChildren(
      h("h2", {}, "Edit limits"),
      h(
        "form",
        {
          id: "limits-form",
          class: "limit-form",
          onsubmit: async (ev) => {
            ev.preventDefault();
            const limits = {};
            try {
              for (const [key, label, unit] of LIMIT_FIELDS) {
                try {
                  limits[key] = parseSI(inputs[key].value, unit);
                } catch (e) {
                  throw new Error(`${label}: ${e.message}`);
                }
              }
            } catch (e) {
              msg.replaceChildren(h("div", { class: "error", role: "alert" }, e.message));
              return;
            }
            msg.replaceChildren("Saving…");
            try {
              const updated = await api.put(`${path}/limits`, { limits });
              Object.assign(part, updated);
              showLimits();
            } catch (e) {
              msg.replaceChildren(errorBox(e, "The limits were not saved"));
            }
          },
        },
        h("div", { class: "filter-grid" }, LIMIT_FIELDS.map(([key, label, unit]) => h("label", {}, h("span", {}, `${label}${unit ? ` (${unit})` : ""}`), inputs[key]))),
        h("p", { class: "muted" }, "Values take SI prefixes (4.7µ, 30 M, 50 m). Leave a field empty for no limit. Saved limits apply to verdicts from now on; earlier fits keep theirs."),
        h("div", { class: "actions" }, h("button", { type: "submit", class: "primary" }, "Save limits"), h("button", { type: "button", class: "link", onclick: showLimits }, "cancel")),
        msg,
      ),
    );
  };
  showLimits();

  const fits = part.fits ?? [];
  const extra = auth.atLeast("engineer") ? (f) => approvalControls(f, rerender) : null;
  const audit = part.audit ?? [];

  const historyBox = h("section", { class: "card", id: "history" });
  renderHistory(historyBox, part);

  main.append(
    h("div", { class: "page-head" }, h("h1", {}, part.part_number), h("span", { class: "muted" }, part.description ?? "")),
    safetyNote(),
    h(
      "div",
      { class: "two-col" },
      limitsBox,
      h(
        "section",
        { class: "card", id: "lots" },
        h("h2", {}, "Lots and baseline"),
        h("table", { class: "kv" }, h("tbody", {},
          h("tr", {}, h("th", {}, "Baseline model"), h("td", {}, part.baseline_fit_id != null ? link(fitHref(part.baseline_fit_id), `fit #${part.baseline_fit_id}`) : h("span", { class: "muted" }, "none approved yet"))),
          h("tr", {}, h("th", {}, "Lots measured"), h("td", {}, (part.lots ?? []).length ? part.lots.join(", ") : "—")),
          h("tr", {}, h("th", {}, "Fits"), h("td", {}, String(fits.length))),
        )),
        auth.atLeast("inspector") ? h("p", {}, h("a", { href: `/ui/upload?part=${encodeURIComponent(part.part_number)}`, "data-nav": "" }, "Upload a sweep of a new lot →")) : null,
        auth.atLeast("engineer") ? null : h("p", { class: "muted", id: "read-only-note" }, `Signed in as ${auth.role() ?? "reader"}: approving, rejecting and editing limits need the engineer role.`),
      ),
    ),
    historyBox,
    h(
      "section",
      { class: "card" },
      h("h2", {}, "Revision history"),
      h("table", { class: "fits", id: "part-fits" }, fitTableHead({ showPart: false, extra: !!extra }), h("tbody", {}, fits.length ? fits.flatMap((f) => fitRows(f, { showPart: false, extra })) : h("tr", { class: "empty" }, h("td", { colspan: 9 }, "No sweeps uploaded for this part yet.")))),
    ),
    h(
      "section",
      { class: "card" },
      h("h2", {}, "Approvals and changes"),
      h(
        "table",
        { class: "audit", id: "audit" },
        h("thead", {}, h("tr", {}, ["When", "Who", "What", "Fit", "Why"].map((t) => h("th", {}, t)))),
        h("tbody", {}, audit.length ? audit.map((a) => h("tr", { "data-action": a.action }, h("td", {}, time(a.at)), h("td", {}, a.actor ?? "—"), h("td", {}, a.action), h("td", {}, a.fit_id != null ? link(fitHref(a.fit_id), `#${a.fit_id}`) : "—"), h("td", { class: "reason" }, a.reason ?? ""))) : h("tr", { class: "empty" }, h("td", { colspan: 5 }, "Nothing recorded yet."))),
      ),
    ),
  );
}
