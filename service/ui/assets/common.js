// Pieces several views share: fit rows, progress bars, the approval form.

import { api, auth } from "./api.js";
import { h, link, badge, errorBox } from "./dom.js";
import { si, ago, time } from "./si.js";

export const fitHref = (id) => `/ui/fits/${encodeURIComponent(id)}`;
export const partHref = (pn) => `/ui/parts/${encodeURIComponent(pn)}`;

export function progressBar(fit) {
  const p = Math.max(0, Math.min(1, Number(fit.progress) || 0));
  const bar = h("span", { class: "bar" });
  bar.style.width = `${(p * 100).toFixed(0)}%`;
  return h("span", { class: `progress st-${fit.status}`, title: `${(p * 100).toFixed(0)} %`, "data-progress": p.toFixed(3) }, bar);
}

export function statusCell(fit) {
  return h("td", { class: "status-cell" }, badge(fit.status), fit.status === "running" || fit.status === "queued" ? progressBar(fit) : null);
}

// One table row per fit; a failed fit gets a second row with its error in words.
export function fitRows(fit, { showPart = true, extra } = {}) {
  const cols = [
    h("td", {}, link(fitHref(fit.fit_id), `#${fit.fit_id}`)),
    showPart ? h("td", {}, link(partHref(fit.part_number), fit.part_number)) : null,
    h("td", {}, fit.lot ?? "—"),
    h("td", { class: "num" }, fit.revision ?? "—"),
    statusCell(fit),
    h("td", { class: "num" }, fit.srf_hz != null ? si(fit.srf_hz, "Hz") : "—"),
    h("td", {}, fit.quality ? badge(fit.quality, `q-${fit.quality}`) : badge(null)),
    h("td", {}, badge(fit.verdict)),
    h("td", {}, badge(fit.approval)),
    h("td", { title: time(fit.created_at) }, ago(fit.created_at)),
    extra ? h("td", { class: "row-actions" }, extra(fit)) : null,
  ].filter(Boolean);
  const row = h("tr", { "data-fit-id": fit.fit_id, "data-status": fit.status }, cols);
  if (fit.status !== "failed" || !fit.error) return [row];
  return [row, h("tr", { class: "error-row", "data-error-for": fit.fit_id }, h("td", { colspan: cols.length }, h("span", { class: "err-label" }, "Failed: "), fit.error))];
}

export function fitTableHead({ showPart = true, extra = false } = {}) {
  return h(
    "thead",
    {},
    h("tr", {}, ["Fit", showPart ? "Part" : null, "Lot", "Rev.", "Status", "SRF", "Model", "Verdict", "Approval", "Created", extra ? "" : null].filter((x) => x !== null).map((t) => h("th", {}, t))),
  );
}

// Approve / reject with a reason; shown to engineers only (the API refuses anyone else).
export function approvalControls(fit, onDone) {
  if (!auth.atLeast("engineer") || fit.status !== "succeeded") return null;
  const box = h("div", { class: "approval", "data-approval-for": fit.fit_id });
  const open = (action) => {
    const reason = h("input", { type: "text", name: "reason", required: true, placeholder: action === "approve" ? "why this model is fit for design use" : "what is wrong with it", class: "reason" });
    const msg = h("div", { class: "form-status" });
    // A failing fit, or one whose model is poor, is approved only deliberately: say why it needs it.
    const concern = fit.quality === "poor" ? "its model does not describe the data within their uncertainty" : fit.verdict === "fail" ? "it fails the part's limits" : null;
    const override = action === "approve" && concern ? h("input", { type: "checkbox", name: "override" }) : null;
    const form = h(
      "form",
      {
        class: "inline-form",
        "data-action": action,
        onsubmit: async (ev) => {
          ev.preventDefault();
          msg.replaceChildren("Saving…");
          try {
            const body = { reason: reason.value.trim() };
            if (override?.checked) body.override = true;
            const detail = await api.post(`/fits/${encodeURIComponent(fit.fit_id)}/${action}`, body);
            onDone?.(detail);
          } catch (e) {
            msg.replaceChildren(errorBox(e, `Could not ${action}`));
          }
        },
      },
      reason,
      override ? h("label", { class: "override" }, override, ` Approve although ${concern}`) : null,
      h("button", { type: "submit", class: action === "approve" ? "primary" : "danger" }, action === "approve" ? "Confirm approval" : "Confirm rejection"),
      h("button", { type: "button", class: "link", onclick: () => box.replaceChildren(...buttons()) }, "cancel"),
      msg,
    );
    box.replaceChildren(form);
    reason.focus();
  };
  const buttons = () => [
    h("button", { type: "button", class: "small primary", "data-do": "approve", onclick: () => open("approve") }, "Approve"),
    h("button", { type: "button", class: "small danger", "data-do": "reject", onclick: () => open("reject") }, "Reject"),
  ];
  box.append(...buttons());
  return box;
}
