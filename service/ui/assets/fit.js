// Fit: status, the plots (|Z|, phase, residuals, L_eff, Q), parameters with 1σ, verdict, drift,
// downloads and the actions the signed-in role may take.

import { api, auth, poll, download } from "./api.js";
import { h, link, badge, errorBox } from "./dom.js";
import { si, plain, time, unitFromName } from "./si.js";
import { plot } from "./plot.js";
import { partHref, fitHref, progressBar, approvalControls } from "./common.js";
import { LIMIT_FIELDS } from "./part.js";
import { navigate } from "./nav.js";
import { reportLinks } from "./part-history.js";
import { plotDownloads, curvesCsv } from "./plot-export.js";

const FINAL = new Set(["succeeded", "failed", "cancelled"]);
const DEG = 180 / Math.PI;

export async function renderFit(main, [fitId]) {
  const base = `/fits/${encodeURIComponent(fitId)}`;
  const detail = await api.get(base);
  const rerender = () => {
    main.replaceChildren();
    return renderFit(main, [fitId]);
  };

  main.append(header(detail));
  if (!FINAL.has(detail.status)) {
    const live = h("section", { class: "card", id: "live" }, h("h2", {}, "Fitting"), h("p", {}, badge(detail.status), " ", progressBar(detail)));
    main.append(live, actions(detail, rerender));
    let stop = null;
    const cleanup = () => stop?.();
    stop = poll(async () => {
      const now = await api.get(base);
      if (FINAL.has(now.status)) {
        stop();
        rerender();
      } else {
        live.replaceChildren(h("h2", {}, "Fitting"), h("p", {}, badge(now.status), " ", progressBar(now), ` ${Math.round((now.progress ?? 0) * 100)} %`));
      }
    }, 1500);
    return cleanup;
  }

  if (detail.status === "failed") {
    main.append(
      h("section", { class: "card failed", id: "fit-error" }, h("h2", {}, "This fit failed"), h("p", { class: "error-text" }, detail.error ?? "The service gave no reason."), h("p", { class: "muted" }, "Nothing already stored was changed. Fix the file or the options and upload again, or retry if the cause was temporary.")),
    );
  }
  main.append(actions(detail, rerender));

  const curves = await api.get(`${base}/curves`).catch((e) => ({ error: e }));
  if (curves.error) main.append(errorBox(curves.error, "The curves could not be loaded"));
  else main.append(plots(curves, detail.report, `fit-${detail.fit_id}`));

  const report = detail.report;
  if (report) {
    main.append(
      h("div", { class: "two-col" }, parameterTable(report), derivedTable(report)),
    );
  }
  // The part's inductance tolerance colours the drift of L0 (a tolerance, not σ, is what an engineer
  // holds a lot to).
  const part = await api.get(`/parts/${encodeURIComponent(detail.part_number)}`).catch(() => null);
  main.append(h("div", { class: "two-col" }, verdictTable(detail), driftTable(detail, part?.limits?.l_tolerance_percent ?? null)));
  if (report?.material) main.append(materialCard(report.material));
  if (report) main.append(qualityCard(report));
}

// The core material as the model shows it, when the upload stated the construction: μ′ and μ″ over the
// band, the initial permeability and the construction check.
function materialCard(m) {
  const f = m.spectrum.map((p) => p.frequency_hz);
  const c = m.construction;
  const shape = c.core.toroid
    ? `toroid ${si(c.core.toroid.outer_diameter_m, "m")} × ${si(c.core.toroid.inner_diameter_m, "m")} × ${si(c.core.toroid.height_m, "m")}`
    : `Ae ${plain(c.core.effective.area_m2 * 1e6, 4)} mm², le ${si(c.core.effective.path_m, "m")}`;
  return h(
    "section",
    { class: "card", id: "material" },
    h("h2", {}, "Core material"),
    h(
      "table",
      { class: "kv" },
      h("tbody", {},
        h("tr", {}, h("th", {}, "Construction"), h("td", {}, `${plain(c.turns, 4)} turns, ${shape}${c.gap_m ? `, gap ${si(c.gap_m, "m")}` : ""}`)),
        h("tr", {}, h("th", {}, "Inductance per unit permeability"), h("td", {}, si(m.inductance_per_permeability_h, "H"))),
        h("tr", {}, h("th", {}, "Initial permeability μi"), h("td", { "data-mu-initial": m.initial_permeability }, `${plain(m.initial_permeability, 4)}${m.initial_permeability_sigma != null ? ` ± ${plain(m.initial_permeability_sigma, 2)}` : " (σ not determined)"}`)),
        m.expected_l0_h != null
          ? h("tr", {}, h("th", {}, "Expected L0 from the nominal μi"), h("td", {}, `${si(m.expected_l0_h, "H")} (fitted L0 ${m.l0_versus_expected_percent >= 0 ? "+" : ""}${plain(m.l0_versus_expected_percent, 3)} %)`))
          : null,
      ),
    ),
    plot({
      id: "plot-mu",
      title: "Complex permeability μ = μ′ − jμ″ of the core material",
      width: 760,
      height: 260,
      x: { log: true, unit: "Hz", label: "frequency" },
      y: { unit: "", label: "μ", includeZero: true },
      series: [
        ...muBands(m.spectrum, f),
        { key: "model", label: "μ′", type: "line", x: f, y: m.spectrum.map((p) => p.mu_real), unit: "", fmt: (i) => plain(m.spectrum[i].mu_real, 4) },
        { key: "measured", label: "μ″", type: "line", x: f, y: m.spectrum.map((p) => p.mu_imag), unit: "", fmt: (i) => plain(m.spectrum[i].mu_imag, 4) },
      ],
    }),
  );
}

// ±1σ bands of μ′ and μ″ where the report gives their σ (absent σ leaves a gap in the band).
function muBands(spectrum, f) {
  const band = (key, label, value, sigma) => ({
    key, label, type: "band", cls: "band", x: f,
    y0: spectrum.map((p) => (p[sigma] == null ? NaN : p[value] - p[sigma])),
    y1: spectrum.map((p) => (p[sigma] == null ? NaN : p[value] + p[sigma])),
  });
  if (!spectrum.some((p) => p.mu_real_sigma != null || p.mu_imag_sigma != null)) return [];
  return [band("mu-real-band", "μ′ ±1σ", "mu_real", "mu_real_sigma"), band("mu-imag-band", "μ″ ±1σ", "mu_imag", "mu_imag_sigma")];
}

function header(d) {
  return h(
    "div",
    { class: "fit-head" },
    h("div", { class: "page-head" }, h("h1", {}, `Fit #${d.fit_id}`), badge(d.status), d.quality ? badge(d.quality === "poor" ? "poor model" : "model ok", `q-${d.quality}`) : null, badge(d.verdict), badge(d.approval)),
    h(
      "dl",
      { class: "facts" },
      fact("Part", link(partHref(d.part_number), d.part_number)),
      fact("Lot", d.lot ?? "—"),
      fact("Revision", d.revision ?? "—"),
      fact("Method", d.method ?? "—"),
      d.method !== "direct" ? fact("Reference impedance", d.z0_ohm != null ? si(d.z0_ohm, "Ω") : "—") : null,
      fact("File", d.file_name ?? "—"),
      fact("SHA-256", h("code", { class: "hash", title: d.sha256 ?? "" }, d.sha256 ? `${d.sha256.slice(0, 16)}…` : "—")),
      fact("Created", time(d.created_at)),
      fact("Finished", time(d.finished_at)),
      d.report ? fact("Engine", d.report.engine_version) : null,
    ),
  );
}

function fact(label, value) {
  return h("div", {}, h("dt", {}, label), h("dd", {}, value));
}

function actions(d, rerender) {
  const base = `/fits/${encodeURIComponent(d.fit_id)}`;
  const msg = h("div", { class: "form-status" });
  const act = async (what) => {
    msg.replaceChildren(`${what}…`);
    try {
      await api.post(`${base}/${what}`, {});
      rerender();
    } catch (e) {
      msg.replaceChildren(errorBox(e, `Could not ${what}`));
    }
  };
  const dl = (path, name, label) =>
    h("button", {
      type: "button",
      class: "small",
      "data-download": path,
      onclick: async () => {
        msg.replaceChildren(`Downloading ${label}…`);
        try {
          const got = await download(path, name);
          msg.replaceChildren(`Saved ${got.name} (${got.bytes} bytes).`);
        } catch (e) {
          msg.replaceChildren(errorBox(e, `Could not download ${label}`));
        }
      },
    }, label);
  const ok = d.status === "succeeded";
  return h(
    "section",
    { class: "card actions-card", id: "fit-actions" },
    h(
      "div",
      { class: "action-row" },
      h("span", { class: "label" }, "Download"),
      ok ? dl(`${base}/model.json`, `fit-${d.fit_id}-model.json`, "Model JSON") : null,
      ok ? dl(`${base}/netlist.cir`, `fit-${d.fit_id}.cir`, "SPICE subcircuit") : null,
      ok ? dl(`${base}/model.s1p`, `fit-${d.fit_id}-model.s1p`, "Model Touchstone") : null,
      d.sweep_id != null ? dl(`/sweeps/${encodeURIComponent(d.sweep_id)}/file`, d.file_name ?? `sweep-${d.sweep_id}`, "Original file") : null,
      ok ? dl(`${base}/report.pdf`, `report-fit-${d.fit_id}.pdf`, "Inspection report (PDF)") : null,
      ok ? h("span", { class: "muted" }, " printable: ", reportLinks(d.fit_id)) : null,
    ),
    h(
      "div",
      { class: "action-row" },
      auth.atLeast("inspector") && !FINAL.has(d.status) ? h("button", { type: "button", class: "small danger", "data-do": "cancel", onclick: () => act("cancel") }, "Cancel fit") : null,
      auth.atLeast("inspector") && (d.status === "failed" || d.status === "cancelled") ? h("button", { type: "button", class: "small", "data-do": "retry", onclick: () => act("retry") }, "Retry") : null,
      approvalControls(d, rerender),
      auth.atLeast("engineer") && d.status === "succeeded" ? refitControls(d, msg) : null,
    ),
    msg,
  );
}

// A refit is a new revision of the same sweep with other options; the old one stays as it was.
function refitControls(d, msg) {
  const family = h("select", { "aria-label": "model family" }, h("option", { value: "lumped" }, "lumped"), h("option", { value: "rational" }, "rational"));
  const sections = h("select", { "aria-label": "resonant sections" }, [0, 1, 2, 3].map((n) => h("option", { value: n, selected: n === 3 }, `≤ ${n} sections`)));
  return h(
    "form",
    {
      class: "inline-form refit",
      onsubmit: async (ev) => {
        ev.preventDefault();
        msg.replaceChildren("Starting a refit…");
        try {
          const res = await api.post(`/fits/${encodeURIComponent(d.fit_id)}/refit`, { options: { family: family.value, max_sections: Number(sections.value) } });
          navigate(fitHref(res.fit_id));
        } catch (e) {
          msg.replaceChildren(errorBox(e, "The refit was not started"));
        }
      },
    },
    h("span", { class: "label" }, "Refit as"),
    family,
    sections,
    h("button", { type: "submit", class: "small" }, "Refit"),
  );
}

// ---------------------------------------------------------------- plots

function plots(c, report, name) {
  const f = c.frequency_hz ?? [];
  const n = f.length;
  const hasModel = (c.model_z_real_ohm ?? []).length === n && n > 0;
  const mr = c.measured_z_real_ohm;
  const mi = c.measured_z_imag_ohm;
  const sig = c.sigma_ohm ?? [];
  const mag = f.map((_, i) => Math.hypot(mr[i], mi[i]));
  const ph = f.map((_, i) => Math.atan2(mi[i], mr[i]) * DEG);
  const fr = hasModel ? c.model_z_real_ohm : [];
  const fi = hasModel ? c.model_z_imag_ohm : [];
  const fmag = hasModel ? f.map((_, i) => Math.hypot(fr[i], fi[i])) : [];
  const fph = hasModel ? f.map((_, i) => Math.atan2(fi[i], fr[i]) * DEG) : [];
  const w = f.map((x) => 2 * Math.PI * x);

  const derived = report?.derived ?? {};
  const srf = derived.srf_hz ?? null;
  const markers = [];
  if (srf != null) markers.push({ x: srf, label: `SRF ${si(srf, "Hz", 3)}`, cls: "m-srf", kind: "srf" });
  for (const fs of derived.series_resonances_hz ?? []) markers.push({ x: fs, label: `series ${si(fs, "Hz", 3)}`, cls: "m-series", kind: "series" });
  for (const fp of (derived.parallel_resonances_hz ?? []).slice(1)) markers.push({ x: fp, label: `parallel ${si(fp, "Hz", 3)}`, cls: "m-parallel", kind: "parallel" });

  const xAxis = { log: true, unit: "Hz", label: "frequency" };
  const magBand = {
    key: "measured-band", label: "measured ±1σ", type: "band", cls: "band", x: f,
    y0: f.map((_, i) => mag[i] - (sig[i] ?? 0)), y1: f.map((_, i) => mag[i] + (sig[i] ?? 0)),
  };
  const phBand = {
    key: "measured-band", label: "measured ±1σ", type: "band", cls: "band", x: f,
    y0: f.map((_, i) => ph[i] - Math.asin(Math.min(1, (sig[i] ?? 0) / mag[i])) * DEG),
    y1: f.map((_, i) => ph[i] + Math.asin(Math.min(1, (sig[i] ?? 0) / mag[i])) * DEG),
  };
  const measured = (y, unit, fmt) => ({ key: "measured", label: "measured", type: "points", x: f, y, unit, fmt });
  const model = (y, unit) => ({ key: "model", label: "fitted model", type: "line", x: f, y, unit });

  const figs = [];
  figs.push(
    plot({
      id: "plot-mag",
      title: "Impedance magnitude |Z|",
      x: xAxis,
      y: { log: true, unit: "Ω", label: "|Z|" },
      series: [magBand, measured(mag, "Ω", (i) => `${si(mag[i], "Ω")} ± ${si(sig[i], "Ω", 2)}`), ...(hasModel ? [model(fmag, "Ω")] : [])],
      markers,
      height: 320,
    }),
    plot({
      id: "plot-phase",
      title: "Impedance phase",
      x: xAxis,
      y: { unit: "°", label: "phase", range: [-95, 95], step: 45 },
      series: [phBand, measured(ph, "°", (i) => `${ph[i].toFixed(2)}°`), ...(hasModel ? [{ ...model(fph, "°"), fmt: (i) => `${fph[i].toFixed(2)}°` }] : [])],
      markers,
      hlines: [{ y: 0, cls: "zero" }],
      height: 240,
    }),
  );
  if (hasModel) {
    const rre = f.map((_, i) => (mr[i] - fr[i]) / sig[i]);
    const rim = f.map((_, i) => (mi[i] - fi[i]) / sig[i]);
    const lim = Math.max(3, ...rre.concat(rim).filter(Number.isFinite).map(Math.abs)) * 1.08;
    figs.push(
      plot({
        id: "plot-residual",
        title: "Residuals in units of the stated uncertainty (measured − model) / σ",
        x: xAxis,
        y: { label: "residual / σ", range: [-lim, lim] },
        series: [
          { key: "residual-real", label: "real part", type: "points", cls: "res-re", x: f, y: rre, fmt: (i) => `${plain(rre[i], 3)} σ` },
          { key: "residual-imag", label: "imaginary part", type: "points", cls: "res-im", x: f, y: rim, fmt: (i) => `${plain(rim[i], 3)} σ` },
        ],
        hlines: [{ y: 0, cls: "zero" }, { y: 2, cls: "two-sigma" }, { y: -2, cls: "two-sigma" }],
        markers,
        height: 220,
        note: "Dashed lines at ±2σ. Residuals that wander together rather than scatter point at a model element that is missing.",
      }),
    );
  }

  // L_eff and Q only mean something below the SRF; the axes are scaled to that region and the rest clipped.
  const below = (i) => srf == null || f[i] <= 0.6 * srf;
  const leffM = f.map((_, i) => mi[i] / w[i]);
  const leffF = hasModel ? f.map((_, i) => fi[i] / w[i]) : [];
  const qM = f.map((_, i) => mi[i] / mr[i]);
  const qF = hasModel ? f.map((_, i) => fi[i] / fr[i]) : [];
  const scaleFrom = (primary, fallback) => {
    const src = primary.length ? primary : fallback;
    const vals = src.filter((v, i) => below(i) && Number.isFinite(v) && v > 0);
    return vals.length ? [0, Math.max(...vals) * 1.35] : null;
  };
  const lRange = scaleFrom(leffF, leffM);
  const qRange = scaleFrom(qF, qM);
  figs.push(
    h(
      "div",
      { class: "two-col plots-pair" },
      plot({
        id: "plot-leff",
        title: "Effective inductance L(f) = Im Z / ω",
        width: 520,
        height: 260,
        x: xAxis,
        y: { unit: "H", label: "L_eff", range: lRange ?? undefined, includeZero: true },
        series: [measured(leffM, "H"), ...(hasModel ? [model(leffF, "H")] : [])],
        markers,
      }),
      plot({
        id: "plot-q",
        title: "Quality factor Q(f) = Im Z / Re Z",
        width: 520,
        height: 260,
        x: xAxis,
        y: { unit: "", label: "Q", range: qRange ?? undefined, includeZero: true },
        series: [measured(qM, "", (i) => plain(qM[i], 4)), ...(hasModel ? [{ ...model(qF, ""), fmt: (i) => plain(qF[i], 4) }] : [])],
        markers,
      }),
    ),
  );
  const section = h(
    "section",
    { class: "card plots", id: "plots", "data-points": n, "data-model": hasModel ? "yes" : "no" },
    h("div", { class: "card-head" }, h("h2", {}, "Sweep and model"), h("span", { class: "plot-downloads" }, h("button", { type: "button", class: "small", "data-download": "csv", onclick: () => curvesCsv(c, `${name}-curves`) }, "Curves CSV"))),
    !hasModel ? h("p", { class: "muted" }, "No model curve: the fit has not succeeded.") : null,
    figs,
  );
  // SVG and PNG of every plot.
  for (const fig of section.querySelectorAll("figure.plot")) fig.prepend(h("div", { class: "plot-tools" }, plotDownloads(fig, `${name}-${fig.id}`)));
  return section;
}

// ---------------------------------------------------------------- tables

const LUMPED_PARAMS = [
  ["l0_h", "L0 (winding inductance)", "H"],
  ["rdc_ohm", "DC resistance", "Ω"],
  ["k_ac_ohm_per_sqrt_hz", "Skin-effect coefficient (R grows with √f)", "Ω/√Hz"],
  ["rp_ohm", "Core-loss parallel resistance", "Ω"],
  ["cp_f", "Interwinding capacitance", "F"],
  ["ls_h", "Lead inductance", "H"],
];

function identifiability(name, value, sigma, notIdentifiable) {
  if (notIdentifiable.includes(name)) return ["not identifiable", "bad"];
  if (sigma == null) return ["no uncertainty", "warn"];
  const rel = Math.abs(sigma / value);
  if (!Number.isFinite(rel)) return ["no uncertainty", "warn"];
  // Dashboard convention (no source): under 10 % relative 1σ reads as well determined, over 50 % as poor.
  if (rel < 0.1) return ["well determined", "good"];
  if (rel < 0.5) return ["loosely determined", "warn"];
  return ["poorly determined", "bad"];
}

function paramRow(name, label, value, sigma, unit, notId, absentText) {
  const [flag, cls] = value == null ? ["not in model", "none"] : identifiability(name, value, sigma, notId);
  return h(
    "tr",
    { "data-param": name, "data-identifiable": cls },
    h("th", {}, label, h("div", { class: "pname" }, name)),
    h("td", { class: "num" }, value == null ? absentText ?? "—" : si(value, unit)),
    h("td", { class: "num" }, sigma == null ? "—" : `± ${si(sigma, unit, 2)}`),
    h("td", { class: "num" }, sigma != null && value ? `${plain(Math.abs((100 * sigma) / value), 2)} %` : "—"),
    h("td", {}, h("span", { class: `flag f-${cls}` }, flag)),
  );
}

function parameterTable(r) {
  const m = r.model ?? {};
  const notId = r.not_identifiable ?? [];
  const rows = [];
  if (m.kind === "lumped") {
    const u = r.uncertainty ?? {};
    for (const [key, label, unit] of LUMPED_PARAMS) {
      const absent = key === "rp_ohm" ? "∞ (no core-loss resistor)" : undefined;
      rows.push(paramRow(key, label, m[key], u[key], unit, notId, absent));
    }
    (m.sections ?? []).forEach((sec, i) => {
      const su = u.sections?.[i] ?? {};
      const what = sec.kind === "series" ? "series branch" : "parallel tank";
      rows.push(paramRow(`sections[${i}].r_ohm`, `Section ${i + 1} (${what}) R`, sec.r_ohm, su.r_ohm, "Ω", notId));
      rows.push(paramRow(`sections[${i}].l_h`, `Section ${i + 1} (${what}) L`, sec.l_h, su.l_h, "H", notId));
      rows.push(paramRow(`sections[${i}].c_f`, `Section ${i + 1} (${what}) C`, sec.c_f, su.c_f, "F", notId));
    });
  } else if (m.kind === "rational") {
    rows.push(paramRow("d_ohm", "Constant term d", m.d_ohm, null, "Ω", notId));
    rows.push(paramRow("e_h", "Proportional term e", m.e_h, null, "H", notId));
    (m.real_poles ?? []).forEach((p, i) => rows.push(paramRow(`real_poles[${i}]`, `Real pole ${i + 1} at ${si(Math.abs(p.pole_rad_per_s) / (2 * Math.PI), "Hz", 3)}`, p.residue_ohm_rad_per_s, null, "Ω·rad/s", notId)));
    (m.complex_poles ?? []).forEach((p, i) => {
      const [re, im] = Array.isArray(p.pole_rad_per_s) ? p.pole_rad_per_s : [p.pole_rad_per_s?.re, p.pole_rad_per_s?.im];
      const fHz = Math.hypot(re, im) / (2 * Math.PI);
      rows.push(h("tr", { "data-param": `complex_poles[${i}]` }, h("th", {}, `Complex pole pair ${i + 1}`), h("td", { class: "num", colspan: 4 }, `${si(fHz, "Hz", 4)}, damping ${plain(-re / Math.hypot(re, im), 3)}`)));
    });
  }
  return h(
    "section",
    { class: "card", id: "parameters" },
    h("h2", {}, `Model parameters (${m.kind ?? "unknown"} model)`),
    h("table", { class: "params" }, h("thead", {}, h("tr", {}, ["Parameter", "Value", "1σ", "Relative", "Identifiability"].map((t) => h("th", {}, t)))), h("tbody", {}, rows)),
  );
}

function derivedTable(r) {
  const d = r.derived ?? {};
  const list = (xs) => (xs ?? []).length ? xs.map((x) => si(x, "Hz", 4)).join(", ") : "none in band";
  const rows = [
    ["Self-resonant frequency", d.srf_hz != null ? si(d.srf_hz, "Hz") : d.srf_above_hz != null ? `above ${si(d.srf_above_hz, "Hz")} (top of the sweep)` : "—"],
    ["Series resonances", list(d.series_resonances_hz)],
    ["Parallel resonances", list(d.parallel_resonances_hz)],
    ["Peak Q", d.q_peak != null ? `${plain(d.q_peak, 4)} at ${si(d.q_peak_hz, "Hz")}` : "—"],
    ["C from SRF and L0 alone", d.naive_cp_f != null ? `${si(d.naive_cp_f, "F")} (${d.naive_cp_error_percent != null ? `${plain(d.naive_cp_error_percent, 3)} % off the fitted value` : ""})` : "—"],
    ["Core roll-off corner", d.core_corner_hz != null ? si(d.core_corner_hz, "Hz") : "—"],
    ["Valid band", r.band_hz ? `${si(r.band_hz[0], "Hz")} – ${si(r.band_hz[1], "Hz")}` : "—"],
  ];
  const at = d.at_frequencies ?? [];
  return h(
    "section",
    { class: "card", id: "derived" },
    h("h2", {}, "Derived figures"),
    h("table", { class: "kv" }, h("tbody", {}, rows.map(([k, v]) => h("tr", {}, h("th", {}, k), h("td", {}, v))))),
    at.length
      ? h("table", { class: "small-table" }, h("thead", {}, h("tr", {}, ["at", "L_eff", "Q", "|Z|"].map((t) => h("th", {}, t)))), h("tbody", {}, at.map((p) => h("tr", {}, h("td", {}, si(p.frequency_hz, "Hz")), h("td", { class: "num" }, si(p.l_eff_h, "H")), h("td", { class: "num" }, plain(p.q, 4)), h("td", { class: "num" }, si(p.z_mag_ohm, "Ω"))))))
      : null,
  );
}

const CHECK_LABELS = {
  inductance: "Inductance within tolerance",
  dcr_max: "DC resistance at most",
  srf_min: "SRF at least",
  q_min: "Q at least",
  z_min_band: "|Z| at least over the band",
};

function limitLabel(name) {
  const found = LIMIT_FIELDS.find(([k]) => k === name);
  return CHECK_LABELS[name] ?? (found ? found[1] : String(name).replaceAll("_", " "));
}

const checkUnit = (u) => (u === "1" ? "" : u);

function verdictTable(d) {
  const checks = d.verdict_checks ?? [];
  return h(
    "section",
    { class: "card", id: "verdict" },
    h("h2", {}, "Verdict ", badge(d.verdict)),
    d.verdict_note ? h("p", { class: "withheld", "data-verdict-note": "" }, d.verdict_note) : null,
    checks.length
      ? h(
          "table",
          { class: "checks" },
          h("thead", {}, h("tr", {}, ["Limit", "Measured", "Limit value", "Margin", "Result"].map((t) => h("th", {}, t)))),
          h("tbody", {}, checks.map((c) => h("tr", { "data-check": c.limit, class: c.pass ? "pass" : "fail" }, h("th", {}, limitLabel(c.limit), c.note ? h("div", { class: "pname" }, c.note) : null), h("td", { class: "num" }, si(c.measured, checkUnit(c.unit))), h("td", { class: "num" }, si(c.limit_value, checkUnit(c.unit))), h("td", { class: "num" }, c.margin == null ? "—" : si(c.margin, checkUnit(c.unit))), h("td", {}, badge(c.pass ? "pass" : "fail"))))),
        )
      : h("p", { class: "muted" }, d.status === "succeeded" ? "The part has no limits set, so there is nothing to check." : "No verdict: the fit did not succeed."),
  );
}

// Names people read, for the parameters the drift compares.
const PARAM_LABELS = {
  l0_h: "L0",
  rdc_ohm: "DC resistance",
  k_ac_ohm_per_sqrt_hz: "Skin-effect coefficient",
  rp_ohm: "Core-loss resistance",
  cp_f: "Winding capacitance",
  ls_h: "Lead inductance",
  core_corner_hz: "Core corner frequency",
  core_alpha: "Core broadening α",
  core_beta: "Core asymmetry β",
  core_damping: "Core damping ζ",
  core_air_fraction: "Non-dispersive share of L0",
  core_resonance_hz: "Core resonance",
  core_resonance_share: "Resonant share of the core",
};
export const paramLabel = (name) => PARAM_LABELS[name] ?? String(name).replace(/^sections\[(\d+)\]\.(\w+)$/, (_, i, f) => `Section ${Number(i) + 1} ${f.split("_")[0].toUpperCase()}`);

// How a change in percent compares with what the part allows: L0 against the part's inductance
// tolerance; every other parameter against 10 % (common practice, no source), amber from half of it.
function driftClass(name, percent, tolerance) {
  if (percent == null) return "";
  const limit = name === "l0_h" && tolerance != null ? tolerance : 10;
  const a = Math.abs(percent);
  return a > limit ? "drift-high" : a > limit / 2 ? "drift-mid" : "";
}

function driftTable(d, tolerance) {
  const dr = d.drift;
  return h(
    "section",
    { class: "card", id: "drift" },
    h("h2", {}, "Drift against the baseline"),
    !dr
      ? h("p", { class: "muted" }, "No approved baseline to compare with (or this is the baseline).")
      : [
          h("p", {}, "Baseline: ", link(fitHref(dr.baseline_fit_id), `fit #${dr.baseline_fit_id}`)),
          h(
            "table",
            { class: "drift" },
            h("thead", {}, h("tr", {}, ["Parameter", "Baseline", "This fit", "Change", "In σ"].map((t) => h("th", {}, t)))),
            h("tbody", {}, (dr.parameters ?? []).map((p) => {
              const unit = unitFromName(p.name);
              return h("tr", { "data-drift": p.name, class: driftClass(p.name, p.percent, tolerance) }, h("th", { title: p.name }, paramLabel(p.name)), h("td", { class: "num" }, si(p.baseline, unit)), h("td", { class: "num" }, si(p.current, unit)), h("td", { class: "num strong" }, p.percent == null ? "—" : `${p.percent > 0 ? "+" : ""}${plain(p.percent, 3)} %`), h("td", { class: "num muted" }, p.sigma == null ? "—" : `${plain(p.sigma, 3)} σ`));
            })),
          ),
          h("p", { class: "muted small" }, tolerance != null ? `Colour: L0 against the part's ±${plain(tolerance, 3)} % tolerance, other parameters against ±10 %; amber from half of it. σ says how sure the change is, not how much it matters.` : "Colour: each change against ±10 % (the part has no inductance tolerance set); amber from half of it. σ says how sure the change is, not how much it matters."),
        ],
  );
}

function qualityCard(r) {
  const q = r.quality ?? {};
  return h(
    "section",
    { class: "card", id: "quality" },
    h("h2", {}, "Fit quality and model selection"),
    assessmentBlock(r),
    h(
      "table",
      { class: "kv" },
      h("tbody", {},
        h("tr", {}, h("th", {}, "Weighted RMS residual"), h("td", {}, `${plain(q.rms_weighted, 4)} (1 when the residuals match the stated uncertainty)`)),
        h("tr", {}, h("th", {}, "Largest relative error"), h("td", {}, q.max_relative_error != null ? `${plain(q.max_relative_error * 100, 3)} % at ${si(q.max_relative_error_at_hz, "Hz")}` : "—")),
        h("tr", {}, h("th", {}, "Points / parameters"), h("td", {}, `${q.points ?? "—"} / ${q.parameters ?? "—"}`)),
        h("tr", {}, h("th", {}, "Solver stopped"), h("td", {}, `${String(r.termination ?? "—").replaceAll("_", " ")} after ${r.iterations ?? "—"} iterations`)),
      ),
    ),
    (r.candidates ?? []).length
      ? h("table", { class: "small-table", id: "candidates" }, h("thead", {}, h("tr", {}, ["Candidate", "Parameters", "Cost", "BIC", ""].map((t) => h("th", {}, t)))), h("tbody", {}, r.candidates.map((c) => h("tr", { class: c.chosen ? "chosen" : "" }, h("td", {}, h("code", {}, c.label)), h("td", { class: "num" }, c.parameters), h("td", { class: "num" }, plain(c.cost, 4)), h("td", { class: "num" }, plain(c.bic, 5)), h("td", {}, c.chosen ? "chosen" : "")))))
      : null,
  );
}

// Does the model describe the data within their uncertainty? The engine's own assessment, with what
// misses, where and by how much; then what the readers or the fit changed that the user should know.
function assessmentBlock(r) {
  const a = r.assessment ?? {};
  const findings = a.findings ?? [];
  const warnings = r.warnings ?? [];
  return h(
    "div",
    { class: `assessment q-${a.status ?? "ok"}`, "data-assessment": a.status ?? "ok" },
    h("p", {}, badge(a.status === "poor" ? "poor model" : "model ok", `q-${a.status ?? "ok"}`), " ", a.summary ?? ""),
    findings.length ? h("ul", { class: "findings" }, findings.map((f) => h("li", { "data-finding": f.kind }, f.message))) : null,
    warnings.length ? h("div", {}, h("h3", {}, "Notes on the data"), h("ul", { class: "warnings" }, warnings.map((w) => h("li", {}, w)))) : null,
  );
}
