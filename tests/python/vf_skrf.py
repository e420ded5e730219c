"""Reference vector fits by scikit-rf (skrf.vectorFitting.VectorFitting) of impedance data.

Reads JSON from stdin: {"frequency_hz": [...], "z_re": [...], "z_im": [...],
"fits": [{"n_real": int, "n_cmplx": int}], "spacings": ["log", "lin"], "repeat": int}
and prints JSON: per fit and starting-pole spacing, the RMS error sqrt(mean |Z - Z_fit|^2) in ohm against
the given data, the poles (rad/s) and the wall time of `vector_fit`.

The impedance goes in as a 1-port Network built by `Network.from_z` (scikit-rf stores S, reference 50 ohm)
and is fitted with `parameter_type='z'`, so scikit-rf fits exactly these Z values (up to the S round trip,
reported as `roundtrip_max_rel`), with a constant and a proportional term like henrybook's model. For one
response scikit-rf weights every point equally.
"""

import json
import sys
import time
import warnings

import numpy as np
import skrf
from skrf.vectorFitting import VectorFitting

warnings.filterwarnings("ignore")

req = json.load(sys.stdin)
f = np.asarray(req["frequency_hz"], dtype=float)
z = np.asarray(req["z_re"], dtype=float) + 1j * np.asarray(req["z_im"], dtype=float)
freq = skrf.Frequency.from_f(f, unit="hz")
ntw = skrf.Network.from_z(z.reshape(-1, 1, 1), frequency=freq)
roundtrip = float(np.max(np.abs(ntw.z[:, 0, 0] - z) / np.abs(z)))

out = {"skrf_version": skrf.__version__, "roundtrip_max_rel": roundtrip, "fits": []}
for fit in req["fits"]:
    for spacing in req.get("spacings", ["log"]):
        best_t = float("inf")
        for _ in range(int(req.get("repeat", 1))):
            vf = VectorFitting(ntw)
            t0 = time.perf_counter()
            vf.vector_fit(
                n_poles_real=fit["n_real"],
                n_poles_cmplx=fit["n_cmplx"],
                init_pole_spacing=spacing,
                parameter_type="z",
                fit_constant=True,
                fit_proportional=True,
            )
            best_t = min(best_t, time.perf_counter() - t0)
        model = vf.get_model_response(0, 0, f)
        rms = float(np.sqrt(np.mean(np.abs(z - model) ** 2)))
        out["fits"].append(
            {
                "n_real": fit["n_real"],
                "n_cmplx": fit["n_cmplx"],
                "spacing": spacing,
                "rms_ohm": rms,
                "iterations": len(vf.d_res_history),
                "seconds": best_t,
                "poles_re": [float(p.real) for p in vf.poles],
                "poles_im": [float(p.imag) for p in vf.poles],
            }
        )
json.dump(out, sys.stdout)
