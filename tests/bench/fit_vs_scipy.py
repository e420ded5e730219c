"""Side-by-side timing: henrybook's lumped fit vs scipy.optimize.least_squares on the same 1601-point
sweep, model, weights and starting point.

Run from the repository root (OPENBLAS_NUM_THREADS=1 is set here; multithreaded BLAS on 2 cores makes
scipy slower and erratic):

    target/pyref/bin/python tests/bench/fit_vs_scipy.py          # runs `cargo bench` first
    target/pyref/bin/python tests/bench/fit_vs_scipy.py --no-cargo  # reuse the last bench run

The Rust side is the criterion benchmark service/benches/fit.rs (`fit_1601/single_structure`); it
writes the problem to target/bench-data/fit_1601.json, which this script fits with scipy
(the model code is tests/python/fit_scipy.py's). scipy is timed as it is usually called (method
"trf", the default 2-point finite-difference Jacobian, default tolerances) and, for the fairest
comparison, also with method "lm" and with an analytic Jacobian written in numpy; the ratio is taken
against the fastest scipy variant that reaches henrybook's cost within 1e-6 relative.
"""

import json
import os
import subprocess
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
from scipy.optimize import least_squares  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "python"))
from fit_scipy import make_residuals  # noqa: E402


def make_jacobian(case):
    """Analytic Jacobian of the residuals w.r.t. ln p (same chain rule as the Rust model)."""
    f = np.asarray(case["frequency_hz"], dtype=float)
    inv_sigma = 1.0 / np.asarray(case["sigma"], dtype=float)
    st = case["structure"]
    assert not st["sections"], "the benchmark structure has no sections"
    jw = 2j * np.pi * f
    sqrt_f = np.sqrt(f)

    def jac(theta):
        p = np.exp(theta)
        l0, rdc, cp = p[0], p[1], p[2]
        i = 3
        cols = {}
        a = jw * l0
        rp = k = ls = None
        if st["has_rp"]:
            rp = p[i]
            cols["rp"] = i
            i += 1
        if st["has_k_ac"]:
            k = p[i]
            cols["k"] = i
            i += 1
        if st["has_ls"]:
            ls = p[i]
            cols["ls"] = i
            i += 1
        if rp is not None:
            den = a + rp
            core = a * rp / den
            dl0 = a * rp**2 / den**2
            drp = a**2 * rp / den**2
        else:
            core = a
            dl0 = a
            drp = None
        kt = k * sqrt_f if k is not None else 0.0
        zw = rdc + kt + core
        yw = 1 / zw
        y = yw + jw * cp
        zy = 1 / y
        gy = -(zy**2)
        gw = (yw * zy) ** 2
        dz = np.empty((len(f), len(theta)), dtype=complex)
        dz[:, 0] = gw * dl0
        dz[:, 1] = gw * rdc
        dz[:, 2] = gy * jw * cp
        if "rp" in cols:
            dz[:, cols["rp"]] = gw * drp
        if "k" in cols:
            dz[:, cols["k"]] = gw * kt
        if "ls" in cols:
            dz[:, cols["ls"]] = jw * ls
        dz *= inv_sigma[:, None]
        out = np.empty((2 * len(f), len(theta)))
        out[0::2] = dz.real
        out[1::2] = dz.imag
        return out

    return jac


def time_it(fn, repeats):
    best = float("inf")
    result = None
    for _ in range(repeats):
        t0 = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - t0)
    return best, result


def main():
    if "--no-cargo" not in sys.argv:
        subprocess.run(
            ["cargo", "bench", "-p", "henrybook", "--bench", "fit"], cwd=ROOT, check=True
        )
    case = json.loads((ROOT / "target/bench-data/fit_1601.json").read_text())
    est = json.loads(
        (ROOT / "target/criterion/fit_1601/single_structure/new/estimates.json").read_text()
    )
    full = json.loads(
        (ROOT / "target/criterion/fit_1601/full_selection/new/estimates.json").read_text()
    )
    rust_s = est["median"]["point_estimate"] * 1e-9
    rust_full_s = full["median"]["point_estimate"] * 1e-9
    residuals = make_residuals(case)
    jac = make_jacobian(case)
    start = np.asarray(case["start"], dtype=float)
    target = case["henrybook_chi2"]

    variants = {
        "trf, 2-point (scipy default)": dict(method="trf"),
        "trf, 2-point, x_scale=jac": dict(method="trf", x_scale="jac"),
        "lm, 2-point": dict(method="lm"),
        "trf, analytic jac": dict(method="trf", jac=jac, x_scale="jac"),
        "lm, analytic jac": dict(method="lm", jac=jac),
    }
    print(f"points: {len(case['frequency_hz'])}, parameters: {len(start)}")
    print(
        f"henrybook single structure: {rust_s * 1e3:.3f} ms (criterion median), "
        f"chi2 {target:.6f}, {case['henrybook_iterations']} LM iterations"
    )
    print(f"henrybook full model selection: {rust_full_s * 1e3:.3f} ms (criterion median)")
    best = None
    rows = []
    for name, kw in variants.items():
        t, res = time_it(lambda: least_squares(residuals, start, **kw), 7)
        chi2 = float(np.sum(res.fun**2))
        same = abs(chi2 / target - 1) < 1e-6
        rows.append((name, t, chi2, res.nfev, same))
        if same and (best is None or t < best[1]):
            best = (name, t)
    for name, t, chi2, nfev, same in rows:
        print(
            f"scipy {name:32s} {t * 1e3:9.3f} ms  chi2 {chi2:.6f}  nfev {nfev:4d}  "
            f"ratio {t / rust_s:7.1f}x{'' if same else '  (did not reach henrybook cost)'}"
        )
    if best is None:
        print("no scipy variant reached henrybook's cost")
        return 1
    ratio = best[1] / rust_s
    print(f"RATIO (fastest scipy that reaches the same cost: {best[0]}): {ratio:.1f}x")
    default = rows[0]
    print(f"RATIO vs scipy default call: {default[1] / rust_s:.1f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
