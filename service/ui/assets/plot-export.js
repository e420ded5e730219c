// Downloads of what the dashboard draws: a plot as SVG (styles inlined, so it reads the same outside
// the page) or PNG (the SVG rasterised on a canvas), and curves as CSV. Nothing leaves the browser.

import { h } from "./dom.js";

const STYLE_PROPS = ["stroke", "stroke-width", "stroke-dasharray", "stroke-linecap", "stroke-linejoin", "fill", "opacity", "font-size", "font-family", "font-weight"];

function saveBlob(blob, name) {
  const url = URL.createObjectURL(blob);
  const a = document.createElement("a");
  a.href = url;
  a.download = name;
  document.body.append(a);
  a.click();
  a.remove();
  setTimeout(() => URL.revokeObjectURL(url), 10000);
}

// A copy of the plot's SVG with every element's computed style written into it; the hover parts are
// left out.
export function standaloneSvg(svg) {
  const copy = svg.cloneNode(true);
  const from = [svg, ...svg.querySelectorAll("*")];
  const to = [copy, ...copy.querySelectorAll("*")];
  // Presentation attributes, not style attributes: the dashboard's content security policy forbids
  // inline styles, and attributes mean the same to any SVG reader.
  from.forEach((el, i) => {
    const cs = getComputedStyle(el);
    for (const p of STYLE_PROPS) {
      const v = cs.getPropertyValue(p);
      if (v) to[i].setAttribute(p, v);
    }
  });
  copy.querySelectorAll(".overlay, .crosshair, .hover-dots").forEach((el) => el.remove());
  const [, , w, hgt] = (svg.getAttribute("viewBox") || "0 0 760 300").split(/\s+/).map(Number);
  copy.setAttribute("xmlns", "http://www.w3.org/2000/svg");
  copy.setAttribute("width", w);
  copy.setAttribute("height", hgt);
  const bg = document.createElementNS("http://www.w3.org/2000/svg", "rect");
  bg.setAttribute("width", "100%");
  bg.setAttribute("height", "100%");
  bg.setAttribute("fill", "#ffffff");
  copy.insertBefore(bg, copy.firstChild);
  return { text: new XMLSerializer().serializeToString(copy), width: w, height: hgt };
}

export function downloadSvg(svg, name) {
  const { text } = standaloneSvg(svg);
  saveBlob(new Blob([text], { type: "image/svg+xml" }), `${name}.svg`);
}

export async function downloadPng(svg, name, scale = 2) {
  const { text, width, height } = standaloneSvg(svg);
  const img = new Image();
  const url = URL.createObjectURL(new Blob([text], { type: "image/svg+xml" }));
  try {
    await new Promise((ok, fail) => {
      img.onload = ok;
      img.onerror = () => fail(new Error("the plot could not be rasterised"));
      img.src = url;
    });
    const canvas = document.createElement("canvas");
    canvas.width = width * scale;
    canvas.height = height * scale;
    const ctx = canvas.getContext("2d");
    ctx.scale(scale, scale);
    ctx.drawImage(img, 0, 0, width, height);
    const blob = await new Promise((ok) => canvas.toBlob(ok, "image/png"));
    saveBlob(blob, `${name}.png`);
  } finally {
    URL.revokeObjectURL(url);
  }
}

// rows: array of arrays; head: column names (SI units in them).
export function downloadCsv(head, rows, name) {
  const cell = (v) => (v === null || v === undefined ? "" : typeof v === "number" ? String(v) : `"${String(v).replace(/"/g, '""')}"`);
  const text = [head.join(","), ...rows.map((r) => r.map(cell).join(","))].join("\n") + "\n";
  saveBlob(new Blob([text], { type: "text/csv" }), `${name}.csv`);
}

// SVG and PNG buttons for a plot figure (the element `plot()` returns).
export function plotDownloads(figure, name) {
  const svg = () => figure.querySelector("svg");
  return h(
    "span",
    { class: "plot-downloads" },
    h("button", { type: "button", class: "small", "data-download": "svg", onclick: () => downloadSvg(svg(), name) }, "SVG"),
    h("button", { type: "button", class: "small", "data-download": "png", onclick: () => downloadPng(svg(), name) }, "PNG"),
  );
}

// The curves of one fit (GET /fits/{id}/curves) as CSV rows.
export function curvesCsv(c, name) {
  const head = ["frequency_hz", "measured_z_real_ohm", "measured_z_imag_ohm", "sigma_ohm", "model_z_real_ohm", "model_z_imag_ohm"];
  const rows = c.frequency_hz.map((f, i) => [f, c.measured_z_real_ohm[i], c.measured_z_imag_ohm[i], c.sigma_ohm[i], c.model_z_real_ohm?.[i] ?? null, c.model_z_imag_ohm?.[i] ?? null]);
  downloadCsv(head, rows, name);
}
