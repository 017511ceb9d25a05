#!/usr/bin/python3
"""The invented 40-litre pilot hot-water loop: derivation, checks and the discrete variant.

Run from the repository root with Debian's python3 (numpy, scipy, yaml):

    /usr/bin/python3 testdata/plants/hotwater_loop.py

It
  1. derives the linear continuous model from the energy balances of hotwater-loop.md with the
     invented numbers listed below, and prints every intermediate value;
  2. checks that the matrices written by hand in hotwater-loop.yaml are these values rounded to
     four significant digits, and that the noise and operating point there are the ones below;
  3. checks observability of (A, C), of the discretised (Ad, C) and of (Ad, C·Ad) with numpy's rank;
  4. discretises the model as written in hotwater-loop.yaml at its sample time (zero-order hold
     with scipy.linalg.expm, process noise by Van Loan's method, cross-checked by quadrature)
     and writes hotwater-loop-discrete.yaml, the discrete variant the config tests parse and
     compare with the Go discretisation of the continuous file.
All numbers are ours and invented, for demos and tests only.
"""
import os
import sys

import numpy as np
import scipy
import yaml
from scipy import integrate, linalg

HERE = os.path.dirname(os.path.abspath(__file__))

# --- invented physical numbers (units in the comments) ---------------------------------------
RHO_CP = 4.18      # kJ/(L·K), volumetric heat capacity of water (from memory; a round number of ours)
VOLUME = 40.0      # L, water in the tank
C_VESSEL = 4.8     # kJ/K, stainless vessel wall that follows the water temperature
C_E = 1.8          # kJ/K, heater element (sheath, insulation, coil)
C_W = 6.0          # kJ/K, exchanger plates plus the hot-side water they hold
FLOW = 0.2         # L/s, pump flow tank → exchanger → tank
UA_H = 1.2         # kW/K, hot-side conductance of the plate exchanger
G_C = 0.15         # kW/K, effective conductance wall → cooling circuit
G_A = 0.010        # kW/K, tank losses to the room
T_C = 15.0         # °C, cooling-water inlet temperature (held by the utility)
T_A = 20.0         # °C, room temperature
K_E = 0.085        # kW/K^1.25, element free-convection coefficient: Q = K_E·(T_e − T_t)^1.25
P0 = 6.0           # kW, heater power at the operating point
TS = 1.0           # s, sample time

# process-noise intensities (square roots of the spectral densities), per state
Q_STD = [0.02, 0.002, 0.01, 0.0005]  # K/√s, K/√s, K/√s, kW/√s
R_STD = [0.05, 0.05]                 # K, per sample


def sig4(x):
    return float(f"{x:.4g}")


def derive():
    c_t = VOLUME * RHO_CP + C_VESSEL
    w = FLOW * RHO_CP                      # kW/K, heat-capacity rate of the loop flow
    eps = 1 - np.exp(-UA_H / w)            # hot-side effectiveness with a uniform wall
    a_hw = w * eps                         # kW/K, tank water → wall through the exchanger
    # equilibrium with d = 0: wall balance and total balance, linear in T_t, T_w
    m = np.array([[G_A, G_C], [a_hw, -(a_hw + G_C)]])
    rhs = np.array([P0 + G_A * T_A + G_C * T_C, -G_C * T_C])
    t_t, t_w = np.linalg.solve(m, rhs)
    dt_e = (P0 / K_E) ** (1 / 1.25)
    t_e = t_t + dt_e
    t_x = t_t - eps * (t_t - t_w)
    g_e = 1.25 * K_E * dt_e ** 0.25        # kW/K, slope of the element law at the operating point
    a = np.array([
        [-g_e / C_E, g_e / C_E, 0, 0],
        [g_e / c_t, -(g_e + a_hw + G_A) / c_t, a_hw / c_t, -1 / c_t],
        [0, a_hw / C_W, -(a_hw + G_C) / C_W, 0],
        [0, 0, 0, 0],
    ])
    b = np.array([[1 / C_E], [0], [0], [0]])
    c = np.array([[0, 1, 0, 0], [0, 1 - eps, eps, 0]])
    vals = dict(c_t=c_t, w=w, eps=eps, a_hw=a_hw, t_t=t_t, t_w=t_w, t_e=t_e, t_x=t_x,
                dt_e=dt_e, g_e=g_e)
    return vals, a, b, c


def obs_rank(a, c):
    n = a.shape[0]
    o = np.vstack([c @ np.linalg.matrix_power(a, k) for k in range(n)])
    return np.linalg.matrix_rank(o), np.linalg.svd(o, compute_uv=False)


def fmt(x):
    return repr(float(x))


def main():
    vals, a, b, c = derive()
    print(f"numpy {np.__version__}, scipy {scipy.__version__}")
    for k, v in vals.items():
        print(f"{k:6s} = {v:.6g}")
    np.set_printoptions(precision=6, suppress=False, linewidth=120)
    print("A =\n", a)
    print("B =\n", b)
    print("C =\n", c)
    ev = np.linalg.eigvals(a)
    print("eigenvalues of A:", np.sort_complex(ev))
    print("time constants (s):", sorted(-1 / e.real for e in ev if abs(e) > 1e-12))

    with open(os.path.join(HERE, "hotwater-loop.yaml")) as f:
        plant = yaml.safe_load(f)
    am = np.array(plant["model"]["A"], dtype=float)
    bm = np.array(plant["model"]["B"], dtype=float)
    cm = np.array(plant["model"]["C"], dtype=float)
    ok = True
    for name, got, want in (("A", am, a), ("B", bm, b), ("C", cm, c)):
        want4 = np.vectorize(sig4)(want)
        if not np.array_equal(got, want4):
            print(f"hotwater-loop.yaml: {name} is\n{got}\nwant (4 significant digits)\n{want4}")
            ok = False
    if plant["noise"]["process"]["std"] != Q_STD or plant["noise"]["measurement"]["std"] != R_STD:
        print("hotwater-loop.yaml: noise differs from the script")
        ok = False
    nominal = [s["nominal"] for s in plant["states"]]
    want_nom = [round(vals["t_e"], 1), round(vals["t_t"], 1), round(vals["t_w"], 1), 0]
    if nominal != want_nom:
        print(f"hotwater-loop.yaml: state nominals {nominal}, want {want_nom}")
        ok = False
    if not ok:
        sys.exit(1)

    ts = TS
    assert plant["model"]["sample"] == "1s"
    n, m = bm.shape
    r, sv = obs_rank(am, cm)
    print(f"rank of the observability matrix of (A, C): {r} of {n}; singular values {sv}")
    aug = np.zeros((n + m, n + m))
    aug[:n, :n] = am
    aug[:n, n:] = bm
    e = linalg.expm(aug * ts)
    ad, bd = e[:n, :n], e[:n, n:]
    r_d, sv_d = obs_rank(ad, cm)
    r_c, sv_c = obs_rank(ad, cm @ ad)
    print(f"rank for (Ad, C): {r_d}, for (Ad, C·Ad): {r_c}; smallest singular values {sv_d[-1]:.3g}, {sv_c[-1]:.3g}")
    assert r == n and r_d == n and r_c == n, "not observable"

    qc = np.diag(np.square(Q_STD))
    vl = np.zeros((2 * n, 2 * n))
    vl[:n, :n] = -am
    vl[:n, n:] = qc
    vl[n:, n:] = am.T
    f = linalg.expm(vl * ts)
    qd = f[n:, n:].T @ f[:n, n:]
    qd = (qd + qd.T) / 2
    quad, _ = integrate.quad_vec(lambda s: linalg.expm(am * s) @ qc @ linalg.expm(am.T * s), 0, ts,
                                 epsrel=1e-13)
    rel = np.max(np.abs(qd - quad)) / np.max(np.abs(quad))
    print(f"Van Loan against quadrature: relative difference {rel:.2e}")
    assert rel < 1e-9
    print("Ad =\n", ad)
    print("Bd =\n", bd)
    print("Qd =\n", qd)
    print("eigenvalues of Ad:", np.sort_complex(np.linalg.eigvals(ad)))

    out = []
    w = out.append
    w("# The invented pilot hot-water loop as a discrete model: hotwater-loop.yaml discretised at 1 s")
    w("# (zero-order hold, Van Loan for the process noise) with scipy.linalg.expm.")
    w("# Generated by testdata/plants/hotwater_loop.py; do not edit, rerun it:")
    w("#   /usr/bin/python3 testdata/plants/hotwater_loop.py")
    w(f"# numpy {np.__version__}, scipy {scipy.__version__}. Invented numbers, for demos and tests only.")
    w("name: hotwater-loop-discrete")
    w("model:")
    w("  time: discrete")
    w("  sample: 1s")
    for name, mat in (("A", ad), ("B", bd), ("C", cm)):
        w(f"  {name}:")
        for row in mat:
            w("    - [" + ", ".join(fmt(x) for x in row) + "]")
    # states, inputs, outputs and initial are copied verbatim from the continuous file
    for section in ("states", "inputs", "outputs"):
        w(yaml.safe_dump({section: plant[section]}, sort_keys=False, default_flow_style=None).rstrip())
    w("noise:")
    w("  process:")
    w("    time: discrete")
    w("    covariance:")
    for row in qd:
        w("      - [" + ", ".join(fmt(x) for x in row) + "]")
    w("  measurement:")
    w("    std: [" + ", ".join(fmt(x) for x in R_STD) + "]")
    w(yaml.safe_dump({"initial": plant["initial"]}, sort_keys=False, default_flow_style=None).rstrip())
    w("gains: hotwater-loop-discrete.gains.yaml")
    w("window: 100")
    with open(os.path.join(HERE, "hotwater-loop-discrete.yaml"), "w") as f:
        f.write("\n".join(out) + "\n")
    print("wrote testdata/plants/hotwater-loop-discrete.yaml")


if __name__ == "__main__":
    main()
