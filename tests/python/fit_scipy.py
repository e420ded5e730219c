"""Reference fit of the lumped inductor model with scipy.optimize.least_squares.

Reads JSON on stdin: {"cases": [{"name", "frequency_hz", "z_re", "z_im", "sigma",
"structure": {"has_rp", "has_k_ac", "has_ls", "sections": ["series"|"parallel", ...]},
"start": [ln p ...], "henrybook": [ln p ...], "dcr": null | [value, sigma]}]}.

The model is written here independently of the Rust code, from the formula in the issue:
  Z = jw ls + 1/(1/Zw + jw cp + sum_series 1/(r + jw l + 1/(jw c))) + sum_tank 1/(1/r + 1/(jw l) + jw c)
  Zw = rdc + k_ac sqrt(f) + (jw l0 rp)/(jw l0 + rp)
on the same log-parameters and the same residuals (Re and Im of Z_model - Z_meas divided by sigma,
plus (rdc - dcr)/sigma_dcr when a DCR reading is given).

Each case is fitted with method "trf" (x_scale="jac") and "lm" (MINPACK), tolerances 1e-12, from the
given start. Prints {"cases": [{"name", "chi2_scipy", "chi2_at_henrybook", "method", "nfev"}]} where
chi2 = sum of squared residuals = 2 * least_squares' cost.
"""

import json
import sys

import numpy as np
from scipy.optimize import least_squares


def make_residuals(case):
    f = np.asarray(case["frequency_hz"], dtype=float)
    zm = np.asarray(case["z_re"], dtype=float) + 1j * np.asarray(case["z_im"], dtype=float)
    inv_sigma = 1.0 / np.asarray(case["sigma"], dtype=float)
    st = case["structure"]
    dcr = case.get("dcr")
    w = 2 * np.pi * f
    jw = 1j * w
    sqrt_f = np.sqrt(f)
    kinds = st["sections"]

    def model(theta):
        p = np.exp(theta)
        l0, rdc, cp = p[0], p[1], p[2]
        i = 3
        rp = k_ac = ls = None
        if st["has_rp"]:
            rp = p[i]
            i += 1
        if st["has_k_ac"]:
            k_ac = p[i]
            i += 1
        if st["has_ls"]:
            ls = p[i]
            i += 1
        a = jw * l0
        core = a * rp / (a + rp) if rp is not None else a
        zw = rdc + (k_ac * sqrt_f if k_ac is not None else 0.0) + core
        y = 1.0 / zw + jw * cp
        z_tanks = 0.0
        for k, kind in enumerate(kinds):
            r, l, c = p[i + 3 * k], p[i + 3 * k + 1], p[i + 3 * k + 2]
            if kind == "series":
                y = y + 1.0 / (r + jw * l + 1.0 / (jw * c))
            else:
                z_tanks = z_tanks + 1.0 / (1.0 / r + 1.0 / (jw * l) + jw * c)
        z = 1.0 / y + z_tanks
        if ls is not None:
            z = z + jw * ls
        return z

    def residuals(theta):
        d = (model(theta) - zm) * inv_sigma
        out = np.empty(2 * len(f) + (1 if dcr else 0))
        out[0 : 2 * len(f) : 2] = d.real
        out[1 : 2 * len(f) : 2] = d.imag
        if dcr:
            out[-1] = (np.exp(theta[1]) - dcr[0]) / dcr[1]
        return out

    return residuals


def fit_case(case):
    residuals = make_residuals(case)
    start = np.asarray(case["start"], dtype=float)
    best = None
    for method in ("trf", "lm"):
        kwargs = dict(method=method, ftol=1e-12, xtol=1e-12, gtol=1e-12, max_nfev=20000)
        if method == "trf":
            kwargs["x_scale"] = "jac"
        res = least_squares(residuals, start, **kwargs)
        chi2 = float(np.sum(res.fun**2))
        if best is None or chi2 < best[0]:
            best = (chi2, method, int(res.nfev))
    chi2_hb = float(np.sum(residuals(np.asarray(case["henrybook"], dtype=float)) ** 2))
    return {
        "name": case["name"],
        "chi2_scipy": best[0],
        "method": best[1],
        "nfev": best[2],
        "chi2_at_henrybook": chi2_hb,
    }


def main():
    data = json.load(sys.stdin)
    json.dump({"cases": [fit_case(c) for c in data["cases"]]}, sys.stdout)


if __name__ == "__main__":
    main()
