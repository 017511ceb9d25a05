#!/usr/bin/python3
"""Reference values for the commissioning checks, written to commissioning.json.

Rerun from the repository root:  /usr/bin/python3 testdata/reference/commissioning.py
(Debian's python3-numpy and python3-scipy; the output is deterministic.)

1. ljung_box: a committed series (an AR(1), phi = 0.3, and a white one, both from numpy's
   seeded generator), their autocorrelations at lags 1..10, the Ljung-Box statistic
   Q = n(n+2) sum rho_k^2/(n-k) (Ljung and Box, Biometrika 65(2), 1978) and its p-value from
   scipy.stats.chi2.sf with 10 degrees of freedom.
2. als: autocovariance least squares (Odelson, Rajamani and Rawlings, Automatica 42(2), 2006)
   on an invented two-state, two-output example: the script simulates the plant with known Q and
   R, runs a prediction-form filter with a fixed, deliberately suboptimal gain L, commits the
   innovations, and solves the ALS system built with the paper's Kronecker-product form
   (vec P = (I - Abar kron Abar)^-1 vec(Q + L R L')), by numpy.linalg.lstsq, unconstrained.
3. cusum: the in-control and shifted average run lengths of the two-sided tabular CUSUM with
   k = 0.5, h = 4 and h = 5 (and h = 10, Surmise's default), by the Markov chain of Brook and Evans (Biometrika 59(3), 1972),
   one-sided chains combined as 1/ARL = 1/ARL+ + 1/ARL-, and by Siegmund's approximation; and
   the same chain for the CUSUM Surmise runs, whose normalised innovation is first limited to
   [-3, 3] so that a lone spike cannot raise an alarm (arl_markov_clip3).
"""
import json
import numpy as np
from scipy import stats


def autocorr(x, lags):
    x = np.asarray(x, float)
    d = x - x.mean()
    c0 = np.dot(d, d)
    return [float(np.dot(d[:-k], d[k:]) / c0) for k in range(1, lags + 1)]


def ljung_box(x, lags=10):
    n = len(x)
    rho = np.array(autocorr(x, lags))
    q = n * (n + 2) * np.sum(rho ** 2 / (n - np.arange(1, lags + 1)))
    return rho.tolist(), float(q), float(stats.chi2.sf(q, lags))


def lb_section():
    rng = np.random.default_rng(20261204)
    n = 300
    e = rng.standard_normal(n)
    ar = np.zeros(n)
    for t in range(n):
        ar[t] = (0.3 * ar[t - 1] if t else 0.0) + e[t]
    white = rng.standard_normal(n)
    out = []
    for name, x in (("ar1_phi0.3", ar), ("white", white)):
        x = np.array([float(f"{v:.7g}") for v in x])  # committed to 7 digits, used as committed
        rho, q, p = ljung_box(x)
        out.append({"name": name, "series": [float(v) for v in x], "lags": 10,
                    "rho": rho, "q": q, "p": p})
    return out


def als_model_columns(A, C, L, lags, full):
    n = A.shape[0]
    p = C.shape[0]
    Abar = A - L @ C
    params = []
    for proc, size in ((True, n), (False, p)):
        for i in range(size):
            for j in range(i, size):
                if i == j or full:
                    params.append((proc, i, j))
    K = np.linalg.inv(np.eye(n * n) - np.kron(Abar, Abar))
    cols = []
    for proc, i, j in params:
        Q = np.zeros((n, n))
        R = np.zeros((p, p))
        M = Q if proc else R
        M[i, j] = 1.0
        M[j, i] = 1.0
        src = Q + L @ R @ L.T
        P = (K @ src.reshape(-1, order="F")).reshape((n, n), order="F")
        col = []
        C0 = C @ P @ C.T + R
        col += [C0[a, b] for a in range(p) for b in range(a, p)]
        for k in range(1, lags):
            Ck = C @ np.linalg.matrix_power(Abar, k) @ P @ C.T - C @ np.linalg.matrix_power(Abar, k - 1) @ L @ R
            col += [Ck[a, b] for a in range(p) for b in range(p)]
        cols.append(col)
    return params, np.array(cols).T


def als_section():
    rng = np.random.default_rng(7)
    A = np.array([[0.9, 0.2], [0.0, 0.7]])
    C = np.array([[1.0, 0.0], [0.5, 1.0]])
    Q = np.array([[0.04, 0.01], [0.01, 0.09]])
    R = np.array([[0.25, 0.0], [0.0, 0.16]])
    L = np.array([[0.3, 0.1], [0.0, 0.2]])  # fixed, not the Kalman gain
    T = 4000
    x = np.zeros(2)
    xh = np.zeros(2)
    wq = np.linalg.cholesky(Q)
    vr = np.linalg.cholesky(R)
    innov = np.zeros((T, 2))
    for t in range(T):
        y = C @ x + vr @ rng.standard_normal(2)
        r = y - C @ xh
        r = np.array([float(f"{v:.7g}") for v in r])  # committed to 7 digits, used as committed
        innov[t] = r
        xh = A @ xh + L @ r
        x = A @ x + wq @ rng.standard_normal(2)
    lags = 8
    out = {"A": A.tolist(), "C": C.tolist(), "L": L.tolist(), "Q_true": Q.tolist(), "R_true": R.tolist(),
           "lags": lags, "innovations": [[float(v) for v in innov[:, j]] for j in range(2)], "cases": []}
    for full in (False, True):
        params, M = als_model_columns(A, C, L, lags, full)
        b = []
        C0 = innov.T @ innov / T
        b += [0.5 * (C0[a, c] + C0[c, a]) for a in range(2) for c in range(a, 2)]
        for k in range(1, lags):
            Ck = innov[k:].T @ innov[:-k] / (T - k)
            b += [Ck[a, c] for a in range(2) for c in range(2)]
        theta = np.linalg.lstsq(M, np.array(b), rcond=None)[0]
        out["cases"].append({"full": full, "params": [[int(pr), i, j] for pr, i, j in params],
                             "theta": theta.tolist(), "rank": int(np.linalg.matrix_rank(M))})
    return out


def cusum_arl_markov(h, k, shift, one_sided_upper=True, m=400, clip=None):
    """Brook and Evans: the CUSUM C+ = max(0, C + z - k) on [0, h) discretised in m states.
    With clip, z is first limited to [-clip, clip] (the increment's distribution gets point
    masses at the ends)."""
    w = 2.0 * h / (2 * m - 1)  # state 0 is C = 0; state i (i>=1) is centred at i*w
    centres = np.arange(m) * w
    mu = shift if one_sided_upper else -shift
    Pm = np.zeros((m, m))
    for i, c in enumerate(centres):
        # next = max(0, c + z - k); state 0 collects next <= w/2
        base = c - k + mu

        def cdf(a):
            # P(c - k + clip(z + mu) <= a + base - mu ... ) written for the increment z + mu
            v = stats.norm.cdf(a)
            if clip is not None:
                # z + mu is clipped to [-clip, clip]: P(clipped <= t) is 0 below -clip, 1 at or above clip
                t = a + mu
                v = np.where(t < -clip, 0.0, np.where(t >= clip, 1.0, v))
            return v
        Pm[i, 0] = cdf(w / 2 - base)
        upper = (np.arange(1, m) + 0.5) * w - base
        lower = (np.arange(1, m) - 0.5) * w - base
        Pm[i, 1:] = cdf(upper) - cdf(lower)
    arl = np.linalg.solve(np.eye(m) - Pm, np.ones(m))
    return float(arl[0])


def siegmund(h, k, shift):
    b = h + 1.166
    d = shift - k
    if abs(d) < 1e-12:
        return b * b
    return (np.exp(-2 * d * b) + 2 * d * b - 1) / (2 * d * d)


def cusum_section():
    rows = []
    for h in (4.0, 5.0, 10.0):
        for shift in (0.0, 0.5, 1.0, 2.0):
            up = cusum_arl_markov(h, 0.5, shift, True)
            dn = cusum_arl_markov(h, 0.5, shift, False)
            two = 1.0 / (1.0 / up + 1.0 / dn)
            su, sd = siegmund(h, 0.5, shift), siegmund(h, 0.5, -shift)
            cu = cusum_arl_markov(h, 0.5, shift, True, clip=3.0)
            cd = cusum_arl_markov(h, 0.5, shift, False, clip=3.0)
            rows.append({"h": h, "k": 0.5, "shift": shift, "arl_markov": two,
                         "arl_siegmund": float(1.0 / (1.0 / su + 1.0 / sd)),
                         "arl_markov_clip3": 1.0 / (1.0 / cu + 1.0 / cd)})
    return rows


def main():
    out = {"ljung_box": lb_section(), "als": als_section(), "cusum": cusum_section()}
    with open("testdata/reference/commissioning.json", "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
