#!/usr/bin/env python3
"""Reference exchange-correlation values and derivatives for tests/xc.rs,
computed with PySCF's interface to libxc (`pyscf.dft.libxc.eval_xc`).

Usage (from the repository root):
    python3 -m venv /tmp/qcvenv
    /tmp/qcvenv/bin/pip install pyscf==2.14.0
    /tmp/qcvenv/bin/python scripts/reference/xc_values.py

PySCF (PyPI `pyscf`) is used only here, to produce numbers; the Rust tests
never need Python. PySCF ships its own build of libxc, of a different version
than the system libxc that flipswarm links (libxc-dev 5.2.3); both versions are
recorded (`library_version` = PySCF, `libxc_version` = the libxc inside PySCF).

Output:
* tests/data/qc/xc_points.json: the evaluation points, shared by all files.
  - `unpolarized`: `rho[i]`, `sigma[i]` = |grad rho|^2, for points i.
  - `polarized`: `rho[2i+s]` (s = alpha, beta) and
    `sigma[3i+k]` (k = aa, ab, bb; sigma_ab = grad rho_a . grad rho_b),
    the same interleaved layout as libxc. The gradient vectors handed to
    PySCF are stored too (`grad`, per point 3 numbers, or 6 = alpha then beta);
    sigma is computed from them here in double precision, so it may differ
    from the value PySCF forms internally by an ulp, far below the test
    tolerance.
  - `fully_polarized`: indices of the polarised points with rho_beta = 0 (or
    rho_alpha = 0) exactly, with a zero gradient in that channel.
  - `threshold`: indices (in both sets) of points at densities around
    libxc's default density thresholds (1e-17..1e-11), where libxc returns
    exact zeros or clips a spin density.
* tests/data/qc/xc_<functional>.json: for each functional and both spin
  cases, `exc` (energy per particle, libxc's zk, so that the energy density
  per volume is e = (rho_a + rho_b) * exc), `vrho`, `vsigma`, `v2rho2`,
  `v2rhosigma`, `v2sigma2`, each flattened point-major in libxc's layout:
  unpolarised one number per point; polarised vrho (a, b),
  vsigma (aa, ab, bb), v2rho2 (aa, ab, bb), v2rhosigma (a_aa, a_ab, a_bb,
  b_aa, b_ab, b_bb), v2sigma2 (aa_aa, aa_ab, aa_bb, ab_ab, ab_bb, bb_bb).
  LDA-only functionals have no sigma entries. Derivatives are partial
  derivatives of e with respect to rho and sigma (libxc's convention).
  Each file records the xc string given to PySCF, the libxc ids and weights
  PySCF parsed it into, and PySCF's exact-exchange fraction.

Points: seeded (numpy default_rng(20240611)) random densities, log-uniform in
1e-6..1e2 bohr^-3, and reduced gradients s = |grad n| / (2 (3 pi^2)^(1/3)
n^(4/3)) uniform in 0..3 (common practice for the range met in molecules;
in the polarised case s is that of the spin-scaled density n = 2 rho_s, and
the angle between the two spin gradients is random); a few points with zero
gradient, fully polarised points, and a few points around libxc's density
thresholds.
"""
import json
import os

import numpy as np
import pyscf
from pyscf.dft import libxc

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.normpath(os.path.join(HERE, "..", ".."))
OUT = os.path.join(ROOT, "tests", "data", "qc")

SEED = 20240611
N_UNPOL = 150
N_POL = 130  # general spin-polarised points
N_FULL = 10  # fully polarised points per channel (rho_b = 0, then rho_a = 0)

# (file stem, xc string for PySCF, LDA-only?)
FUNCTIONALS = [
    ("bhhlyp", "HYB_GGA_XC_BHANDHLYP", False),
    ("b3lyp", "HYB_GGA_XC_B3LYP", False),
    ("pbe0", "HYB_GGA_XC_PBEH", False),
    ("pbe", "GGA_X_PBE,GGA_C_PBE", False),
    ("lda_x", "LDA_X,", True),
    ("gga_x_b88", "GGA_X_B88,", False),
    ("gga_c_lyp", ",GGA_C_LYP", False),
    ("lda_c_vwn_rpa", ",LDA_C_VWN_RPA", True),
]

CF = 2.0 * (3.0 * np.pi**2) ** (1.0 / 3.0)


def grad_norm(n, s):
    """|grad n| for density n and reduced gradient s."""
    return s * CF * n ** (4.0 / 3.0)


def make_points():
    rng = np.random.default_rng(SEED)
    # unpolarised: gradient along x
    rho_u = 10.0 ** rng.uniform(-6.0, 2.0, N_UNPOL)
    s_u = rng.uniform(0.0, 3.0, N_UNPOL)
    s_u[:4] = 0.0
    g_u = np.zeros((N_UNPOL, 3))
    g_u[:, 0] = grad_norm(rho_u, s_u)
    # around the thresholds (1e-15 for LDA_X, VWN, B88, PBE exchange, 1e-14
    # LYP, 1e-12 PBE correlation in libxc 5.2 and 7.0)
    rho_th = np.array([3e-17, 3e-15, 3e-13, 3e-11])
    g_th = np.zeros((len(rho_th), 3))
    g_th[:, 1] = grad_norm(rho_th, 1.0)
    threshold_u = list(range(N_UNPOL, N_UNPOL + len(rho_th)))
    rho_u = np.concatenate([rho_u, rho_th])
    g_u = np.concatenate([g_u, g_th])
    sigma_u = np.einsum("ix,ix->i", g_u, g_u)

    # polarised: total density log-uniform, zeta uniform in (-1, 1)
    rho_t = 10.0 ** rng.uniform(-6.0, 2.0, N_POL)
    zeta = rng.uniform(-0.98, 0.98, N_POL)
    ra = 0.5 * rho_t * (1.0 + zeta)
    rb = 0.5 * rho_t * (1.0 - zeta)
    sa = rng.uniform(0.0, 3.0, N_POL)
    sb = rng.uniform(0.0, 3.0, N_POL)
    sa[:2] = 0.0
    sb[1:3] = 0.0
    cos = rng.uniform(-1.0, 1.0, N_POL)
    # |grad rho_s| = |grad (2 rho_s)| / 2 at the spin-scaled reduced gradient
    ga = 0.5 * grad_norm(2.0 * ra, sa)
    gb = 0.5 * grad_norm(2.0 * rb, sb)
    grad_a = np.zeros((N_POL, 3))
    grad_b = np.zeros((N_POL, 3))
    grad_a[:, 0] = ga
    grad_b[:, 0] = gb * cos
    grad_b[:, 1] = gb * np.sqrt(1.0 - cos**2)

    # fully polarised: one channel exactly empty
    rf = 10.0 ** rng.uniform(-4.0, 1.0, 2 * N_FULL)
    sf = rng.uniform(0.0, 3.0, 2 * N_FULL)
    gf = 0.5 * grad_norm(2.0 * rf, sf)
    fa = np.where(np.arange(2 * N_FULL) < N_FULL, rf, 0.0)
    fb = np.where(np.arange(2 * N_FULL) < N_FULL, 0.0, rf)
    fga = np.zeros((2 * N_FULL, 3))
    fgb = np.zeros((2 * N_FULL, 3))
    fga[:N_FULL, 0] = gf[:N_FULL]
    fgb[N_FULL:, 2] = gf[N_FULL:]

    # around the thresholds: (rho_a, rho_b)
    th = np.array([[3e-13, 0.0], [3e-17, 3e-17], [3e-12, 3e-16], [2e-14, 2e-14]])
    tga = np.zeros((len(th), 3))
    tgb = np.zeros((len(th), 3))
    tga[:, 0] = 0.5 * grad_norm(2.0 * th[:, 0], 1.0)
    tgb[:, 1] = 0.5 * grad_norm(2.0 * th[:, 1], 1.0)

    ra = np.concatenate([ra, fa, th[:, 0]])
    rb = np.concatenate([rb, fb, th[:, 1]])
    grad_a = np.concatenate([grad_a, fga, tga])
    grad_b = np.concatenate([grad_b, fgb, tgb])
    npol = len(ra)
    full = list(range(N_POL, N_POL + 2 * N_FULL))
    threshold_p = list(range(N_POL + 2 * N_FULL, npol))
    sigma_p = np.stack(
        [
            np.einsum("ix,ix->i", grad_a, grad_a),
            np.einsum("ix,ix->i", grad_a, grad_b),
            np.einsum("ix,ix->i", grad_b, grad_b),
        ],
        axis=1,
    )
    return {
        "unpolarized": {"rho": rho_u, "grad": g_u, "sigma": sigma_u, "threshold": threshold_u},
        "polarized": {
            "rho": np.stack([ra, rb], axis=1),
            "grad": np.concatenate([grad_a, grad_b], axis=1),
            "sigma": sigma_p,
            "fully_polarized": full,
            "threshold": threshold_p,
        },
    }


def flat(a):
    return [float(x) for x in np.asarray(a, dtype=float).reshape(-1)]


def evaluate(xc, lda, pts):
    out = {}
    u = pts["unpolarized"]
    if lda:
        rho = u["rho"][None, :]
    else:
        rho = np.vstack([u["rho"][None, :], u["grad"].T])
    exc, vxc, fxc, _ = libxc.eval_xc(xc, rho, spin=0, deriv=2)
    rec = {"exc": flat(exc), "vrho": flat(vxc[0]), "v2rho2": flat(fxc[0])}
    if not lda:
        rec.update(vsigma=flat(vxc[1]), v2rhosigma=flat(fxc[1]), v2sigma2=flat(fxc[2]))
    out["unpolarized"] = rec

    p = pts["polarized"]
    ra, rb = p["rho"][:, 0], p["rho"][:, 1]
    if lda:
        rho = (ra[None, :], rb[None, :])
    else:
        ga, gb = p["grad"][:, :3], p["grad"][:, 3:]
        rho = (np.vstack([ra[None, :], ga.T]), np.vstack([rb[None, :], gb.T]))
    exc, vxc, fxc, _ = libxc.eval_xc(xc, rho, spin=1, deriv=2)
    # PySCF returns (npoints, ncomponents) arrays: row-major flattening is
    # libxc's interleaved layout.
    rec = {"exc": flat(exc), "vrho": flat(vxc[0]), "v2rho2": flat(fxc[0])}
    if not lda:
        rec.update(vsigma=flat(vxc[1]), v2rhosigma=flat(fxc[1]), v2sigma2=flat(fxc[2]))
    out["polarized"] = rec
    return out


def main():
    pts = make_points()
    common = {
        "generator": "scripts/reference/xc_values.py",
        "library": "pyscf",
        "library_version": pyscf.__version__,
        "libxc_version": libxc.__version__,
        "seed": SEED,
    }
    u, p = pts["unpolarized"], pts["polarized"]
    points = dict(common)
    points.update(
        {
            "unpolarized": {
                "rho": flat(u["rho"]),
                "sigma": flat(u["sigma"]),
                "grad": flat(u["grad"]),
                "threshold": u["threshold"],
            },
            "polarized": {
                "rho": flat(p["rho"]),
                "sigma": flat(p["sigma"]),
                "grad": flat(p["grad"]),
                "fully_polarized": p["fully_polarized"],
                "threshold": p["threshold"],
            },
        }
    )
    path = os.path.join(OUT, "xc_points.json")
    with open(path, "w") as fh:
        json.dump(points, fh, separators=(",", ":"))
        fh.write("\n")
    print(f"{path}: {len(u['rho'])} unpolarised, {len(p['rho'])} polarised points")

    for stem, xc, lda in FUNCTIONALS:
        _, fn_facs = libxc.parse_xc(xc)
        rec = dict(common)
        rec.update(
            {
                "functional": stem,
                "pyscf_xc": xc,
                "libxc_ids": [int(i) for i, _ in fn_facs],
                "weights": [float(w) for _, w in fn_facs],
                "exact_exchange": float(libxc.hybrid_coeff(xc)),
                "family": "LDA" if lda else "GGA",
            }
        )
        rec.update(evaluate(xc, lda, pts))
        path = os.path.join(OUT, f"xc_{stem}.json")
        with open(path, "w") as fh:
            json.dump(rec, fh, separators=(",", ":"))
            fh.write("\n")
        print(f"{path}: ids {rec['libxc_ids']} weights {rec['weights']} exx {rec['exact_exchange']}")


if __name__ == "__main__":
    main()
