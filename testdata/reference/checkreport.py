#!/usr/bin/python3
"""Independent values of what `surmise check` and `surmise design` report.

Run from the repository root with Debian's python3, python3-scipy and python3-yaml:

    /usr/bin/python3 testdata/reference/checkreport.py

It writes testdata/reference/checkreport.json. It reads the plant and gains files with
PyYAML and shares no code with the Go: for each case it

  1. builds the discrete model: a continuous model by zero-order hold (scipy.linalg.expm of
     the augmented matrix) with its process noise spectral density integrated by adaptive
     quadrature (scipy.integrate.quad_vec of e^{As}·Qc·e^{Aᵀs} over one sample);
  2. lists the eigenvalues of the discrete A with their continuous-equivalent time constants
     −Ts/ln|λ| and periods 2π·Ts/|arg λ| (SOURCES.md: zoh-eigenvalues);
  3. runs the PBH test on each distinct eigenvalue for both observer forms, the pair (A, C)
     and the pair (A, C·A): the smallest singular value of [λI − A; C] (numpy.linalg.svd)
     scaled by ‖A‖₂ + |λ| + ‖C‖₂, the scaling estimator.CheckObservability documents
     (SOURCES.md: pbh-test);
  4. for each gain of each gain set of the gains files: the eigenvalues of the error dynamics
     (A − L·C_s for the prediction form, A − L·C_s·A for the current form) with the L the
     file holds, their spectral radius ρ and the slowest error time constant −Ts/ln ρ; for a
     fixed (placed) gain the covariances from the error equations (SOURCES.md:
     fixed-gain-covariance) with scipy.linalg.solve_discrete_lyapunov, and for a Kalman set
     the steady-state filter from scipy.linalg.solve_discrete_are (SOURCES.md:
     lyapunov-kalman): S = C·P⁻·Cᵀ + R, and P as the form publishes it (the a priori P⁻ for
     the prediction form, the a posteriori (I − L·C)·P⁻·(I − L·C)ᵀ + L·R·Lᵀ for the current).
"""
import json
import os
import re

import numpy as np
import scipy
import yaml
from scipy import integrate, linalg

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

CASES = [
    # name, plant file, gains files (paths from the repository root)
    ("hotwater-loop", "testdata/plants/hotwater-loop.yaml", ["testdata/plants/hotwater-loop.gains.yaml"]),
    ("double-integrator", "cmd/surmise/testdata/plants/double-integrator.yaml",
     ["cmd/surmise/testdata/golden/design-double-integrator-prediction.yaml",
      "cmd/surmise/testdata/golden/design-double-integrator-current.yaml"]),
    ("random-walk", "cmd/surmise/testdata/plants/random-walk.yaml",
     ["cmd/surmise/testdata/golden/design-random-walk-prediction.yaml",
      "cmd/surmise/testdata/golden/design-random-walk-current.yaml"]),
    ("unobservable", "testdata/plants/unobservable.yaml", []),
]

UNITS = {"ns": 1e-9, "us": 1e-6, "µs": 1e-6, "ms": 1e-3, "s": 1.0, "m": 60.0, "h": 3600.0}


def seconds(text):
    """A Go duration such as "100ms", "1s" or "1m30s"."""
    total, rest = 0.0, str(text)
    for num, unit in re.findall(r"([0-9.]+)(ns|us|µs|ms|s|m|h)", rest):
        total += float(num) * UNITS[unit]
    return total


def matrix(rows, r, c):
    if rows is None:
        return np.zeros((r, c))
    return np.array(rows, dtype=float).reshape(r, c)


def covariance(node, n):
    if "covariance" in node:
        return np.array(node["covariance"], dtype=float)
    return np.diag(np.array(node["std"], dtype=float) ** 2)


def discrete_model(plant):
    md = plant["model"]
    ts = seconds(md["sample"])
    a = np.array(md["A"], dtype=float)
    n = a.shape[0]
    m = len(plant["inputs"])
    p = len(plant["outputs"])
    b = matrix(md.get("B"), n, m)
    c = matrix(md.get("C"), p, n)
    proc = plant["noise"]["process"]
    qn = covariance(proc, n)
    r = covariance(plant["noise"]["measurement"], p)
    if md["time"] == "continuous":
        aug = np.zeros((n + m, n + m))
        aug[:n, :n], aug[:n, n:] = a, b
        e = linalg.expm(aug * ts)
        ad, bd = e[:n, :n], e[:n, n:]
        if proc.get("time") == "continuous":
            q, _ = integrate.quad_vec(lambda s: linalg.expm(a * s) @ qn @ linalg.expm(a * s).T, 0, ts, epsrel=1e-13)
        else:
            q = qn
    else:
        ad, bd, q = a, b, qn
    return ts, ad, bd, c, (q + q.T) / 2, r


def eigen_list(ad, ts):
    out = []
    for l in np.linalg.eigvals(ad):
        mod = abs(l)
        e = {"re": float(l.real), "im": float(l.imag), "abs": float(mod)}
        if 1e-9 < mod and abs(mod - 1) > 1e-9:
            e["time_constant_seconds"] = float(abs(ts / np.log(mod)))
        arg = abs(np.angle(l))
        if mod > 1e-9 and arg > 1e-6:
            e["period_seconds"] = float(2 * np.pi * ts / arg)
        out.append(e)
    out.sort(key=lambda e: (-e["abs"], -e["re"], -e["im"]))
    return out


def distinct(values, tol=1e-6):
    """Cluster eigenvalues closer than tol·max(1, |λ|); return each cluster's mean."""
    groups = []
    for l in values:
        for g in groups:
            if abs(np.mean(g) - l) <= tol * max(1.0, abs(l)):
                g.append(l)
                break
        else:
            groups.append([l])
    return [complex(np.mean(g)) for g in groups]


def pbh(ad, c):
    n = ad.shape[0]
    na, nc = np.linalg.norm(ad, 2), np.linalg.norm(c, 2)
    modes = []
    for l in distinct(np.linalg.eigvals(ad)):
        sv = np.linalg.svd(np.vstack([l * np.eye(n) - ad, c.astype(complex)]), compute_uv=False)
        modes.append({"re": l.real, "im": l.imag, "abs": abs(l), "sigma_min": float(sv[-1] / (na + abs(l) + nc))})
    modes.sort(key=lambda e: (-e["abs"], -e["re"], -e["im"]))
    return modes


def dynamics(ad, cs, l, form, ts):
    trans = ad - l @ cs if form == "prediction" else ad - l @ cs @ ad
    poles = np.linalg.eigvals(trans)
    rho = float(max(abs(poles)))
    d = {"poles": [{"re": float(z.real), "im": float(z.imag)} for z in poles], "spectral_radius": rho}
    if rho < 1:
        d["convergence_seconds"] = float(-ts / np.log(rho)) if rho > 0 else 0.0
    return d


def fixed_gain_covariance(ad, cs, l, form, q, r):
    """P⁻ of a fixed gain from its error equations; S and the published P."""
    n = ad.shape[0]
    ilc = np.eye(n) - l @ cs
    if form == "prediction":
        trans, drive = ad - l @ cs, q + l @ r @ l.T
    else:
        trans, drive = ad @ ilc, q + ad @ l @ r @ l.T @ ad.T
    p = linalg.solve_discrete_lyapunov(trans, drive)
    p = (p + p.T) / 2
    s = cs @ p @ cs.T + r
    pub = p if form == "prediction" else ilc @ p @ ilc.T + l @ r @ l.T
    return s, pub


def kalman(ad, cs, q, r, form):
    p = linalg.solve_discrete_are(ad.T, cs.T, q, r)
    s = cs @ p @ cs.T + r
    lc = p @ cs.T @ np.linalg.inv(s)
    ilc = np.eye(ad.shape[0]) - lc @ cs
    if form == "prediction":
        return ad @ lc, s, p
    return lc, s, ilc @ p @ ilc.T + lc @ r @ lc.T


def gains_report(path, plant, ts, ad, c, q, r):
    g = yaml.safe_load(open(os.path.join(ROOT, path)))
    outs = [o["name"] for o in plant["outputs"]]
    sets = []
    for st in g["sets"]:
        form = st["form"]
        rows = []
        for pg in st["gains"]:
            idx = [outs.index(o) for o in pg["outputs"]]
            cs, rs = c[idx, :], r[np.ix_(idx, idx)]
            l = np.array(pg["L"], dtype=float)
            entry = {"outputs": pg["outputs"]}
            if form == "kalman":
                continue
            entry.update(dynamics(ad, cs, l, form, ts))
            if st["provenance"]["method"] == "kalman":
                lk, s, pub = kalman(ad, cs, q, rs, form)
                entry["L"] = lk.tolist()
            else:
                s, pub = fixed_gain_covariance(ad, cs, l, form, q, rs)
            entry["S"], entry["P"] = s.tolist(), pub.tolist()
            rows.append(entry)
        if form == "kalman":
            # check reports the steady state of the time-varying filter for
            # all outputs, prediction form.
            qq = np.array(st["Q"], dtype=float) if "Q" in st else q
            rr = np.array(st["R"], dtype=float) if "R" in st else r
            lp, s, p = kalman(ad, c, qq, rr, "prediction")
            entry = {"outputs": outs}
            entry.update(dynamics(ad, c, lp, "prediction", ts))
            rows.append(entry)
        sets.append({"name": st["name"], "form": form, "patterns": rows})
    return {"file": path, "sets": sets}


out = {"source": f"testdata/reference/checkreport.py, scipy {scipy.__version__}, numpy {np.__version__}", "cases": []}
for name, plant_path, gains_paths in CASES:
    plant = yaml.safe_load(open(os.path.join(ROOT, plant_path)))
    ts, ad, bd, c, q, r = discrete_model(plant)
    case = {
        "name": name,
        "plant": plant_path,
        "sample_seconds": ts,
        "A": ad.tolist(),
        "eigenvalues": eigen_list(ad, ts),
        "pbh": {"prediction": pbh(ad, c), "current": pbh(ad, c @ ad)},
        "gains": [gains_report(gp, plant, ts, ad, c, q, r) for gp in gains_paths],
    }
    out["cases"].append(case)

path = os.path.join(ROOT, "testdata", "reference", "checkreport.json")
with open(path, "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
print("wrote", path)
