#!/usr/bin/python3
"""Reference values for estimator/riccati.go (DARE, Lyapunov, steady-state Kalman).

Run from the repository root with Debian's python3 and python3-scipy:

    /usr/bin/python3 testdata/reference/riccati.py

It writes testdata/reference/riccati.json with three lists:

  "dare"      DAREX examples without a closed-form solution (Benner, Laub,
              Mehrmann 1995), with the data as printed in scipy's own
              linalg/tests/test_solvers.py, and X from
              scipy.linalg.solve_discrete_are. "decimals" is the number of
              decimals to which scipy's test requires the residual of X to
              vanish; the script checks it before writing.
  "lyapunov"  X = A X A' + Q from scipy.linalg.solve_discrete_lyapunov for
              Schur-stable A drawn from fixed seeds (one normal-ish, one with a
              complex pair and one strongly non-normal), Q symmetric positive
              semidefinite; the residual is checked before writing.
  "kalman"    steady-state Kalman filters: P from
              solve_discrete_are(A', C', Q, R), S = C P C' + R, Lc = P C' S^-1,
              Lp = A Lc, P+ = (I - Lc C) P (I - Lc C)' + Lc R Lc'.
"""
import json
import os

import numpy as np
import scipy
from scipy import linalg


def dare_residual(a, b, q, r, x):
    res = a.T @ x @ a - x + q
    res -= a.T @ x @ b @ linalg.solve(r + b.T @ x @ b, b.T @ x @ a)
    return res


DAREX = [
    # (name, a, b, q, r, decimals as in scipy's test_solvers.py)
    ("darex2",
     [[0.9512, 0], [0, 0.9048]],
     [[4.877, 4.877], [-1.1895, 3.569]],
     [[0.005, 0], [0, 0.02]],
     [[1 / 3, 0], [0, 3]],
     16),
    ("darex6",
     [[0.998, 0.067, 0, 0],
      [-.067, 0.998, 0, 0],
      [0, 0, 0.998, 0.153],
      [0, 0, -.153, 0.998]],
     [[0.0033, 0.0200],
      [0.1000, -.0007],
      [0.0400, 0.0073],
      [-.0028, 0.1000]],
     [[1.87, 0, 0, -0.244],
      [0, 0.744, 0.205, 0],
      [0, 0.205, 0.589, 0],
      [-0.244, 0, 0, 1.048]],
     np.eye(2).tolist(),
     13),
    ("darex7",
     [[0.984750, -.079903, 0.0009054, -.0010765],
      [0.041588, 0.998990, -.0358550, 0.0126840],
      [-.546620, 0.044916, -.3299100, 0.1931800],
      [2.662400, -.100450, -.9245500, -.2632500]],
     [[0.0037112, 0.0007361],
      [-.0870510, 9.3411e-6],
      [-1.198440, -4.1378e-4],
      [-3.192700, 9.2535e-4]],
     (np.eye(4) * 1e-2).tolist(),
     np.eye(2).tolist(),
     14),
    ("darex9",
     (np.array([[95.4070, 1.9643, 0.3597, 0.0673, 0.0190],
                [40.8490, 41.3170, 16.0840, 4.4679, 1.1971],
                [12.2170, 26.3260, 36.1490, 15.9300, 12.3830],
                [4.1118, 12.8580, 27.2090, 21.4420, 40.9760],
                [0.1305, 0.5808, 1.8750, 3.6162, 94.2800]]) * 0.01).tolist(),
     (np.array([[0.0434, -0.0122],
                [2.6606, -1.0453],
                [3.7530, -5.5100],
                [3.6076, -6.6000],
                [0.4617, -0.9148]]) * 0.01).tolist(),
     np.eye(5).tolist(),
     np.eye(2).tolist(),
     13),
]


def dare_cases():
    out = []
    for name, a, b, q, r, dec in DAREX:
        a, b, q, r = (np.array(v, dtype=float) for v in (a, b, q, r))
        x = linalg.solve_discrete_are(a, b, q, r)
        assert np.abs(dare_residual(a, b, q, r, x)).max() < 1.5 * 10.0 ** -dec, name
        k = linalg.solve(r + b.T @ x @ b, b.T @ x @ a)
        assert np.abs(np.linalg.eigvals(a - b @ k)).max() < 1, name
        out.append({"name": name, "a": a.tolist(), "b": b.tolist(), "q": q.tolist(),
                    "r": r.tolist(), "x": x.tolist(), "decimals": dec})
    return out


def stable(rng, n, rho):
    a = rng.standard_normal((n, n))
    return a * (rho / np.abs(np.linalg.eigvals(a)).max())


def lyapunov_cases():
    cases = []
    rng = np.random.default_rng(20240611)
    a = stable(rng, 4, 0.9)
    g = rng.standard_normal((4, 4))
    cases.append(("random4", a, g @ g.T))

    rng = np.random.default_rng(7)
    # A rotation by 0.3 rad with modulus 0.97 and two real modes.
    c, s = 0.97 * np.cos(0.3), 0.97 * np.sin(0.3)
    t = rng.standard_normal((4, 4))
    a = t @ np.array([[c, -s, 0, 0], [s, c, 0, 0], [0, 0, 0.5, 0], [0, 0, 0, -0.2]]) @ np.linalg.inv(t)
    g = rng.standard_normal((4, 2))
    cases.append(("complex-pair", a, g @ g.T))  # rank-2 Q

    # Strongly non-normal: a Jordan-like chain with large coupling.
    a = np.array([[0.95, 10.0, 0.0], [0.0, 0.95, 10.0], [0.0, 0.0, 0.95]])
    cases.append(("non-normal", a, np.diag([1.0, 0.5, 2.0])))

    out = []
    for name, a, q in cases:
        x = linalg.solve_discrete_lyapunov(a, q)
        res = a @ x @ a.T + q - x
        assert np.abs(res).max() <= 1e-10 * np.abs(x).max(), name
        out.append({"name": name, "a": a.tolist(), "q": q.tolist(), "x": x.tolist()})
    return out


def kalman_cases():
    cases = []
    # Three states, two outputs, drawn from a fixed seed.
    rng = np.random.default_rng(31)
    a = stable(rng, 3, 1.02)  # slightly unstable plant: the filter must stabilise it
    c = rng.standard_normal((2, 3))
    g = rng.standard_normal((3, 3))
    q = g @ g.T * 0.1
    r = np.array([[0.5, 0.1], [0.1, 0.3]])
    cases.append(("random3x2", a, c, q, r))
    # Sampled double integrator, T = 0.1, white acceleration q = 2, position
    # measured with variance 0.01 (Q_d closed form, SOURCES.md: double-integrator).
    ts, qc = 0.1, 2.0
    a = np.array([[1, ts], [0, 1]])
    c = np.array([[1.0, 0.0]])
    q = qc * np.array([[ts ** 3 / 3, ts ** 2 / 2], [ts ** 2 / 2, ts]])
    cases.append(("double-integrator", a, c, q, np.array([[0.01]])))

    out = []
    for name, a, c, q, r in cases:
        p = linalg.solve_discrete_are(a.T, c.T, q, r)
        s = c @ p @ c.T + r
        lc = p @ c.T @ np.linalg.inv(s)
        lp = a @ lc
        ilc = np.eye(a.shape[0]) - lc @ c
        pplus = ilc @ p @ ilc.T + lc @ r @ lc.T
        assert np.abs(np.linalg.eigvals(a - lp @ c)).max() < 1, name
        out.append({"name": name, "a": a.tolist(), "c": c.tolist(), "q": q.tolist(),
                    "r": r.tolist(), "p": p.tolist(), "pplus": pplus.tolist(),
                    "s": s.tolist(), "lc": lc.tolist(), "lp": lp.tolist()})
    return out


def main():
    doc = {
        "generator": "testdata/reference/riccati.py",
        "scipy": scipy.__version__,
        "numpy": np.__version__,
        "dare": dare_cases(),
        "lyapunov": lyapunov_cases(),
        "kalman": kalman_cases(),
    }
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "riccati.json")
    with open(path, "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
