#!/usr/bin/python3
"""A gains file for the discrete hot-water loop, computed with scipy: steady-state Kalman gains.

Run from the repository root with Debian's python3 (numpy, scipy, yaml):

    /usr/bin/python3 testdata/config/kalman_gains.py

It reads testdata/plants/hotwater-loop-discrete.yaml and writes
testdata/plants/hotwater-loop-discrete.gains.yaml with three sets:
  kalman-current     current form: L = P⁻Cᵀ(CP⁻Cᵀ + R)⁻¹ with P⁻ from
                     scipy.linalg.solve_discrete_are(Aᵀ, Cᵀ, Q, R), S = CP⁻Cᵀ + R,
                     P = (I − LC)P⁻ (the covariance of the published, corrected estimate);
                     one gain for both outputs and one for the tank outlet alone;
  kalman-prediction  prediction form: L = A·L_current, P = P⁻ (both patterns again);
  kalman-tv          the time-varying Kalman form with the plant's Q and R.
Poles are the eigenvalues of A − L_pC, written like "0.87" or "0.5+0.1i". The fingerprint is
computed with fingerprint.py beside this script. The config tests parse the file, check that
ParseGains accepts it and that encoding and parsing again gives the same numbers.
"""
import os
import sys

import numpy as np
import scipy
import yaml
from scipy import linalg

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from fingerprint import ROOT, fingerprint  # noqa: E402

PLANT = "testdata/plants/hotwater-loop-discrete.yaml"
OUT = "testdata/plants/hotwater-loop-discrete.gains.yaml"


def pole(z):
    if abs(z.imag) < 1e-15:
        return repr(float(z.real))
    sign = "+" if z.imag > 0 else "-"
    return f"{float(z.real)!r}{sign}{abs(float(z.imag))!r}i"


def rows(m, indent):
    return "".join(f"\n{indent}- [" + ", ".join(repr(float(x)) for x in row) + "]" for row in m)


def main():
    with open(os.path.join(ROOT, PLANT)) as f:
        plant = yaml.safe_load(f)
    mdl = plant["model"]
    a = np.array(mdl["A"], dtype=float)
    c = np.array(mdl["C"], dtype=float)
    q = np.array(plant["noise"]["process"]["covariance"], dtype=float)
    r = np.diag(np.square(np.array(plant["noise"]["measurement"]["std"], dtype=float)))
    names = [o["name"] for o in plant["outputs"]]
    n = a.shape[0]

    gains = {"current": [], "prediction": []}
    for idx in ([0, 1], [0]):
        cs, rs = c[idx, :], r[np.ix_(idx, idx)]
        obs = np.vstack([cs @ np.linalg.matrix_power(a, k) for k in range(n)])
        assert np.linalg.matrix_rank(obs) == n, f"not observable with outputs {idx}"
        pm = linalg.solve_discrete_are(a.T, cs.T, q, rs)
        s = cs @ pm @ cs.T + rs
        lc = pm @ cs.T @ np.linalg.inv(s)
        pp = (np.eye(n) - lc @ cs) @ pm
        pp = (pp + pp.T) / 2
        lp = a @ lc
        ev = np.linalg.eigvals(a - lp @ cs)
        ev2 = np.linalg.eigvals(a - lc @ cs @ a)
        assert np.allclose(np.sort_complex(ev), np.sort_complex(ev2), atol=1e-10)
        assert max(abs(ev)) < 1
        ev = sorted(ev, key=lambda z: (-abs(z), z.imag))
        outs = [names[i] for i in idx]
        gains["current"].append((outs, lc, s, pp, ev))
        gains["prediction"].append((outs, lp, s, pm, ev))

    text = [
        "# Steady-state Kalman gains for the invented hot-water loop (discrete variant), computed",
        "# with scipy.linalg.solve_discrete_are by testdata/config/kalman_gains.py; rerun it:",
        "#   /usr/bin/python3 testdata/config/kalman_gains.py",
        f"# numpy {np.__version__}, scipy {scipy.__version__}.",
        f"fingerprint: {fingerprint(plant)}",
        f"plant: {plant['name']}",
        "active: kalman-current",
        "candidate: kalman-prediction",
        "sets:",
    ]
    for form in ("current", "prediction"):
        text.append(f"  - name: kalman-{form}")
        text.append(f"    form: {form}")
        text.append("    gains:")
        for outs, l, s, p, ev in gains[form]:
            text.append("      - outputs: [" + ", ".join(outs) + "]")
            text.append("        L:" + rows(l, "          "))
            text.append("        S:" + rows(s, "          "))
            text.append("        P:" + rows(p, "          "))
            text.append("        poles: [" + ", ".join(f'"{pole(z)}"' for z in ev) + "]")
        text.append("    provenance:")
        text.append("      method: kalman")
        text.append("      Q:" + rows(q, "        "))
        text.append("      R:" + rows(r, "        "))
        text.append("      tool: scipy " + scipy.__version__)
        text.append("      note: reference fixture for the config tests")
    text.append("  - name: kalman-tv")
    text.append("    form: kalman")
    text.append("    Q:" + rows(q, "      "))
    text.append("    R:" + rows(r, "      "))
    text.append("    provenance:")
    text.append("      method: kalman")
    text.append("      note: the plant's own noise, propagated every tick")
    with open(os.path.join(ROOT, OUT), "w") as f:
        f.write("\n".join(text) + "\n")
    print("wrote", OUT)


if __name__ == "__main__":
    main()
