// A part's history across lots (GET /parts/{pn}/trend): one trend plot per figure with the part's
// limits, the control limits (mean ± 3σ of the approved lots) and the points out of control or in a
// run marked; an overlay of |Z|, L(f) and Q(f) of chosen lots against the baseline; each lot's
// printable report; downloads of every plot (SVG, PNG) and of the curves (CSV).

import { api, download } from "./api.js";
import { h, link, errorBox } from "./dom.js";
import { si, time } from "./si.js";
import { plot } from "./plot.js";
import { fitHref } from "./common.js";
import { plotDownloads, curvesCsv } from "./plot-export.js";

const UNIT = { H: "H", ohm: "Ω", Hz: "Hz", 1: "" };
// Axis titles short enough for the plot's height; the plot's title says the figure in full.
const AXIS = { l0_h: "L0", l_test_h: "L", dcr_ohm: "DCR", srf_hz: "SRF", q_peak: "Peak Q", q_test: "Q", z_min_band_ohm: "|Z| min", core_corner_hz: "Corner" };
const LOT_COLOURS = 6;

const fmt = (v, unit) => (v == null ? "—" : si(v, unit));
const safeName = (s) => String(s).replace(/[^A-Za-z0-9._-]+/g, "_");

// Opens the lot's HTML report in a new tab: the page needs the bearer token, so it is fetched and
// shown from a blob. The tab is opened at the click so no popup blocker stops it.
async function openReport(fitId) {
  const tab = window.open("", "_blank");
  try {
    const res = await api.raw(`/fits/${fitId}/report`);
    const html = await res.text();
    const url = URL.createObjectURL(new Blob([html], { type: "text/html" }));
    if (tab) tab.location = url;
    else window.location = url;
  } catch (e) {
    if (tab) tab.close();
    alert(`The report could not be made: ${e.message}`);
  }
}

export function reportLinks(fitId) {
  return h(
    "span",
    { class: "report-links" },
    h("a", { href: `/api/v1/fits/${fitId}/report`, "data-report": fitId, onclick: (ev) => { ev.preventDefault(); openReport(fitId); } }, "report"),
    " · ",
    h("a", { href: `/api/v1/fits/${fitId}/report.pdf`, "data-report-pdf": fitId, onclick: (ev) => { ev.preventDefault(); download(`/fits/${fitId}/report.pdf`, `report-fit-${fitId}.pdf`); } }, "PDF"),
  );
}

function trendPlot(trend, fig) {
  const n = trend.lots.length;
  const unit = UNIT[fig.unit] ?? "";
  const xs = fig.points.map((p) => p.lot_index + 1);
  const span = [0.5, n + 0.5];
  const flat = (y, key, label, cls, legend = true) => (y == null ? [] : [{ key, label, type: "line", cls, x: span, y: [y, y], legend, hover: false }]);
  const pick = (pred) => fig.points.map((p) => (pred(p) && p.value != null ? p.value : NaN));
  const series = [
    ...flat(fig.limit_low, "limit-low", "part limit", "limit"),
    ...flat(fig.limit_high, "limit-high", "part limit", "limit", fig.limit_low == null),
    ...flat(fig.control_low, "control-low", "control limits (±3σ)", "control"),
    ...flat(fig.control_high, "control-high", "control limits (±3σ)", "control", false),
    ...flat(fig.centre, "centre", "centre (mean of approved lots)", "centre"),
    { key: "value", label: "lot", type: "line", cls: "trend", x: xs, y: pick(() => true), legend: false, unit, fmt: (i) => `${trend.lots[i].lot}: ${fmt(fig.points[i].value, unit)}` },
    { key: "approved", label: "approved lot", type: "points", cls: "approved", x: xs, y: pick((p) => trend.lots[p.lot_index].approved), hover: false },
    { key: "other", label: "other lot", type: "points", cls: "other", x: xs, y: pick((p) => !trend.lots[p.lot_index].approved), hover: false },
    { key: "out-of-control", label: "beyond control limits", type: "points", cls: "ooc", x: xs, y: pick((p) => p.out_of_control), hover: false },
    { key: "run", label: `run of ${trend.run_length} on one side`, type: "points", cls: "run", x: xs, y: pick((p) => p.in_run), hover: false },
    { key: "zone", label: "2 of 3 beyond 2σ or 4 of 5 beyond 1σ", type: "points", cls: "zone", x: xs, y: pick((p) => p.beyond_2_sigma_2_of_3 || p.beyond_1_sigma_4_of_5), hover: false },
    { key: "outside-limits", label: "outside the part's limits", type: "points", cls: "fail", x: xs, y: pick((p) => p.outside_limits), hover: false },
  ].filter((s) => s.type !== "points" || s.y.some(Number.isFinite) || s.key === "approved");
  const every = Math.max(1, Math.ceil(n / 12));
  const figure = plot({
    id: `trend-${fig.figure}`,
    title: fig.label,
    height: 240,
    x: { label: "Lot (oldest first)", range: span, step: every, fmt: (v) => trend.lots[Math.round(v) - 1]?.lot ?? "" },
    y: { label: `${AXIS[fig.figure] ?? fig.figure}${unit ? ` (${unit})` : ""}`, unit },
    series,
  });
  const flagged = fig.points.filter((p) => p.out_of_control || p.in_run || p.beyond_2_sigma_2_of_3 || p.beyond_1_sigma_4_of_5 || p.outside_limits);
  const stats = fig.centre == null
    ? h("p", { class: "note" }, fig.control_note ?? "No control limits.")
    : h("p", { class: "note" }, `Centre ${fmt(fig.centre, unit)}, σ ${fmt(fig.sigma, unit)} from ${fig.approved_lots} approved lots; control limits ${fmt(fig.control_low, unit)} to ${fmt(fig.control_high, unit)}.`);
  const flags = flagged.length
    ? h("ul", { class: "trend-flags" }, flagged.map((p) => h("li", { "data-flag-lot": trend.lots[p.lot_index].lot }, `Lot ${trend.lots[p.lot_index].lot}: ${fmt(p.value, unit)}`, p.outside_limits ? " — outside the part's limits" : "", p.out_of_control ? " — beyond the control limits" : "", p.in_run ? ` — in a run of ${trend.run_length} or more on one side of the centre` : "", p.beyond_2_sigma_2_of_3 ? " — two of three in a row beyond 2σ on one side" : "", p.beyond_1_sigma_4_of_5 ? " — four of five in a row beyond 1σ on one side" : "")))
    : null;
  return h("div", { class: "trend", "data-figure": fig.figure }, h("div", { class: "plot-tools" }, plotDownloads(figure, `${safeName(trend.part_number)}-trend-${fig.figure}`)), figure, stats, flags);
}

async function overlay(box, trend, fitIds, baselineId) {
  box.replaceChildren(h("p", { class: "muted" }, "Loading curves…"));
  const ids = [...new Set([baselineId, ...fitIds].filter((x) => x != null))];
  const lotOf = (id) => trend.lots.find((l) => l.fit_id === id)?.lot ?? `fit #${id}`;
  let curves;
  try {
    curves = await Promise.all(ids.map((id) => api.get(`/fits/${id}/curves`)));
  } catch (e) {
    box.replaceChildren(errorBox(e, "The curves could not be loaded"));
    return;
  }
  const series = (fn, type = "line") =>
    ids.map((id, k) => {
      const c = curves[k];
      const base = id === baselineId;
      return {
        key: `fit-${id}`,
        label: `${lotOf(id)}${base ? " (baseline)" : ""}`,
        type,
        cls: base ? "baseline" : `lot${k % LOT_COLOURS}`,
        x: c.frequency_hz,
        y: c.frequency_hz.map((f, i) => fn(...point(c, i), f)),
      };
    });
  // The fitted model of each lot where there is one (measured Q is mostly noise where Re Z is a few
  // milliohms), else the measured points.
  const point = (c, i) => (c.model_z_real_ohm?.length === c.frequency_hz.length ? [c.model_z_real_ohm[i], c.model_z_imag_ohm[i]] : [c.measured_z_real_ohm[i], c.measured_z_imag_ohm[i]]);
  // Below 0.7 × the first resonance (Im Z turning negative) of each curve: where L and Q mean something.
  const belowResonance = (c) => {
    const k = c.frequency_hz.findIndex((f, i) => i > 0 && point(c, i)[1] <= 0 && point(c, i - 1)[1] > 0);
    return k < 0 ? Infinity : 0.7 * c.frequency_hz[k];
  };
  const defs = [
    { id: "overlay-zmag", title: "|Z| of the chosen lots", y: { log: true, unit: "Ω", label: "|Z| (Ω)" }, fn: (re, im) => Math.hypot(re, im) },
    { id: "overlay-l", title: "Effective inductance L(f) = Im Z / ω", y: { unit: "H", label: "L (H)" }, fn: (re, im, f) => im / (2 * Math.PI * f), clip: true },
    { id: "overlay-q", title: "Q(f) = Im Z / Re Z", y: { unit: "", label: "Q" }, fn: (re, im) => im / re, clip: true },
  ];
  const figures = defs.map((d) => {
    const sr = series(d.fn);
    let y = d.y;
    if (d.clip) {
      // The axis spans the values below the resonance: past it L and Q swing through ±∞.
      const vals = sr.flatMap((s, k) => {
        const cut = belowResonance(curves[k]);
        return s.y.filter((v, i) => Number.isFinite(v) && v > 0 && s.x[i] < cut);
      });
      const top = vals.length ? Math.max(...vals) * 1.3 : undefined;
      if (top) y = { ...y, range: [0, top] };
    }
    const figure = plot({ id: d.id, title: d.title, height: 260, x: { log: true, unit: "Hz", label: "Frequency (Hz)" }, y, series: sr });
    return h("div", { class: "overlay-plot" }, h("div", { class: "plot-tools" }, plotDownloads(figure, `${safeName(trend.part_number)}-${d.id}`)), figure);
  });
  const table = h(
    "table",
    { class: "overlay-lots" },
    h("thead", {}, h("tr", {}, ["Lot", "Fit", "Points", "Curves"].map((t) => h("th", {}, t)))),
    h("tbody", {}, ids.map((id, k) => h("tr", {}, h("td", {}, lotOf(id), id === baselineId ? " (baseline)" : ""), h("td", {}, link(fitHref(id), `#${id}`)), h("td", { class: "num" }, String(curves[k].frequency_hz.length)), h("td", {}, h("button", { type: "button", class: "small", "data-download": "csv", onclick: () => curvesCsv(curves[k], `${safeName(trend.part_number)}-lot-${safeName(lotOf(id))}-fit-${id}-curves`) }, "CSV"))))),
  );
  box.replaceChildren(h("p", { class: "muted" }, "The fitted model of each lot over its sweep (the measured points where a lot has no model). Past the self-resonance L and Q lose their meaning; their axes show the range below it."), ...figures, table);
}

export async function renderHistory(section, part) {
  section.replaceChildren(h("h2", {}, "History across lots"), h("p", { class: "muted" }, "Loading…"));
  let trend;
  try {
    trend = await api.get(`/parts/${encodeURIComponent(part.part_number)}/trend`);
  } catch (e) {
    section.replaceChildren(h("h2", {}, "History across lots"), errorBox(e, "The trend could not be loaded"));
    return;
  }
  const baselineId = part.baseline_fit_id ?? null;
  if (!trend.lots.length) {
    section.replaceChildren(h("h2", {}, "History across lots"), h("p", { class: "muted" }, "No succeeded fits yet."));
    return;
  }
  const checks = trend.lots.map((l, i) => h("input", { type: "checkbox", value: l.fit_id, "data-lot": l.lot, checked: i === trend.lots.length - 1 && l.fit_id !== baselineId }));
  const overlayBox = h("div", { id: "overlay" });
  const lotTable = h(
    "table",
    { class: "lots-table", id: "lot-history" },
    h("thead", {}, h("tr", {}, ["Overlay", "Lot", "Fit", "Uploaded", "Approved", "Model", "Inspection report"].map((t) => h("th", {}, t)))),
    h("tbody", {}, trend.lots.map((l, i) => h("tr", { "data-lot": l.lot }, h("td", {}, checks[i]), h("td", {}, l.lot), h("td", {}, link(fitHref(l.fit_id), `#${l.fit_id}`), l.fit_id === baselineId ? " (baseline)" : ""), h("td", {}, time(l.uploaded_at)), h("td", {}, l.approved ? "yes" : "—"), h("td", {}, l.quality), h("td", {}, reportLinks(l.fit_id))))),
  );
  const show = () => overlay(overlayBox, trend, checks.filter((c) => c.checked).map((c) => Number(c.value)), baselineId);
  section.replaceChildren(
    h("div", { class: "card-head" }, h("h2", {}, "History across lots"), h("span", { class: "muted" }, `${trend.lots.length} lots`)),
    h("p", { class: "muted" }, `One point per lot (its approved fit, else its newest with a trustworthy model). Control limits are the mean ± 3σ of the approved lots (σ: sample standard deviation; none with fewer than two approved lots). Marked: points beyond them (Nelson rule 1) and runs of ${trend.run_length} or more on one side of the centre (Nelson rule 2).`),
    h("div", { class: "trend-grid" }, trend.figures.map((f) => trendPlot(trend, f))),
    h("h3", {}, "Lots"),
    lotTable,
    h("div", { class: "actions" }, h("button", { type: "button", id: "show-overlay", class: "primary", onclick: show }, baselineId != null ? "Overlay the chosen lots on the baseline" : "Overlay the chosen lots")),
    overlayBox,
  );
}
