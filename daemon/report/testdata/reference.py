#!/usr/bin/python3
"""Reference values for daemon/report's tests, computed with numpy and scipy.

Rerun from the repository root with Debian's Python (python3-scipy):

    /usr/bin/python3 daemon/report/testdata/reference.py > daemon/report/testdata/reference.json

The sequences are drawn here, with a fixed seed, and written out in full, so
the Go tests read the same numbers and compare their statistics with the ones
numpy computes below, independently of the Go code.
"""
import json
import sys

import numpy as np
import scipy
from scipy import stats

LAGS = 10


def autocorr(r):
    """Normalised autocorrelation at lags 1..LAGS of the values present
    (NaNs left out, the rest taken in order), mean removed."""
    x = r[~np.isnan(r)]
    d = x - x.mean()
    c0 = np.sum(d ** 2)
    return [float(np.sum(d[:-lag] * d[lag:]) / c0) for lag in range(1, LAGS + 1)]


def output_stats(r):
    x = r[~np.isnan(r)]
    rho = autocorr(r)
    bound = 1.96 / np.sqrt(len(x))
    return {
        "n": int(len(x)),
        "mean": float(x.mean()),
        "rms": float(np.sqrt(np.mean(x ** 2))),
        "autocorr": rho,
        "bound": float(bound),
        "outside": int(np.sum(np.abs(rho) > bound)),
    }


def nan_to_none(a):
    return [None if np.isnan(v) else float(v) for v in a]


rng = np.random.default_rng(20240506)

# A white sequence with a tenth of its values missing.
white = rng.standard_normal(5000) * 0.3 + 0.01
white[rng.random(5000) < 0.1] = np.nan

# AR(1) with coefficient 0.6: strongly coloured.
ar = np.empty(3000)
e = rng.standard_normal(3000)
ar[0] = e[0]
for k in range(1, 3000):
    ar[k] = 0.6 * ar[k - 1] + e[k]

# NIS values of ticks with 1, 2 or 3 outputs: chi-square draws with the
# right dof, then scaled by 1.5 on the second half (an overconfident filter).
dof = rng.integers(1, 4, size=4000)
nis = stats.chi2.rvs(dof, random_state=rng)
nis[2000:] *= 1.5
dof[rng.random(4000) < 0.05] = 0  # coasting ticks: no NIS
nis[dof == 0] = np.nan
lo = stats.chi2.ppf(0.025, np.maximum(dof, 1))
hi = stats.chi2.ppf(0.975, np.maximum(dof, 1))
has = dof > 0
in_band = float(np.mean((nis[has] >= lo[has]) & (nis[has] <= hi[has])))

ref = {
    "generator": "daemon/report/testdata/reference.py, numpy %s, scipy %s" % (np.__version__, scipy.__version__),
    "chi2_two_sided_95": {str(k): [float(stats.chi2.ppf(0.025, k)), float(stats.chi2.ppf(0.975, k))] for k in range(1, 5)},
    "binomial_3_of_10_at_0_05": float(stats.binom.sf(2, 10, 0.05)),
    "white": {"values": nan_to_none(white), **output_stats(white)},
    "ar1": {"values": nan_to_none(ar), **output_stats(ar)},
    "nis": {
        "values": nan_to_none(nis),
        "dof": [int(d) for d in dof],
        "ticks": int(np.sum(has)),
        "mean": float(np.mean(nis[has])),
        "mean_dof": float(np.mean(dof[has])),
        "in_band": in_band,
    },
}
json.dump(ref, sys.stdout, indent=1)
sys.stdout.write("\n")
