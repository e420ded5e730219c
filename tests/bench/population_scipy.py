"""The scipy peer of the population benchmark: a plain least-squares fit of the base lumped model
(l0, rdc, cp, rp, k_ac, ls) on log-parameters with a simple start read off the curve, one structure, no
model selection, no multi-start. It reads the files `--example population -- --write DIR` writes
(Touchstone with scikit-rf, CSV with numpy), builds the same per-point uncertainty henrybook's readers
document (sweep/uncertainty.rs), fits with scipy.optimize.least_squares (method "trf", x_scale "jac"),
and reports the found rate (χ² ≤ 1.1 × χ² at the truth + 20) overall and per method, and its time.

    target/pyref/bin/python tests/bench/population_scipy.py DIR [--time FILE]

With `--time FILE` it fits that one file ten times and prints the best time (the whole-process
comparison in the population README runs it as a separate process).
"""
import json
import math
import sys
import time
import warnings

import numpy as np
import skrf
from scipy.optimize import least_squares

warnings.filterwarnings("ignore")
Z0 = 50.0


def impedance(m, f):
    w = 2 * np.pi * f
    jw = 1j * w
    core = jw * m["l0_h"]
    if m.get("rp_ohm"):
        core = core * m["rp_ohm"] / (core + m["rp_ohm"])
    zw = m["rdc_ohm"] + m["k_ac_ohm_per_sqrt_hz"] * np.sqrt(f) + core
    return jw * m["ls_h"] + 1 / (1 / zw + jw * m["cp_f"])


def read(path, method):
    """Frequency, Z and σ as henrybook's readers define them."""
    if path.endswith(".csv"):
        d = np.loadtxt(path, delimiter=",", skiprows=1)
        f, z = d[:, 0], d[:, 1] + 1j * d[:, 2]
        return f, z, np.sqrt((2e-3 * np.abs(z)) ** 2 + 1e-18)
    net = skrf.Network(path)
    f = net.f
    if method == "reflection":
        s = net.s[:, 0, 0]
        z, dz, pole = Z0 * (1 + s) / (1 - s), 2 * Z0 / (1 - s) ** 2, np.abs(1 - s)
    elif method == "series-thru":
        s = net.s[:, 1, 0]
        z, dz, pole = 2 * Z0 * (1 - s) / s, -2 * Z0 / s**2, np.abs(s)
    else:
        s = net.s[:, 1, 0]
        z, dz, pole = Z0 * s / (2 * (1 - s)), Z0 / (2 * (1 - s) ** 2), np.abs(1 - s)
    sigma_s = np.hypot(1e-3 * np.abs(s), 1e-5)
    u = sigma_s / pole
    lin = np.abs(dz) * sigma_s
    from_s = np.where(u >= 0.5, 100 * (np.abs(z) + lin), lin / (1 - np.minimum(u, 0.99)))
    return f, z, np.sqrt(from_s**2 + (2e-3 * np.abs(z)) ** 2 + 1e-18)


def chi2(m, f, z, sigma):
    return float(np.sum(np.abs(impedance(m, f) - z) ** 2 / sigma**2))


def simple_start(f, z):
    w = 2 * np.pi * f
    low = f <= f[0] * 10 ** (0.1 * math.log10(f[-1] / f[0]))
    ind = low & (z.imag > 0)
    l0 = float(np.median(z.imag[ind] / w[ind])) if ind.any() else float(abs(z.imag[0]) / w[0])
    rdc = max(float(np.median(z.real[:5])), 1e-6)
    cross = np.where((z.imag[:-1] > 0) & (z.imag[1:] <= 0))[0]
    srf = f[cross[0]] if len(cross) else 3 * f[-1]
    cp = 1 / ((2 * np.pi * srf) ** 2 * l0)
    return {
        "l0_h": l0, "rdc_ohm": rdc, "cp_f": cp, "rp_ohm": 10 * w[-1] * l0,
        "k_ac_ohm_per_sqrt_hz": 0.1 * rdc / math.sqrt(math.sqrt(f[0] * f[-1])), "ls_h": 1e-3 * l0,
    }


KEYS = ["l0_h", "rdc_ohm", "cp_f", "rp_ohm", "k_ac_ohm_per_sqrt_hz", "ls_h"]


def fit(f, z, sigma):
    start = simple_start(f, z)
    x0 = np.log([max(start[k], 1e-30) for k in KEYS])

    def residuals(x):
        m = dict(zip(KEYS, np.exp(x)))
        d = (impedance(m, f) - z) / sigma
        return np.concatenate([d.real, d.imag])

    r = least_squares(residuals, x0, method="trf", x_scale="jac", max_nfev=2000)
    return dict(zip(KEYS, np.exp(r.x)))


def main():
    folder = sys.argv[1]
    if "--time" in sys.argv:
        path = sys.argv[sys.argv.index("--time") + 1]
        meta = {json.loads(l)["file"]: json.loads(l) for l in open(f"{folder}/truth.jsonl")}
        f, z, sigma = read(path, meta[path.split("/")[-1]]["method"])
        best = min(timeit_once(f, z, sigma) for _ in range(10))
        print(json.dumps({"file": path, "best_fit_s": best}))
        return
    per = {}
    t_all = []
    for line in open(f"{folder}/truth.jsonl"):
        part = json.loads(line)
        f, z, sigma = read(f"{folder}/{part['file']}", part["method"])
        t = time.perf_counter()
        try:
            m = fit(f, z, sigma)
            ok = chi2(m, f, z, sigma) <= 1.1 * chi2(part["truth"], f, z, sigma) + 20
        except Exception:
            ok = False
        t_all.append(time.perf_counter() - t)
        for key in ("all", "method " + part["method"], "spacing " + part["spacing"]):
            n, k = per.get(key, (0, 0))
            per[key] = (n + 1, k + ok)
    for key in sorted(per):
        n, k = per[key]
        print(f"{key:<22} {n:>6} {k:>6} {100 * k / n:6.1f}%")
    print(f"scipy fit time per part: median {1e3 * float(np.median(t_all)):.1f} ms")


def timeit_once(f, z, sigma):
    t = time.perf_counter()
    fit(f, z, sigma)
    return time.perf_counter() - t


if __name__ == "__main__":
    main()
