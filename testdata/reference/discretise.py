#!/usr/bin/python3
"""Reference values for estimator.Discretise (zero-order hold and Van Loan).

Run from the repository root with Debian's python3 and python3-scipy:

    /usr/bin/python3 testdata/reference/discretise.py

It writes testdata/reference/discretise.json. For each case it draws a
continuous-time system from a fixed seed and computes, with scipy 1.10:
  Ad, Bd  from scipy.linalg.expm of [[A, B], [0, 0]]·T, cross-checked against
          scipy.signal.cont2discrete(method="zoh");
  Qd      the integral ∫₀ᵀ e^{As} Qc e^{A's} ds evaluated by adaptive quadrature
          (scipy.integrate.quad_vec, relative tolerance 1e-13), written as "qd";
          and, as Van Loan's method computes it, from one scipy.linalg.expm of
          the block matrix [[-A, Qc], [0, A']]·T (Qd = F22'·F12, symmetrised),
          written as "qd_vanloan". The two agree to 1e-9 of the largest entry; with a long
          sample and fast stable modes the single exponential loses digits
          (F12 grows like e^{-A·T} and F22'·F12 cancels), which is why the Go
          code scales the interval down before Van Loan and doubles it back,
          and why the Go test compares with the quadrature value.
"""
import json
import os

import numpy as np
import scipy
from scipy import integrate, linalg, signal


def case(name, seed, n, m, ts, shift):
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((n, n)) - shift * np.eye(n)
    b = rng.standard_normal((n, m))
    g = rng.standard_normal((n, n))
    qc = g @ g.T  # symmetric positive definite spectral density

    aug = np.zeros((n + m, n + m))
    aug[:n, :n] = a
    aug[:n, n:] = b
    e = linalg.expm(aug * ts)
    ad, bd = e[:n, :n], e[:n, n:]

    vl = np.zeros((2 * n, 2 * n))
    vl[:n, :n] = -a
    vl[:n, n:] = qc
    vl[n:, n:] = a.T
    f = linalg.expm(vl * ts)
    qd = f[n:, n:].T @ f[:n, n:]
    qd = (qd + qd.T) / 2

    # Independent cross-checks before anything is written.
    ad2, bd2, *_ = signal.cont2discrete((a, b, np.eye(n), np.zeros((n, m))), ts, method="zoh")
    assert np.allclose(ad, ad2, rtol=1e-12, atol=1e-14), name
    assert np.allclose(bd, bd2, rtol=1e-12, atol=1e-14), name
    q3, err = integrate.quad_vec(lambda s: linalg.expm(a * s) @ qc @ linalg.expm(a.T * s), 0, ts,
                                 epsabs=0, epsrel=1e-13)
    q3 = (q3 + q3.T) / 2
    assert err <= 1e-12 * np.abs(q3).max(), name
    assert np.abs(qd - q3).max() <= 1e-9 * np.abs(q3).max(), name
    assert np.abs(f[n:, n:].T - ad).max() <= 1e-11 * np.abs(ad).max(), name

    return {
        "name": name, "seed": seed, "ts": ts,
        "a": a.tolist(), "b": b.tolist(), "qc": qc.tolist(),
        "ad": ad.tolist(), "bd": bd.tolist(), "qd": q3.tolist(), "qd_vanloan": qd.tolist(),
    }


def main():
    cases = [
        case("random 5 states, 2 inputs", 20240601, 5, 2, 0.1, 1.0),
        case("random 5 states, 2 inputs, long sample", 20240602, 5, 2, 2.0, 2.0),
        case("random 5 states, 2 inputs, unstable", 20240603, 5, 2, 0.5, -0.5),
    ]
    out = {
        "source": "testdata/reference/discretise.py, scipy %s, numpy %s" % (scipy.__version__, np.__version__),
        "cases": cases,
    }
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "discretise.json")
    with open(path, "w") as fh:
        json.dump(out, fh, indent=1)
        fh.write("\n")


if __name__ == "__main__":
    main()
