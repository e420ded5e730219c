// SI formatting and parsing of the numbers the API sends (always in base units: Hz, H, F, Ω).

const PREFIXES = [
  [1e12, "T"], [1e9, "G"], [1e6, "M"], [1e3, "k"], [1, ""],
  [1e-3, "m"], [1e-6, "µ"], [1e-9, "n"], [1e-12, "p"], [1e-15, "f"],
];

// Unit names the API uses in `verdict_checks[].unit` and elsewhere, as they are printed.
const UNIT_SYMBOL = { ohm: "Ω", ohms: "Ω", hz: "Hz", h: "H", f: "F", percent: "%", deg: "°" };

export function unitSymbol(unit) {
  if (unit == null) return "";
  return UNIT_SYMBOL[String(unit).toLowerCase()] ?? unit;
}

// 22508000 Hz -> "22.51 MHz"; 4.7e-6 H -> "4.700 µH"; 0.0123 Ω -> "12.30 mΩ".
export function si(value, unit = "", digits = 4) {
  if (value == null || Number.isNaN(value)) return "—";
  const sym = unitSymbol(unit);
  if (!Number.isFinite(value)) return `${value > 0 ? "∞" : "−∞"} ${sym}`.trim();
  if (value === 0) return `0 ${sym}`.trim();
  if (sym === "%" || sym === "°" || sym === "") return plain(value, digits) + (sym ? (sym === "%" ? " %" : sym) : "");
  const a = Math.abs(value);
  let [scale, p] = PREFIXES.find(([s]) => a >= s * 0.9995) ?? PREFIXES[PREFIXES.length - 1];
  let mant = value / scale;
  return `${toDigits(mant, digits)} ${p}${sym}`;
}

function toDigits(x, digits) {
  const a = Math.abs(x);
  const intDigits = a >= 100 ? 3 : a >= 10 ? 2 : 1;
  return x.toFixed(Math.max(0, digits - intDigits)).replace("-", "−");
}

// A number without a unit: fixed for ordinary sizes, exponent otherwise.
export function plain(value, digits = 4) {
  if (value == null || Number.isNaN(value)) return "—";
  const a = Math.abs(value);
  if (a !== 0 && (a >= 1e5 || a < 1e-3)) return value.toExponential(digits - 1).replace("-", "−");
  return toDigits(value, digits);
}

// Short axis label: 1e6 -> "1M", 2.2e-6 -> "2.2µ" (the unit is in the axis title).
export function tick(value, unit = "") {
  if (value === 0) return "0";
  const a = Math.abs(value);
  const sym = unitSymbol(unit);
  if (sym === "%" || sym === "°" || sym === "") {
    return trimZeros(a >= 1e5 || a < 1e-3 ? value.toExponential(1) : value.toPrecision(3));
  }
  const [scale, p] = PREFIXES.find(([s]) => a >= s * 0.9995) ?? PREFIXES[PREFIXES.length - 1];
  return trimZeros((value / scale).toPrecision(3)) + p;
}

function trimZeros(s) {
  if (s.includes("e")) return s.replace("-", "−");
  return (s.includes(".") ? s.replace(/0+$/, "").replace(/\.$/, "") : s).replace("-", "−");
}

const PREFIX_VALUE = { T: 1e12, G: 1e9, M: 1e6, k: 1e3, K: 1e3, "": 1, m: 1e-3, u: 1e-6, "µ": 1e-6, "μ": 1e-6, n: 1e-9, p: 1e-12, f: 1e-15 };

// Reads what a person types into a field whose unit is known: "30 MHz", "30M", "3e7", "4.7u", "4.7 µH".
// Returns null for an empty field and throws a readable error for anything it cannot read.
export function parseSI(text, unit) {
  let s = String(text ?? "").trim();
  if (s === "") return null;
  const sym = unitSymbol(unit);
  for (const u of [sym, unit, "ohm", "Ω"].filter(Boolean)) {
    if (s.toLowerCase().endsWith(String(u).toLowerCase()) && s.length > String(u).length) {
      s = s.slice(0, s.length - String(u).length).trim();
      break;
    }
  }
  const m = /^([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([TGMkKmuµμnpf]?)$/.exec(s);
  if (!m) throw new Error(`cannot read “${text}” as a value in ${sym || "plain numbers"} (try e.g. 4.7µ or 30 M)`);
  return Number(m[1]) * PREFIX_VALUE[m[2]];
}

export function time(iso) {
  if (!iso) return "—";
  const d = new Date(iso);
  if (Number.isNaN(d.getTime())) return iso;
  return d.toISOString().replace("T", " ").replace(/\.\d+Z$/, "Z").replace(/:\d\dZ$/, (m) => m);
}

export function ago(iso) {
  if (!iso) return "";
  const s = (Date.now() - new Date(iso).getTime()) / 1000;
  if (!Number.isFinite(s)) return "";
  if (s < 60) return `${Math.max(0, Math.round(s))} s ago`;
  if (s < 3600) return `${Math.round(s / 60)} min ago`;
  if (s < 86400) return `${Math.round(s / 3600)} h ago`;
  return `${Math.round(s / 86400)} d ago`;
}

// The unit a field carries in its name, by the API's naming rule: l0_h -> H, cp_f -> F, rdc_ohm -> Ω.
export function unitFromName(name) {
  const n = String(name);
  if (/_ohm_per_sqrt_hz$/.test(n)) return "Ω/√Hz";
  if (/_hz$/.test(n)) return "Hz";
  if (/_ohm$/.test(n)) return "Ω";
  if (/_h$/.test(n)) return "H";
  if (/_f$/.test(n)) return "F";
  if (/_percent$/.test(n)) return "%";
  return "";
}
