#!/usr/bin/python3
"""Closed forms and table values the estimator tests use, recomputed with scipy.

Run from the repository root with Debian's python3 and python3-scipy:

    /usr/bin/python3 testdata/reference/closedforms.py

It computes each value two ways where it can (the closed form written in the
test's comment, and scipy's general routine), stops with an error when they
disagree, and writes testdata/reference/closedforms.json. Each key is an
entry of testdata/reference/SOURCES.md; the tests hold the same numbers,
rounded as printed there.
"""
import json
import os

import numpy as np
import scipy
from scipy import integrate, linalg, stats


def close(what, a, b, tol):
    a, b = np.asarray(a, float), np.asarray(b, float)
    err = np.max(np.abs(a - b)) / max(1.0, np.max(np.abs(b)))
    if not err <= tol:
        raise SystemExit(f"{what}: closed form and scipy differ by {err:.3g} (tolerance {tol:g})")


def zoh(a, b, qc, ts):
    """Zero-order hold by scipy.linalg.expm of the augmented matrix; Q_d by
    adaptive quadrature of ∫₀ᵀ e^{As} Qc e^{A's} ds."""
    n, m = b.shape
    aug = np.zeros((n + m, n + m))
    aug[:n, :n], aug[:n, n:] = a, b
    e = linalg.expm(aug * ts)
    qd, _ = integrate.quad_vec(lambda s: linalg.expm(a * s) @ qc @ linalg.expm(a * s).T, 0, ts, epsrel=1e-13)
    return e[:n, :n], e[:n, n:], qd


out = {"source": f"testdata/reference/closedforms.py, scipy {scipy.__version__}, numpy {np.__version__}"}

# double-integrator: Φ = [[1, T], [0, 1]], Γ = [T²/2; T], Q_d = q·[[T³/3, T²/2], [T²/2, T]].
di = []
for ts, q in [(0.1, 2.0), (7.0, 0.5)]:
    a = np.array([[0.0, 1.0], [0.0, 0.0]])
    b = np.array([[0.0], [1.0]])
    ad, bd, qd = zoh(a, b, np.diag([0.0, q]), ts)
    close("double integrator Φ", ad, [[1, ts], [0, 1]], 1e-14)
    close("double integrator Γ", bd, [[ts * ts / 2], [ts]], 1e-14)
    close("double integrator Q_d", qd, q * np.array([[ts**3 / 3, ts**2 / 2], [ts**2 / 2, ts]]), 1e-12)
    di.append({"ts": ts, "q": q, "ad": ad.tolist(), "bd": bd.tolist(), "qd": qd.tolist()})
out["double-integrator"] = di

# first-order-lag: τẋ = −x + K·u + w, τ = 2, K = 3, T = 0.5, unit density.
tau, k, ts = 2.0, 3.0, 0.5
ad, bd, qd = zoh(np.array([[-1 / tau]]), np.array([[k / tau]]), np.array([[1.0]]), ts)
phi = np.exp(-ts / tau)
close("lag Φ", ad, [[phi]], 1e-15)
close("lag Γ", bd, [[k * (1 - phi)]], 1e-15)
close("lag Q_d", qd, [[tau / 2 * (1 - np.exp(-2 * ts / tau))]], 1e-13)
out["first-order-lag"] = {"tau": tau, "k": k, "ts": ts, "ad": float(phi), "bd": float(k * (1 - phi)),
                          "qd": float(tau / 2 * (1 - np.exp(-2 * ts / tau))), "time_constant": float(-ts / np.log(phi))}

# stiff-exponential: M = −200·I + 100·(adjacency of the 4-cycle 1–2–4–3–1) has
# eigenvalues 0, −200, −200, −400 and the null vector ones(4)/2, so
# e^M = 0.25·ones(4) + O(e^{−200}).
m = np.array([[-200, 100, 100, 0], [100, -200, 0, 100], [100, 0, -200, 100], [0, 100, 100, -200]], float)
w = np.linalg.eigvalsh(m)
close("stiff eigenvalues", np.sort(w), [-400, -200, -200, 0], 1e-13)
em = linalg.expm(m)
out["stiff-exponential"] = {"eigenvalues": np.sort(w).tolist(),
                            "scipy_expm_max_rel_error": float(np.max(np.abs(em - 0.25)) / 0.25)}

# random-walk-riccati: A = C = 1, P⁻ = (q + √(q² + 4qr))/2, K = P⁻/(P⁻ + r).
q = r = 1.0
p = linalg.solve_discrete_are(np.eye(1), np.eye(1), np.array([[q]]), np.array([[r]]))[0, 0]
close("random walk P⁻", p, (q + np.sqrt(q * q + 4 * q * r)) / 2, 1e-14)
out["random-walk-riccati"] = {"q": q, "r": r, "p_prior": float(p), "k": float(p / (p + r))}

# darex: the closed-form solutions of DAREX examples 1, 5, 12 and 15 against
# scipy.linalg.solve_discrete_are; example 3 (R = 0, which scipy refuses) by
# its residual, with (R + BᵀXB) = 1 invertible.
def dare_residual(a, b, q, r, x):
    return a.T @ x @ a - x + q - a.T @ x @ b @ np.linalg.solve(r + b.T @ x @ b, b.T @ x @ a)


golden = (1 + np.sqrt(5)) / 2
darex = [
    ("1", [[4, 3], [-4.5, -3.5]], [[1], [-1]], [[9, 6], [6, 4]], [[1]], golden * np.array([[9, 6], [6, 4]])),
    ("5", [[0, 1], [0, 0]], [[0], [1]], [[1, 2], [2, 4]], [[1]], [[1, 2], [2, 2 + np.sqrt(5)]]),
    ("12, d = 100", [[0, 100], [0, 0]], [[0], [1]], np.eye(2), [[1]], np.diag([1, 1 + 100**2])),
    ("15, n = 5", np.eye(5, k=1), np.eye(5)[:, 4:], np.eye(5), [[1]], np.diag([1.0, 2, 3, 4, 5])),
]
for name, a, b, q, r, x in darex:
    a, b, q, r, x = (np.array(v, float) for v in (a, b, q, r, x))
    close("DAREX " + name, linalg.solve_discrete_are(a, b, q, r), x, 1e-9)
a3, b3 = np.array([[2.0, -1], [1, 0]]), np.array([[1.0], [0]])
close("DAREX 3 residual", dare_residual(a3, b3, np.diag([0.0, 1]), np.zeros((1, 1)), np.eye(2)), np.zeros((2, 2)), 1e-15)
out["darex"] = {"checked": [name for name, *_ in darex] + ["3 (residual)"]}

# double-integrator-placement: C = [1, 0], poles p1, p2:
# L_p = [2 − p1 − p2, (1 − p1)(1 − p2)/T], L_c = [1 − p1·p2, (1 − p1)(1 − p2)/T].
ts, p1, p2 = 0.1, 0.5, 0.5
a = np.array([[1, ts], [0, 1]])
c = np.array([[1.0, 0.0]])
lp = np.array([[2 - p1 - p2], [(1 - p1) * (1 - p2) / ts]])
lc = np.array([[1 - p1 * p2], [(1 - p1) * (1 - p2) / ts]])
close("A − L_p·C poles", np.sort(np.linalg.eigvals(a - lp @ c).real), [p1, p2], 1e-7)
close("A − L_c·C·A poles", np.sort(np.linalg.eigvals(a - lc @ c @ a).real), [p1, p2], 1e-7)
close("characteristic polynomial of A − L_p·C", np.poly(a - lp @ c), np.poly([p1, p2]), 1e-14)
close("characteristic polynomial of A − L_c·C·A", np.poly(a - lc @ c @ a), np.poly([p1, p2]), 1e-14)
# example-current-observer: the error of estimator's ExampleNewFilter,
# e(k) = (A − L_c·C·A)·e(k−1) from e(0) = [0.25, −2], at k = 10.
e = np.linalg.matrix_power(a - lc @ c @ a, 10) @ np.array([0.25, -2.0])
out["example-current-observer"] = {"e0": [0.25, -2.0], "e10": e.tolist()}
out["double-integrator-placement"] = {"ts": ts, "poles": [p1, p2], "lp": lp.ravel().tolist(), "lc": lc.ravel().tolist()}

# chi2-table: quantiles printed in the NIST/SEMATECH table, recomputed.
table = []
for df in (1, 2, 3, 4):
    for prob in (0.95, 0.99, 0.999):
        table.append({"df": df, "prob": prob, "quantile": float(stats.chi2.ppf(prob, df))})
for df in (1, 6):
    for prob in (0.025, 0.975):
        table.append({"df": df, "prob": prob, "quantile": float(stats.chi2.ppf(prob, df))})
out["chi2-table"] = table

# nis-band: the two-sided 95 % band of the mean NIS over N ticks of m outputs:
# N·mean is χ²(N·m), so the band is chi2.ppf([0.025, 0.975], N·m)/N.
out["nis-band"] = [{"n": n, "dof": d, "band": (stats.chi2.ppf([0.025, 0.975], n * d) / n).tolist()}
                   for n, d in [(50, 1), (100, 3), (3, 2)]]

# pbh-weak-mode: σ_min of [λI − A; C] for A = diag(0.9, 0.5), C = [1, 1e-8],
# λ = 0.5, scaled by ‖A‖₂ + |λ| + ‖C‖₂ as estimator.CheckObservability does.
a = np.diag([0.9, 0.5])
c = np.array([[1.0, 1e-8]])
lam = 0.5
sv = np.linalg.svd(np.vstack([lam * np.eye(2) - a, c]), compute_uv=False)
scale = np.linalg.norm(a, 2) + abs(lam) + np.linalg.norm(c, 2)
out["pbh-weak-mode"] = {"sigma_min": float(sv[-1]), "scale": float(scale), "scaled": float(sv[-1] / scale)}

path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "closedforms.json")
with open(path, "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
print("wrote", path)
