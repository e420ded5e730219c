"""Reads a Touchstone 1-port file (from stdin) with scikit-rf and prints its frequencies, S11 and the
impedance scikit-rf derives, as JSON. The reference reader for henrybook's Touchstone export."""

import json
import os
import sys
import tempfile

import skrf

text = sys.stdin.read()
with tempfile.TemporaryDirectory() as d:
    path = os.path.join(d, "export.s1p")
    with open(path, "w") as fh:
        fh.write(text)
    net = skrf.Network(path)

z = net.z[:, 0, 0]
s = net.s[:, 0, 0]
print(
    json.dumps(
        {
            "skrf_version": skrf.__version__,
            "frequency_hz": net.f.tolist(),
            "z0_ohm": float(net.z0[0, 0].real),
            "s_re": s.real.tolist(),
            "s_im": s.imag.tolist(),
            "z_real_ohm": z.real.tolist(),
            "z_imag_ohm": z.imag.tolist(),
        }
    )
)
