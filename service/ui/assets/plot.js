// Small SVG plotter: log or linear axes with SI-prefixed ticks, grid, legend, uncertainty bands,
// vertical markers and a hover read-out. Every series is one <path> carrying data-series and
// data-points, so a test can see what was drawn.

import { h, s } from "./dom.js";
import { si, tick } from "./si.js";

const M = { left: 70, right: 18, top: 22, bottom: 42 };
let plotCount = 0;

function finiteRange(values, positiveOnly) {
  let lo = Infinity;
  let hi = -Infinity;
  for (const v of values) {
    if (!Number.isFinite(v) || (positiveOnly && v <= 0)) continue;
    if (v < lo) lo = v;
    if (v > hi) hi = v;
  }
  return lo <= hi ? [lo, hi] : null;
}

function niceStep(span, count) {
  const raw = span / count;
  const mag = 10 ** Math.floor(Math.log10(raw));
  for (const m of [1, 2, 2.5, 5, 10]) if (m * mag >= raw) return m * mag;
  return 10 * mag;
}

// Axis: maps values to pixels, produces major ticks (labelled) and minor grid lines.
function makeAxis(cfg, values, pixels) {
  const log = !!cfg.log;
  let dom = cfg.range ?? finiteRange(values, log) ?? (log ? [1, 10] : [0, 1]);
  let [lo, hi] = dom;
  if (log) {
    if (lo === hi) [lo, hi] = [lo / 2, hi * 2];
    if (!cfg.range && cfg.pad !== false) {
      const pad = (Math.log10(hi) - Math.log10(lo)) * 0.04;
      lo = 10 ** (Math.log10(lo) - pad);
      hi = 10 ** (Math.log10(hi) + pad);
    }
  } else {
    if (lo === hi) [lo, hi] = [lo - Math.abs(lo || 1) * 0.5, hi + Math.abs(hi || 1) * 0.5];
    if (!cfg.range && cfg.pad !== false) {
      const pad = (hi - lo) * 0.05;
      lo -= pad;
      hi += pad;
    }
    if (cfg.includeZero) {
      lo = Math.min(lo, 0);
      hi = Math.max(hi, 0);
    }
  }
  const [p0, p1] = pixels;
  const toPx = log
    ? (v) => (v > 0 ? p0 + ((Math.log10(v) - Math.log10(lo)) / (Math.log10(hi) - Math.log10(lo))) * (p1 - p0) : NaN)
    : (v) => (Number.isFinite(v) ? p0 + ((v - lo) / (hi - lo)) * (p1 - p0) : NaN);
  const fromPx = log
    ? (px) => 10 ** (Math.log10(lo) + ((px - p0) / (p1 - p0)) * (Math.log10(hi) - Math.log10(lo)))
    : (px) => lo + ((px - p0) / (p1 - p0)) * (hi - lo);
  const major = [];
  const minor = [];
  if (log) {
    const d0 = Math.floor(Math.log10(lo));
    const d1 = Math.ceil(Math.log10(hi));
    const decades = Math.log10(hi) - Math.log10(lo);
    const labelled = decades <= 1.2 ? [1, 2, 3, 5] : decades <= 2.5 ? [1, 2, 5] : [1];
    const step = decades > 8 ? 2 : 1;
    for (let d = d0; d <= d1; d++) {
      for (let m = 1; m <= 9; m++) {
        const v = m * 10 ** d;
        if (v < lo * 0.9999 || v > hi * 1.0001) continue;
        if (labelled.includes(m) && (m !== 1 || d % step === 0)) major.push(v);
        else if (decades <= 6) minor.push(v);
      }
    }
    if (major.length < 2) {
      major.length = 0;
      major.push(lo, hi);
    }
  } else {
    const step = cfg.step ?? niceStep(hi - lo, cfg.ticks ?? 6);
    for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) {
      major.push(Math.abs(v) < step * 1e-9 ? 0 : v);
    }
  }
  return { log, lo, hi, toPx, fromPx, major, minor, unit: cfg.unit ?? "", label: cfg.label ?? "", fmt: cfg.fmt };
}

function tickLabel(v, unit) {
  const t = tick(v, unit);
  if (!unit) return t;
  if (unit === "°") return `${t}°`;
  if (unit === "%") return `${t} %`;
  // "100k" + "Hz" -> "100 kHz"
  const m = /^(−?[\d.e+−]+)(\D*)$/.exec(t);
  return m ? `${m[1]} ${m[2]}${unit}` : `${t} ${unit}`;
}

// Path through finite points; a non-finite point breaks the line.
function linePath(xs, ys, xa, ya) {
  let d = "";
  let pen = false;
  let n = 0;
  for (let i = 0; i < xs.length; i++) {
    const px = xa.toPx(xs[i]);
    const py = ya.toPx(ys[i]);
    if (!Number.isFinite(px) || !Number.isFinite(py)) {
      pen = false;
      continue;
    }
    d += `${pen ? "L" : "M"}${px.toFixed(1)} ${py.toFixed(1)}`;
    pen = true;
    n++;
  }
  return { d, n };
}

// Each point is a zero-length segment drawn with a round cap: one path for thousands of dots.
function pointsPath(xs, ys, xa, ya) {
  let d = "";
  let n = 0;
  for (let i = 0; i < xs.length; i++) {
    const px = xa.toPx(xs[i]);
    const py = ya.toPx(ys[i]);
    if (!Number.isFinite(px) || !Number.isFinite(py)) continue;
    d += `M${px.toFixed(1)} ${py.toFixed(1)}h0`;
    n++;
  }
  return { d, n };
}

// Closed polygons between y0 and y1, split where either bound is missing.
function bandPath(xs, y0, y1, xa, ya) {
  let d = "";
  let n = 0;
  let run = [];
  const flush = () => {
    if (run.length > 1) {
      d += `M${run.map(([x, a]) => `${x.toFixed(1)} ${a.toFixed(1)}`).join("L")}`;
      d += `L${run
        .slice()
        .reverse()
        .map(([x, , b]) => `${x.toFixed(1)} ${b.toFixed(1)}`)
        .join("L")}Z`;
      n += run.length;
    }
    run = [];
  };
  const [bottomPx] = [ya.toPx(ya.lo)];
  for (let i = 0; i < xs.length; i++) {
    const px = xa.toPx(xs[i]);
    const top = ya.toPx(y1[i]);
    let bottom = ya.toPx(y0[i]);
    if (ya.log && !(y0[i] > 0) && Number.isFinite(top)) bottom = bottomPx;
    if (!Number.isFinite(px) || !Number.isFinite(top) || !Number.isFinite(bottom)) {
      flush();
      continue;
    }
    run.push([px, top, bottom]);
  }
  flush();
  return { d, n };
}

function nearestIndex(xs, x) {
  let lo = 0;
  let hi = xs.length - 1;
  if (hi < 0) return -1;
  while (hi - lo > 1) {
    const mid = (lo + hi) >> 1;
    if (xs[mid] < x) lo = mid;
    else hi = mid;
  }
  return Math.abs(xs[lo] - x) <= Math.abs(xs[hi] - x) ? lo : hi;
}

/**
 * spec: { id, title, width, height, x: {log, unit, label, range, step, fmt}, y: {...},
 *         series: [{key, label, type: "line"|"points"|"band", x, y, y0, y1, unit, fmt}],
 *         markers: [{x, label, cls}], hlines: [{y, cls}], note }
 */
export function plot(spec) {
  const W = spec.width ?? 760;
  const H = spec.height ?? 300;
  const uid = `p${++plotCount}`;
  const xVals = spec.series.flatMap((sr) => sr.x);
  const yVals = spec.series.flatMap((sr) =>
    sr.type === "band" ? [...(sr.y1 ?? []), ...(sr.y0 ?? [])] : sr.y,
  );
  const xa = makeAxis({ pad: false, ...spec.x }, xVals, [M.left, W - M.right]);
  const ya = makeAxis(spec.y, yVals, [H - M.bottom, M.top]);

  const svg = s("svg", {
    viewBox: `0 0 ${W} ${H}`,
    class: "plot-svg",
    role: "img",
    "aria-label": spec.title,
    "data-plot": spec.id,
  });
  svg.append(
    s("defs", {}, s("clipPath", { id: `${uid}-clip` }, s("rect", { x: M.left, y: M.top, width: W - M.left - M.right, height: H - M.top - M.bottom }))),
  );
  const grid = s("g", { class: "grid" });
  for (const v of xa.minor) grid.append(s("line", { class: "minor", x1: xa.toPx(v), x2: xa.toPx(v), y1: M.top, y2: H - M.bottom }));
  for (const v of ya.minor) grid.append(s("line", { class: "minor", y1: ya.toPx(v), y2: ya.toPx(v), x1: M.left, x2: W - M.right }));
  for (const v of xa.major) grid.append(s("line", { class: "major", x1: xa.toPx(v), x2: xa.toPx(v), y1: M.top, y2: H - M.bottom }));
  for (const v of ya.major) grid.append(s("line", { class: "major", y1: ya.toPx(v), y2: ya.toPx(v), x1: M.left, x2: W - M.right }));
  svg.append(grid);

  const axes = s("g", { class: "axes" });
  axes.append(s("rect", { class: "frame", x: M.left, y: M.top, width: W - M.left - M.right, height: H - M.top - M.bottom }));
  for (const v of xa.major) {
    axes.append(s("text", { class: "tick tick-x", x: xa.toPx(v), y: H - M.bottom + 15, "text-anchor": "middle" }, xa.fmt ? xa.fmt(v) : tickLabel(v, xa.unit)));
  }
  for (const v of ya.major) {
    axes.append(s("text", { class: "tick tick-y", x: M.left - 6, y: ya.toPx(v) + 4, "text-anchor": "end" }, tickLabel(v, ya.unit)));
  }
  axes.append(s("text", { class: "axis-title", x: (M.left + W - M.right) / 2, y: H - 6, "text-anchor": "middle" }, xa.label));
  axes.append(
    s("text", { class: "axis-title", x: 14, y: (M.top + H - M.bottom) / 2, "text-anchor": "middle", transform: `rotate(-90 14 ${(M.top + H - M.bottom) / 2})` }, ya.label),
  );
  svg.append(axes);

  const layer = s("g", { "clip-path": `url(#${uid}-clip)` });
  for (const hl of spec.hlines ?? []) {
    const py = ya.toPx(hl.y);
    if (Number.isFinite(py)) layer.append(s("line", { class: `hline ${hl.cls ?? ""}`, x1: M.left, x2: W - M.right, y1: py, y2: py }));
  }
  for (const sr of spec.series) {
    const built =
      sr.type === "band"
        ? bandPath(sr.x, sr.y0, sr.y1, xa, ya)
        : sr.type === "points"
          ? pointsPath(sr.x, sr.y, xa, ya)
          : linePath(sr.x, sr.y, xa, ya);
    layer.append(
      s("path", {
        class: `series ${sr.type} s-${sr.cls ?? sr.key}`,
        d: built.d,
        "data-series": sr.key,
        "data-points": built.n,
      }),
    );
  }
  svg.append(layer);

  const marks = s("g", { class: "markers" });
  (spec.markers ?? []).forEach((mk, i) => {
    const px = xa.toPx(mk.x);
    if (!Number.isFinite(px) || px < M.left - 0.5 || px > W - M.right + 0.5) return;
    marks.append(
      s("line", { class: `marker ${mk.cls ?? ""}`, x1: px, x2: px, y1: M.top, y2: H - M.bottom, "data-marker": mk.kind ?? mk.label }),
      s("text", { class: `marker-label ${mk.cls ?? ""}`, x: Math.min(px + 4, W - M.right - 4), y: M.top + 11 + (i % 3) * 12, "text-anchor": px > W - 140 ? "end" : "start" }, mk.label),
    );
  });
  svg.append(marks);

  // Hover read-out: a crosshair, a dot per series at the nearest sample, and a box with the values.
  const cross = s("line", { class: "crosshair", y1: M.top, y2: H - M.bottom, x1: -10, x2: -10 });
  const dots = s("g", { class: "hover-dots" });
  svg.append(cross, dots);
  const readout = h("div", { class: "readout", hidden: true });
  const overlay = s("rect", { class: "overlay", x: M.left, y: M.top, width: W - M.left - M.right, height: H - M.top - M.bottom });
  svg.append(overlay);
  const hoverable = spec.series.filter((sr) => sr.type !== "band" && sr.x.length && sr.hover !== false);
  const move = (ev) => {
    const box = svg.getBoundingClientRect();
    const px = ((ev.clientX - box.left) / box.width) * W;
    const xv = xa.fromPx(px);
    cross.setAttribute("x1", px);
    cross.setAttribute("x2", px);
    while (dots.firstChild) dots.firstChild.remove();
    const lines = [h("div", { class: "ro-x" }, xa.fmt ? xa.fmt(Math.round(xv)) : `${xa.label.split(" ")[0]} ${si(xv, xa.unit)}`)];
    for (const sr of hoverable) {
      const i = nearestIndex(sr.x, xv);
      if (i < 0) continue;
      const y = sr.y[i];
      const py = ya.toPx(y);
      if (Number.isFinite(py)) dots.append(s("circle", { class: `hover-dot s-${sr.cls ?? sr.key}`, cx: xa.toPx(sr.x[i]), cy: py, r: 3.5 }));
      const text = sr.fmt ? sr.fmt(i) : si(y, sr.unit ?? ya.unit);
      lines.push(h("div", {}, h("span", { class: `sw s-${sr.cls ?? sr.key}` }), `${sr.label}: ${text}`));
    }
    readout.replaceChildren(...lines);
    readout.hidden = false;
    const left = (px / W) * box.width;
    readout.style.left = `${left > box.width * 0.6 ? left - 12 - readout.offsetWidth : left + 12}px`;
    readout.style.top = `${M.top}px`;
  };
  overlay.addEventListener("pointermove", move);
  overlay.addEventListener("pointerleave", () => {
    readout.hidden = true;
    cross.setAttribute("x1", -10);
    cross.setAttribute("x2", -10);
    while (dots.firstChild) dots.firstChild.remove();
  });

  const legend = h(
    "div",
    { class: "legend" },
    spec.series
      .filter((sr) => sr.legend !== false)
      .map((sr) => h("span", { class: "item" }, h("span", { class: `sw ${sr.type} s-${sr.cls ?? sr.key}` }), sr.label)),
    (spec.markers ?? []).length ? h("span", { class: "item" }, h("span", { class: "sw marker" }), "resonances") : null,
  );
  return h(
    "figure",
    { class: "plot", id: spec.id },
    h("figcaption", {}, h("span", { class: "title" }, spec.title), legend),
    h("div", { class: "plot-area" }, svg, readout),
    spec.note ? h("p", { class: "note" }, spec.note) : null,
  );
}
