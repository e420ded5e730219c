// Upload: pick or create a part, drop a sweep file, choose the method, then watch the fit.

import { api, auth, poll, query } from "./api.js";
import { h, link, badge, errorBox, safetyNote } from "./dom.js";
import { parseSI } from "./si.js";
import { fitHref, partHref, progressBar } from "./common.js";

const METHODS = [
  ["", "From the file (1-port S data: reflection; 2-port files need a method)"],
  ["direct", "Impedance analyser (Z or R+jX directly)"],
  ["reflection", "Network analyser, reflection (S11)"],
  ["series-thru", "Network analyser, series-thru (S21, part in series)"],
  ["shunt-thru", "Network analyser, shunt-thru (S21, part to ground)"],
];

// A plain count (turns, a permeability), SI prefixes allowed: "12", "1.2k".
function readNumber(text, what) {
  try {
    return parseSI(text, "");
  } catch {
    throw new Error(`${what}: cannot read “${text}” as a number`);
  }
}

// A length in metres. A trailing "m" after a prefix or a space is the unit ("9.5 mm", "2 m"); one
// right after the digits is the milli prefix, as on the command line ("9.5m" is 9.5 mm).
function readLength(text, what) {
  let s = String(text ?? "").trim();
  if (/(\s|[TGMkKmuµμnpf])m$/.test(s)) s = s.slice(0, -1).trim();
  try {
    return parseSI(s, "");
  } catch {
    throw new Error(`${what}: cannot read “${text}” as a length in metres (try 9.5 mm or 0.0095)`);
  }
}

// An area in m²: "12.3 mm²" (or mm2), "1.2 cm²", "12.3e-6", or a prefix on m² itself ("12.3µ").
function readArea(text, what) {
  const s = String(text ?? "").trim();
  const scaled = /^(.*?)\s*(mm|cm|m)(²|2|\^2)$/.exec(s);
  try {
    if (scaled) {
      const v = parseSI(scaled[1], "");
      if (v == null) throw new Error("empty");
      return v * { mm: 1e-6, cm: 1e-4, m: 1 }[scaled[2]];
    }
    return parseSI(s, "");
  } catch {
    throw new Error(`${what}: cannot read “${text}” as an area in m² (try 12.3 mm² or 12.3e-6)`);
  }
}

export function renderUpload(main, _params, search) {
  main.append(h("div", { class: "page-head" }, h("h1", {}, "Upload a sweep")), safetyNote({ analyserPorts: true }));
  if (!auth.atLeast("inspector")) {
    main.append(h("section", { class: "card", id: "upload-refused" }, h("p", {}, `Signed in as ${auth.role() ?? "reader"}: uploading sweeps needs the inspector role or higher.`)));
    return;
  }
  const stops = [];

  // --- the part
  const partInput = h("input", { type: "text", id: "up-part", name: "part_number", required: true, list: "part-options", autocomplete: "off", value: search.get("part") ?? "", placeholder: "start typing a part number" });
  const options = h("datalist", { id: "part-options" });
  const partHint = h("div", { class: "hint" });
  let lookTimer = null;
  partInput.addEventListener("input", () => {
    clearTimeout(lookTimer);
    lookTimer = setTimeout(async () => {
      const q = partInput.value.trim();
      try {
        const res = await api.get(`/parts${query({ q, limit: 10 })}`);
        options.replaceChildren(...res.items.map((p) => h("option", { value: p.part_number }, p.description ?? "")));
        const exact = res.items.find((p) => p.part_number === q);
        partHint.replaceChildren(exact ? h("span", {}, "Existing part: ", link(partHref(q), q), ` — ${exact.description ?? ""}`) : q ? "No part with exactly this number yet." : "");
      } catch {
        /* the hint is a convenience; the upload itself reports a missing part */
      }
    }, 250);
  });
  stops.push(() => clearTimeout(lookTimer));

  const createBox = h("div", { id: "create-part" });
  if (auth.atLeast("engineer")) {
    const pn = h("input", { type: "text", id: "new-pn", required: true, placeholder: "part number" });
    const desc = h("input", { type: "text", id: "new-desc", placeholder: "description" });
    const lnom = h("input", { type: "text", id: "new-lnom", placeholder: "e.g. 10 µH" });
    const msg = h("div", { class: "form-status" });
    const form = h(
      "form",
      {
        class: "inline-form wrap",
        hidden: true,
        onsubmit: async (ev) => {
          ev.preventDefault();
          let l;
          try {
            l = parseSI(lnom.value, "H");
          } catch (e) {
            msg.replaceChildren(h("div", { class: "error", role: "alert" }, `Nominal inductance: ${e.message}`));
            return;
          }
          try {
            const part = await api.post("/parts", { part_number: pn.value.trim(), description: desc.value.trim(), limits: l == null ? {} : { l_nominal_h: l } });
            partInput.value = part.part_number;
            msg.replaceChildren(`Created ${part.part_number}. Set its limits on `, link(partHref(part.part_number), "the part page"), ".");
            form.hidden = true;
          } catch (e) {
            msg.replaceChildren(errorBox(e, "The part was not created"));
          }
        },
      },
      pn, desc, lnom,
      h("button", { type: "submit", class: "small primary" }, "Create part"),
    );
    createBox.append(h("button", { type: "button", class: "link", onclick: () => { form.hidden = !form.hidden; } }, "or create a new part…"), form, msg);
  }

  // --- the file
  const file = h("input", { type: "file", id: "up-file", name: "file", required: true, accept: ".s1p,.s2p,.snp,.ts,.csv,.txt" });
  const fileName = h("span", { class: "file-name" }, "no file chosen");
  const drop = h("label", { class: "drop", for: "up-file", id: "drop-zone" }, h("strong", {}, "Drop a Touchstone (.s1p/.s2p) or CSV sweep here"), h("span", {}, " or click to choose one"), fileName, file);
  const showName = () => { fileName.textContent = file.files[0] ? `${file.files[0].name} (${file.files[0].size} bytes)` : "no file chosen"; };
  file.addEventListener("change", showName);
  for (const ev of ["dragenter", "dragover"]) drop.addEventListener(ev, (e) => { e.preventDefault(); drop.classList.add("over"); });
  for (const ev of ["dragleave", "drop"]) drop.addEventListener(ev, () => drop.classList.remove("over"));
  drop.addEventListener("drop", (e) => {
    e.preventDefault();
    if (e.dataTransfer?.files?.length) {
      file.files = e.dataTransfer.files;
      showName();
    }
  });

  // --- the measurement
  const field = (id, attrs) => h("input", { type: "text", id, name: id.replace(/^up-/, ""), autocomplete: "off", ...attrs });
  const lot = field("up-lot", { required: true, placeholder: "e.g. L2026-118" });
  const method = h("select", { id: "up-method", name: "method" }, METHODS.map(([v, t]) => h("option", { value: v }, t)));
  const z0 = field("up-z0", { value: "50", placeholder: "50" });
  const dcr = field("up-dcr", { placeholder: "optional four-wire reading, e.g. 12.5 m" });
  const temp = field("up-temp", { placeholder: "e.g. 23" });
  const operator = field("up-operator", { placeholder: "who measured" });
  const fixOpen = h("input", { type: "file", id: "up-fixture-open", accept: ".s1p,.s2p,.snp,.ts,.csv,.txt" });
  const fixShort = h("input", { type: "file", id: "up-fixture-short", accept: ".s1p,.s2p,.snp,.ts,.csv,.txt" });
  const fixTopology = h(
    "select",
    { id: "up-fixture-topology" },
    h("option", { value: "approximate" }, "open/short, the usual form"),
    h("option", { value: "series-then-shunt" }, "L-shaped fixture, series part on the instrument side (exact)"),
    h("option", { value: "shunt-then-series" }, "L-shaped fixture, shunt part on the instrument side (exact)"),
    h("option", { value: "two-port" }, "two-port de-embedding (three 2-port files)"),
  );
  const family = h("select", { id: "up-family" }, h("option", { value: "lumped" }, "lumped circuit (L0, DCR, skin, core loss, C, leads, resonant sections)"), h("option", { value: "rational" }, "rational (vector fitting, wideband)"));
  const sections = h("select", { id: "up-sections" }, [0, 1, 2, 3].map((n) => h("option", { value: n, selected: n === 3 }, `up to ${n} extra resonant section${n === 1 ? "" : "s"}`)));

  // --- the construction (optional): turns and core for the core material's permeability spectrum
  const turns = field("up-turns", { placeholder: "e.g. 12" });
  const coreShape = h(
    "select",
    { id: "up-core-shape" },
    h("option", { value: "toroid" }, "toroid: outer and inner diameter, height"),
    h("option", { value: "effective" }, "any core: effective area and path length (data sheet Ae, le)"),
  );
  const od = field("up-toroid-od", { placeholder: "e.g. 9.5 mm" });
  const innerD = field("up-toroid-id", { placeholder: "e.g. 4.75 mm" });
  const height = field("up-toroid-height", { placeholder: "e.g. 3.2 mm" });
  const area = field("up-core-area", { placeholder: "e.g. 12.3 mm²" });
  const path = field("up-core-path", { placeholder: "e.g. 22.7 mm" });
  const gap = field("up-gap", { placeholder: "optional, e.g. 0.2 mm" });
  const muNominal = field("up-mu-initial", { placeholder: "optional, data sheet μi, e.g. 800" });
  const toroidBox = h("div", { class: "filter-grid", id: "up-toroid" },
    h("label", {}, h("span", {}, "Outer diameter (m)"), od),
    h("label", {}, h("span", {}, "Inner diameter (m)"), innerD),
    h("label", {}, h("span", {}, "Height (m)"), height),
  );
  const effectiveBox = h("div", { class: "filter-grid", id: "up-effective", hidden: true },
    h("label", {}, h("span", {}, "Effective area (m²)"), area),
    h("label", {}, h("span", {}, "Path length (m)"), path),
  );
  coreShape.addEventListener("change", () => {
    toroidBox.hidden = coreShape.value !== "toroid";
    effectiveBox.hidden = coreShape.value !== "effective";
  });

  const result = h("section", { class: "card", id: "upload-result", hidden: true });
  const submit = h("button", { type: "submit", class: "primary", id: "up-submit" }, "Upload and fit");

  const form = h(
    "form",
    {
      class: "card upload-form",
      id: "upload-form",
      onsubmit: async (ev) => {
        ev.preventDefault();
        result.hidden = false;
        const fd = new FormData();
        try {
          if (!file.files[0]) throw new Error("choose a sweep file first");
          const z0v = parseSI(z0.value, "Ω");
          const dcrv = parseSI(dcr.value, "Ω");
          const t = temp.value.trim() === "" ? null : Number(temp.value);
          if (t !== null && !Number.isFinite(t)) throw new Error(`temperature: “${temp.value}” is not a number of °C`);
          fd.append("part_number", partInput.value.trim());
          fd.append("lot", lot.value.trim());
          if (method.value) fd.append("method", method.value);
          if (z0v != null) fd.append("z0_ohm", String(z0v));
          if (dcrv != null) fd.append("dcr_ohm", String(dcrv));
          if (t != null) fd.append("temperature_c", String(t));
          if (operator.value.trim()) fd.append("operator", operator.value.trim());
          const fitOptions = { family: family.value, max_sections: Number(sections.value) };
          const c = construction();
          if (c) fitOptions.construction = c;
          fd.append("options", JSON.stringify(fitOptions));
          fd.append("file", file.files[0], file.files[0].name);
          if (fixOpen.files[0] || fixShort.files[0]) {
            if (!(fixOpen.files[0] && fixShort.files[0])) throw new Error("fixture compensation needs both the open and the short sweep");
            fd.append("fixture_open", fixOpen.files[0], fixOpen.files[0].name);
            fd.append("fixture_short", fixShort.files[0], fixShort.files[0].name);
            fd.append("fixture_topology", fixTopology.value);
          }
        } catch (e) {
          result.replaceChildren(h("div", { class: "error", role: "alert" }, e.message));
          return;
        }
        submit.disabled = true;
        result.replaceChildren(h("p", {}, "Uploading…"));
        try {
          const res = await api.upload("/sweeps", fd);
          watch(res);
        } catch (e) {
          result.replaceChildren(h("h2", {}, "The upload was refused"), errorBox(e, "The service refused the file"), h("p", { class: "muted" }, "Nothing was stored. Correct the file or the fields and upload again."));
        } finally {
          submit.disabled = false;
        }
      },
    },
    h("fieldset", {}, h("legend", {}, "1 · Part"), h("label", { for: "up-part" }, "Part number"), partInput, options, partHint, createBox),
    h("fieldset", {}, h("legend", {}, "2 · Sweep file"), drop),
    h(
      "fieldset",
      {},
      h("legend", {}, "3 · How it was measured"),
      h("div", { class: "filter-grid" },
        h("label", {}, h("span", {}, "Lot"), lot),
        h("label", { class: "wide" }, h("span", {}, "Method"), method),
        h("label", {}, h("span", {}, "Reference impedance (Ω)"), z0),
        h("label", {}, h("span", {}, "DC resistance (Ω)"), dcr),
        h("label", {}, h("span", {}, "Temperature (°C)"), temp),
        h("label", {}, h("span", {}, "Operator"), operator),
      ),
    ),
    h(
      "fieldset",
      {},
      h("legend", {}, "Fixture compensation (optional)"),
      h("p", { class: "hint" }, "The open and short dummies measured in the same fixture on the same frequency points as the part."),
      h("div", { class: "filter-grid" },
        h("label", {}, h("span", {}, "Open sweep"), fixOpen),
        h("label", {}, h("span", {}, "Short sweep"), fixShort),
        h("label", { class: "wide" }, h("span", {}, "Fixture"), fixTopology),
      ),
    ),
    h("fieldset", {}, h("legend", {}, "4 · Model"), h("div", { class: "filter-grid" }, h("label", { class: "wide" }, h("span", {}, "Family"), family), h("label", { class: "wide" }, h("span", {}, "Resonant sections"), sections))),
    h(
      "fieldset",
      { id: "up-construction" },
      h("legend", {}, "Construction (optional)"),
      h("p", { class: "hint" }, "Turns and core give the core material's permeability μ′(f), μ″(f) and its initial permeability on the fit page (lumped fits). Lengths in metres with SI prefixes: 9.5 mm, 9.5m (milli) or 0.0095; areas as 12.3 mm², 12.3e-6 or 12.3µ (m²). Leave turns empty to skip."),
      h("div", { class: "filter-grid" },
        h("label", {}, h("span", {}, "Turns"), turns),
        h("label", { class: "wide" }, h("span", {}, "Core"), coreShape),
      ),
      toroidBox,
      effectiveBox,
      h("div", { class: "filter-grid" },
        h("label", {}, h("span", {}, "Air gap (m)"), gap),
        h("label", {}, h("span", {}, "Initial permeability"), muNominal),
      ),
    ),
    h("div", { class: "actions" }, submit),
  );
  main.append(form, result);

  // The construction as the API's options take it (`FitOptionsBody.construction`), or null when the
  // turns are left empty; throws, naming the field, for what cannot be read.
  function construction() {
    const n = readNumber(turns.value, "Turns");
    const filled = [od, innerD, height, area, path, gap, muNominal].filter((f) => f.value.trim() !== "");
    if (n == null) {
      if (filled.length) throw new Error("construction: give the number of turns, or clear the core fields");
      return null;
    }
    const need = (input, what, read) => {
      const v = read(input.value, what);
      if (v == null) throw new Error(`construction: ${what} is needed with the turns`);
      return v;
    };
    const core =
      coreShape.value === "toroid"
        ? { toroid: { outer_diameter_m: need(od, "outer diameter", readLength), inner_diameter_m: need(innerD, "inner diameter", readLength), height_m: need(height, "height", readLength) } }
        : { effective: { area_m2: need(area, "effective area", readArea), path_m: need(path, "path length", readLength) } };
    const c = { turns: n, core };
    const g = readLength(gap.value, "air gap");
    if (g != null) c.gap_m = g;
    const mu = readNumber(muNominal.value, "initial permeability");
    if (mu != null) c.nominal_initial_permeability = mu;
    return c;
  }

  function watch(res) {
    const head = h("h2", {}, "Fit ", link(fitHref(res.fit_id), `#${res.fit_id}`));
    const body = h("div", { id: "upload-status" }, "Queued…");
    result.replaceChildren(head, res.duplicate ? h("p", { class: "note-box" }, "This exact file was uploaded before; showing the fit it already has.") : null, body);
    const stop = poll(async () => {
      let fit;
      try {
        fit = await api.get(`/fits/${encodeURIComponent(res.fit_id)}`);
      } catch (e) {
        body.replaceChildren(errorBox(e, "The fit's status could not be read"));
        throw e;
      }
      if (fit.status === "succeeded") {
        stop();
        body.replaceChildren(h("p", { "data-outcome": "succeeded" }, badge("succeeded"), " ", badge(fit.verdict), " ", link(fitHref(fit.fit_id), "Open the fit and its plots →")));
      } else if (fit.status === "failed" || fit.status === "cancelled") {
        stop();
        body.replaceChildren(h("div", { class: "error", role: "alert", "data-outcome": fit.status }, h("strong", {}, `The fit ${fit.status}: `), fit.error ?? "no reason given"), link(fitHref(fit.fit_id), "Open the fit"));
      } else {
        body.replaceChildren(h("p", {}, badge(fit.status), " ", progressBar(fit), ` ${Math.round((fit.progress ?? 0) * 100)} %`));
      }
    }, 1000);
    stops.push(stop);
  }
  return () => stops.forEach((s) => s());
}
