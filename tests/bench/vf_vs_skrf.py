"""Side-by-side wall-clock comparison: henrybook's vector fit vs scikit-rf's VectorFitting.

Run from the repository root:  OPENBLAS_NUM_THREADS=1 python tests/bench/vf_vs_skrf.py
(needs numpy and scikit-rf, and cargo; the Rust side runs `cargo bench -p henrybook --bench vector_fit`).

Data: 1601 log-spaced points, 10 kHz - 1 GHz, of a synthetic choke (a known lumped model: L0 10 uH,
Rdc 50 mOhm, skin term 2e-5 Ohm/sqrt(Hz), Rp 20 kOhm, Cp 5 pF, Ls 2 nH, one series section 1 Ohm /
50 nH / 2 pF) with Gaussian noise of constant standard deviation (0.1 % of the median |Z| on the real and on
the imaginary part, an instrument noise floor), so uniform weights are the right ones on both sides
(scikit-rf weights the points of one response equally; henrybook gets that constant sigma). The order is the one scikit-rf needs: its lowest number of complex pole pairs whose RMS
error is within 5 % of its best over 1..8 pairs (log-spaced starting poles). Both are then timed at that
order, best of N runs, in one process run each, one after the other on the same machine.
"""

import json
import os
import subprocess
import sys
import tempfile
import time
import warnings

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
import numpy as np  # noqa: E402
import skrf  # noqa: E402
from skrf.vectorFitting import VectorFitting  # noqa: E402

warnings.filterwarnings("ignore")
REPEAT = int(os.environ.get("VF_BENCH_REPEAT", "10"))

f = np.geomspace(1e4, 1e9, 1601)
s = 2j * np.pi * f
zw = 0.05 + 2e-5 * np.sqrt(f) + s * 10e-6 * 20e3 / (s * 10e-6 + 20e3)
y = 1 / zw + s * 5e-12 + 1 / (1.0 + s * 50e-9 + 1 / (s * 2e-12))
z_true = s * 2e-9 + 1 / y
rng = np.random.default_rng(2024)
sigma = np.full(f.size, 1e-3 * float(np.median(np.abs(z_true))))
z = z_true + sigma * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size))

ntw = skrf.Network.from_z(z.reshape(-1, 1, 1), frequency=skrf.Frequency.from_f(f, unit="hz"))


def skrf_fit(n_cmplx):
    vf = VectorFitting(ntw)
    t0 = time.perf_counter()
    vf.vector_fit(n_poles_real=0, n_poles_cmplx=n_cmplx, init_pole_spacing="log",
                  parameter_type="z", fit_constant=True, fit_proportional=True)
    dt = time.perf_counter() - t0
    rms = float(np.sqrt(np.mean(np.abs(z - vf.get_model_response(0, 0, f)) ** 2)))
    return dt, rms, len(vf.d_res_history)


scan = {n: skrf_fit(n) for n in range(1, 9)}
best = min(r[1] for r in scan.values())
n_cmplx = min(n for n, r in scan.items() if r[1] <= 1.05 * best)
order = 2 * n_cmplx
times = [skrf_fit(n_cmplx) for _ in range(REPEAT)]
skrf_best = min(t[0] for t in times)
skrf_median = float(np.median([t[0] for t in times]))
skrf_rms = times[0][1]

with tempfile.NamedTemporaryFile("w", suffix=".json", delete=False) as fh:
    json.dump({"frequency_hz": f.tolist(), "z_re": z.real.tolist(), "z_im": z.imag.tolist(),
               "sigma_ohm": sigma.tolist(), "order": order, "repeat": REPEAT}, fh)
    path = fh.name
root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
env = dict(os.environ, VF_BENCH_INPUT=path)
out = subprocess.run(["cargo", "bench", "-q", "-p", "henrybook", "--bench", "vector_fit"],
                     cwd=root, env=env, check=True, capture_output=True, text=True)
os.unlink(path)
hb = json.loads(out.stdout.strip().splitlines()[-1])

report = {
    "points": int(f.size),
    "noise_floor_rms_ohm": float(np.sqrt(np.mean(np.abs(z - z_true) ** 2))),
    "order_scikit_rf_needs": order,
    "scikit_rf_scan_rms_ohm": {2 * n: r[1] for n, r in scan.items()},
    "scikit_rf_version": skrf.__version__,
    "scikit_rf_iterations": times[0][2],
    "scikit_rf_best_s": skrf_best,
    "scikit_rf_median_s": skrf_median,
    "scikit_rf_rms_ohm": skrf_rms,
    "henrybook": hb,
    "speedup_vector_fit_best": skrf_best / hb["vector_fit_best_s"],
    "speedup_vector_fit_median": skrf_median / hb["vector_fit_median_s"],
    "speedup_fit_rational_best": skrf_best / hb["fit_rational_best_s"],
}
json.dump(report, sys.stdout, indent=1)
print()
