#!/usr/bin/env python3
"""Reference Gaussian integrals for tests/integrals.rs, computed with PySCF.

Usage (from the repository root):
    python3 -m venv /tmp/qcvenv
    /tmp/qcvenv/bin/pip install pyscf
    /tmp/qcvenv/bin/python scripts/reference/qc_integrals.py

PySCF (PyPI `pyscf`) is used only here, to produce the numbers stored in
tests/data/qc/integrals_<molecule>_<basis>.json; the Rust tests never need Python.
The basis data are read from this repository's data/basis/*.json (written by
scripts/reference/basis_sets.py), so PySCF and flipswarm integrate exactly the
same contracted functions.

Conventions recorded in every file (see also tests/integrals.rs):
* AO order: atom by atom; within an atom, shells sorted by angular momentum
  (stable, as PySCF's `format_basis(sort_basis=True)` does); a general
  contraction counts as consecutive shells; within a shell, Cartesian
  components in the order xx, xy, xz, yy, yz, zz (x-power descending, then y),
  spherical functions m = -l..l except p, which is x, y, z.
* Normalisation: contracted functions normalised. In Cartesian mode PySCF
  scales a component x^i y^j z^k of a shell with l >= 2 so that its self-overlap
  is 4 pi (2i-1)!!(2j-1)!!(2k-1)!!/(2l+1)!! (s and p are unit-normalised);
  flipswarm normalises every Cartesian component to one. The test rescales.
* Derivatives: PySCF's `int1e_ipovlp` etc. are <nabla_r a|...|b>, i.e. minus
  the derivative with respect to the centre of the bra function.
* ERI fingerprint: `weighted_sum` = sum_{ijkl} w_ijkl (ij|kl) over all n^4
  elements with w_ijkl = cos(0.31 i + 0.17 j + 0.23 k + 0.11 l) (0-based AO
  indices), plus `selected` elements at seeded random indices.
"""
import json
import os

import numpy as np
import pyscf
from pyscf import gto

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.normpath(os.path.join(HERE, "..", ".."))
BASIS_DIR = os.path.join(ROOT, "data", "basis")
OUT = os.path.join(ROOT, "tests", "data", "qc")

# Geometries in bohr, deliberately a little off symmetric so that no element
# vanishes by symmetry alone.
MOLECULES = {
    "h2": [(1, (0.0, 0.0, 0.0)), (1, (0.0, 0.0, 1.4))],
    "h2o": [(8, (0.0, 0.0, 0.1)), (1, (0.0, 1.43, -0.98)), (1, (0.05, -1.45, -0.95))],
    "nh3": [
        (7, (0.0, 0.0, 0.13)),
        (1, (1.77, 0.0, -0.6)),
        (1, (-0.88, 1.53, -0.62)),
        (1, (-0.9, -1.51, -0.58)),
    ],
    "ch2o": [
        (6, (0.0, 0.0, -1.0)),
        (8, (0.0, 0.02, 1.28)),
        (1, (0.0, 1.77, -2.08)),
        (1, (0.03, -1.76, -2.1)),
    ],
    "c2h4": [
        (6, (0.0, 0.0, 1.26)),
        (6, (0.0, 0.01, -1.26)),
        (1, (0.0, 1.75, 2.33)),
        (1, (0.02, -1.74, 2.34)),
        (1, (0.0, 1.74, -2.33)),
        (1, (-0.01, -1.75, -2.32)),
    ],
}
# (molecule, basis stem, cartesian?, with derivatives / ERIs)
CASES = [
    ("h2", "sto-3g", True, True),
    ("h2o", "sto-3g", True, True),
    ("h2o", "6-31g_st", True, True),
    ("h2o", "cc-pvdz", False, True),
    ("nh3", "6-31g_st", True, True),
    ("nh3", "cc-pvdz", False, True),
    ("ch2o", "6-31g_st", True, True),
    ("ch2o", "cc-pvdz", False, True),
    ("ch2o", "def2-svp", False, False),
    ("c2h4", "6-31+g_st", True, False),
    ("c2h4", "cc-pvdz", False, False),
    # f and g shells: a small test basis kept with the fixtures
    ("h2o", "tests/data/qc/basis_spdfg_test", False, True),
    ("h2o", "tests/data/qc/basis_spdfg_test", True, True),
]
SYMBOL = {1: "H", 6: "C", 7: "N", 8: "O"}
ORIGIN = (0.1, -0.2, 0.3)
N_SELECTED = 300


def basis_path(stem):
    """data/basis/<stem>.json, or a repository-relative path without .json."""
    if "/" in stem:
        return os.path.join(ROOT, stem + ".json")
    return os.path.join(BASIS_DIR, stem + ".json")


def pyscf_basis(stem, zs):
    with open(basis_path(stem)) as fh:
        data = json.load(fh)
    out = {}
    for z in sorted(set(zs)):
        shells = []
        for sh in data["elements"][str(z)]["electron_shells"]:
            exps = [float(e) for e in sh["exponents"]]
            ams = sh["angular_momentum"]
            coefs = [[float(c) for c in row] for row in sh["coefficients"]]
            if len(ams) == 1:
                l = ams[0]
                shells.append([l] + [[e] + [row[k] for row in coefs] for k, e in enumerate(exps)])
            else:  # fused shells (sp): one coefficient row per angular momentum
                for l, row in zip(ams, coefs):
                    shells.append([l] + [[e, row[k]] for k, e in enumerate(exps)])
        out[SYMBOL[z]] = shells
    return out


def build(name, stem, cart, atoms=None):
    atoms = atoms or MOLECULES[name]
    mol = gto.Mole()
    mol.atom = [(SYMBOL[z], xyz) for z, xyz in atoms]
    mol.unit = "Bohr"
    mol.basis = pyscf_basis(stem, [z for z, _ in atoms])
    mol.cart = cart
    mol.spin = sum(z for z, _ in atoms) % 2
    mol.build()
    return mol


def weights(n):
    i = np.arange(n)
    return np.cos(
        0.31 * i[:, None, None, None]
        + 0.17 * i[None, :, None, None]
        + 0.23 * i[None, None, :, None]
        + 0.11 * i[None, None, None, :]
    )


def mat(a):
    return np.asarray(a).tolist()


def main():
    os.makedirs(OUT, exist_ok=True)
    rng = np.random.default_rng(20261202)
    for name, stem, cart, full in CASES:
        mol = build(name, stem, cart)
        n = mol.nao
        shells = [
            {
                "atom": int(mol.bas_atom(b)),
                "l": int(mol.bas_angular(b)),
                "nctr": int(mol.bas_nctr(b)),
                "exponents": mol.bas_exp(b).tolist(),
            }
            for b in range(mol.nbas)
        ]
        rec = {
            "generator": "scripts/reference/qc_integrals.py",
            "library": "pyscf",
            "library_version": pyscf.__version__,
            "molecule": name,
            "atoms": [{"z": z, "position_bohr": list(xyz)} for z, xyz in MOLECULES[name]],
            "basis": stem,
            "cartesian": cart,
            "nao": n,
            "shells": shells,
            "overlap": mat(mol.intor("int1e_ovlp")),
            "kinetic": mat(mol.intor("int1e_kin")),
            "nuclear": mat(mol.intor("int1e_nuc")),
            "origin_bohr": list(ORIGIN),
        }
        with mol.with_common_orig(ORIGIN):
            rec["dipole"] = mat(mol.intor("int1e_r"))
            rr = mol.intor("int1e_rr").reshape(3, 3, n, n)
            rec["quadrupole"] = mat([rr[0, 0], rr[0, 1], rr[0, 2], rr[1, 1], rr[1, 2], rr[2, 2]])
        if full:
            eri = mol.intor("int2e", aosym="s1").reshape(n, n, n, n)
            idx = rng.integers(0, n, size=(N_SELECTED, 4))
            rec["eri"] = {
                "weight": "cos(0.31 i + 0.17 j + 0.23 k + 0.11 l)",
                "weighted_sum": float(np.sum(weights(n) * eri)),
                "selected_indices": idx.tolist(),
                "selected_values": [float(eri[tuple(ix)]) for ix in idx],
            }
            rec["ip_overlap"] = mat(mol.intor("int1e_ipovlp"))
            rec["ip_kinetic"] = mat(mol.intor("int1e_ipkin"))
            rec["ip_nuclear"] = mat(mol.intor("int1e_ipnuc"))
            if n <= 30:
                ip1 = mol.intor("int2e_ip1", aosym="s1").reshape(3, n, n, n, n)
                idx = rng.integers(0, n, size=(N_SELECTED, 4))
                comp = rng.integers(0, 3, size=N_SELECTED)
                rec["eri_ip1"] = {
                    "weighted_sum": [float(np.sum(weights(n) * ip1[x])) for x in range(3)],
                    "selected_indices": idx.tolist(),
                    "selected_components": comp.tolist(),
                    "selected_values": [float(ip1[c][tuple(ix)]) for c, ix in zip(comp, idx)],
                }
            # Full nuclear derivatives of the core Hamiltonian, d h / d R_atom.
            from pyscf import scf

            mf = scf.RHF(mol) if mol.spin == 0 else scf.ROHF(mol)
            hgen = mf.nuc_grad_method().hcore_generator(mol)
            rec["hcore_derivatives"] = [mat(hgen(a)) for a in range(mol.natm)]
            # Overlap between the basis at this geometry and at a displaced one.
            shifted = [
                (z, tuple(x + 0.05 * np.sin(3.0 * k + c) for c, x in enumerate(xyz)))
                for k, (z, xyz) in enumerate(MOLECULES[name])
            ]
            mol2 = build(name, stem, cart, shifted)
            rec["displaced_atoms"] = [{"z": z, "position_bohr": list(xyz)} for z, xyz in shifted]
            rec["mixed_overlap"] = mat(gto.intor_cross("int1e_ovlp", mol, mol2))
        tag = os.path.basename(stem) + ("_cart" if cart and "/" in stem else "")
        path = os.path.join(OUT, f"integrals_{name}_{tag}.json")
        with open(path, "w") as fh:
            json.dump(rec, fh, separators=(",", ":"))
            fh.write("\n")
        print(f"{path}: nao={n}")


if __name__ == "__main__":
    main()
