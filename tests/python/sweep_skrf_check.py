"""Reads Touchstone files with scikit-rf and prints the impedance each method implies, as JSON.

stdin: {"files": [{"path": ..., "method": "reflection|series-thru|shunt-thru|direct"}]}
stdout: {"skrf_version": ..., "files": [{"path", "frequency_hz", "z_real_ohm", "z_imag_ohm"}],
         "fixture": {...}}

The impedance comes from scikit-rf's own network conversions, not from henrybook's formulas:
reflection and direct -> Network.z (s2z); series element -> ABCD B (Network.a[:, 0, 1]);
shunt element -> 1 / ABCD C (Network.a[:, 1, 0]).
The fixture part de-embeds scikit-rf's bundled ind.s2p with open.s2p and short.s2p
(skrf.calibration.deembedding.OpenShort) and reports the series inductance -Im(1/Y21)/w.
"""
import json
import os
import sys

import numpy as np
import skrf
from skrf.calibration.deembedding import OpenShort


def impedance(path, method):
    ntwk = skrf.Network(path)
    if method in ("reflection", "direct"):
        z = ntwk.z[:, 0, 0]
    elif method == "series-thru":
        z = ntwk.a[:, 0, 1]
    elif method == "shunt-thru":
        z = 1.0 / ntwk.a[:, 1, 0]
    else:
        raise ValueError(method)
    return {
        "path": path,
        "frequency_hz": ntwk.f.tolist(),
        "z_real_ohm": np.real(z).tolist(),
        "z_imag_ohm": np.imag(z).tolist(),
    }


def fixture():
    data = os.path.join(os.path.dirname(skrf.__file__), "data")
    paths = {k: os.path.join(data, k + ".s2p") for k in ("ind", "open", "short")}
    ind, op, sh = (skrf.Network(paths[k]) for k in ("ind", "open", "short"))
    dut = OpenShort(dummy_open=op, dummy_short=sh, name="os").deembed(ind)
    w = 2 * np.pi * dut.f
    l_h = (-1.0 / dut.y[:, 0, 1]).imag / w
    texts = {}
    for k, p in paths.items():
        with open(p, encoding="latin-1") as fh:
            texts[k] = fh.read()
    return {"frequency_hz": dut.f.tolist(), "l_h": l_h.tolist(), "text": texts}


def embedded(request):
    """Measured impedances of a DUT, an open and a short seen through an L-shaped fixture, computed by
    cascading scikit-rf networks: a series element (ABCD [[1, Zs], [0, 1]]) and a shunt element
    (ABCD [[1, 0], [Yo, 1]]) in either order, terminated by the load."""
    f = np.array(request["frequency_hz"])
    zs = np.array(request["zs_real_ohm"]) + 1j * np.array(request["zs_imag_ohm"])
    yo = np.array(request["yo_real_s"]) + 1j * np.array(request["yo_imag_s"])
    zdut = np.array(request["zdut_real_ohm"]) + 1j * np.array(request["zdut_imag_ohm"])
    freq = skrf.Frequency.from_f(f, unit="hz")
    n = len(f)
    one, zero = np.ones(n, dtype=complex), np.zeros(n, dtype=complex)
    series_a = np.stack([np.stack([one, zs], -1), np.stack([zero, one], -1)], -2)
    shunt_a = np.stack([np.stack([one, zero], -1), np.stack([yo, one], -1)], -2)
    series = skrf.Network(frequency=freq, s=skrf.network.a2s(series_a, 50.0), z0=50.0)
    shunt = skrf.Network(frequency=freq, s=skrf.network.a2s(shunt_a, 50.0), z0=50.0)

    def load(s11):
        return skrf.Network(frequency=freq, s=s11.reshape(-1, 1, 1), z0=50.0)

    loads = {
        "dut": load(skrf.network.z2s(zdut.reshape(-1, 1, 1), 50.0).reshape(-1)),
        "open": load(one.copy()),
        "short": load(-one),
    }
    out = {}
    for name, first, second in (("series-then-shunt", series, shunt), ("shunt-then-series", shunt, series)):
        fixture = first ** second
        out[name] = {}
        for k, l in loads.items():
            z = (fixture ** l).z[:, 0, 0]
            out[name][k] = {"re": np.real(z).tolist(), "im": np.imag(z).tolist()}
    return out


def main():
    request = json.load(sys.stdin)
    out = {
        "skrf_version": skrf.__version__,
        "files": [impedance(f["path"], f["method"]) for f in request.get("files", [])],
    }
    if request.get("fixture"):
        out["fixture"] = fixture()
    if request.get("embedded"):
        out["embedded"] = embedded(request["embedded"])
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
