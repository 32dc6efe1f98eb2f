#!/usr/bin/env python3
"""Reference SCF energies for tests/scf.rs and tests/ks.rs, computed with PySCF.

Usage (from the repository root):
    python3 -m pip install pyscf==2.14.0
    python3 scripts/reference/scf_energies.py

PySCF (PyPI `pyscf`) is used only here, to produce the numbers stored in
tests/data/qc/scf_energies.json; the Rust tests never need Python. The basis
functions are read from this repository's data/basis/*.json through
qc_integrals.pyscf_basis, so both programs use the same contracted functions.

Conventions:
* Geometries in bohr (the same atoms as qc_integrals.py where names match;
  the open-shell molecules are set up here). Charges 0.
* Cartesian d functions for the Pople sets (6-31G*), spherical for cc-pVDZ
  and def2-SVP, as flipswarm's defaults.
* Convergence: conv_tol = 1e-12 Eh, conv_tol_grad = 1e-8.
* Kohn-Sham: functionals by their libxc names (HYB_GGA_XC_BHANDHLYP,
  HYB_GGA_XC_B3LYP, HYB_GGA_XC_PBEH = PBE0); grid: PySCF's default
  Treutler-Ahlrichs radial + Becke partitioning, no pruning, (150, 974) points
  per atom ("fine" here); `grid_check` stores the same energy with
  (250, 974) points so the residual grid error of the reference is on record.
* ROHF/ROKS energies do not depend on the canonicalisation convention.
"""
import json
import os
import sys

import numpy as np
import pyscf
from pyscf import dft, scf

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from qc_integrals import MOLECULES, SYMBOL, pyscf_basis  # noqa: E402

from pyscf import gto  # noqa: E402

ROOT = os.path.normpath(os.path.join(HERE, "..", ".."))
OUT = os.path.join(ROOT, "tests", "data", "qc", "scf_energies.json")

SYMBOL = dict(SYMBOL)
SYMBOL.update({9: "F"})

EXTRA = {
    # Triplet methylene, bent (bohr).
    "ch2": [(6, (0.0, 0.0, 0.19)), (1, (0.0, 1.87, -0.57)), (1, (0.02, -1.86, -0.58))],
    # Triplet O2 near its equilibrium bond length.
    "o2": [(8, (0.0, 0.0, 0.0)), (8, (0.0, 0.0, 2.28))],
    # Hydroxyl radical (doublet).
    "oh": [(8, (0.0, 0.0, 0.0)), (1, (0.0, 0.1, 1.83))],
    # Water at the geometry of the widely used SCF programming exercise (bohr, from memory).
    "h2o_exercise": [
        (8, (0.0, -0.143225816552, 0.0)),
        (1, (1.638036840407, 1.136548822547, 0.0)),
        (1, (-1.638036840407, 1.136548822547, 0.0)),
    ],
    # Stretched water (one O-H at 2.2x equilibrium): bond breaking.
    "h2o_stretched": [(8, (0.0, 0.0, 0.1)), (1, (0.0, 1.43, -0.98)), (1, (0.1, -3.2, -2.1))],
}
ATOMS = dict(MOLECULES)
ATOMS.update(EXTRA)

# (molecule, basis, cartesian, spin (2S), method, functional or None)
HF_CASES = [
    ("h2", "sto-3g", True, 0, "rhf", None),
    ("h2o_exercise", "sto-3g", True, 0, "rhf", None),
    ("h2o", "6-31g_st", True, 0, "rhf", None),
    ("nh3", "6-31g_st", True, 0, "rhf", None),
    ("ch2o", "6-31g_st", True, 0, "rhf", None),
    ("ch2o", "cc-pvdz", False, 0, "rhf", None),
    ("c2h4", "6-31g_st", True, 0, "rhf", None),
    ("ch2", "6-31g_st", True, 2, "uhf", None),
    ("ch2", "6-31g_st", True, 2, "rohf", None),
    ("o2", "6-31g_st", True, 2, "uhf", None),
    ("o2", "6-31g_st", True, 2, "rohf", None),
    ("oh", "6-31g_st", True, 1, "uhf", None),
    ("oh", "6-31g_st", True, 1, "rohf", None),
    ("ch2o", "6-31g_st", True, 2, "uhf", None),
    ("ch2o", "6-31g_st", True, 2, "rohf", None),
    ("c2h4", "6-31g_st", True, 2, "rohf", None),
    ("h2o_stretched", "6-31g_st", True, 0, "rhf", None),
]
FUNCTIONALS = {
    "bhhlyp": "HYB_GGA_XC_BHANDHLYP",
    "b3lyp": "HYB_GGA_XC_B3LYP",
    "pbe0": "HYB_GGA_XC_PBEH",
}
KS_CASES = []
for f in FUNCTIONALS:
    KS_CASES += [
        ("h2o", "6-31g_st", True, 0, "rks", f),
        ("ch2", "6-31g_st", True, 2, "uks", f),
        ("ch2", "6-31g_st", True, 2, "roks", f),
    ]
KS_CASES += [
    ("ch2o", "6-31g_st", True, 2, "roks", "bhhlyp"),
    ("ch2o", "6-31g_st", True, 2, "uks", "bhhlyp"),
    ("oh", "6-31g_st", True, 1, "roks", "bhhlyp"),
]


def molecule(name, stem, cart, spin):
    atoms = ATOMS[name]
    mol = gto.Mole()
    mol.atom = [(SYMBOL[z], xyz) for z, xyz in atoms]
    mol.unit = "Bohr"
    mol.basis = pyscf_basis(stem, [z for z, _ in atoms])
    mol.cart = cart
    mol.spin = spin
    mol.verbose = 0
    mol.build()
    return mol


def solver(mol, method, functional, atom_grid=(150, 974)):
    cls = {
        "rhf": scf.RHF, "uhf": scf.UHF, "rohf": scf.ROHF,
        "rks": dft.RKS, "uks": dft.UKS, "roks": dft.ROKS,
    }[method]
    mf = cls(mol)
    if functional:
        mf.xc = FUNCTIONALS[functional]
        mf.grids.atom_grid = atom_grid
        mf.grids.prune = None
    mf.conv_tol = 1e-12
    mf.conv_tol_grad = 1e-8
    mf.max_cycle = 200
    return mf


def main():
    out = {
        "generator": "scripts/reference/scf_energies.py",
        "pyscf_version": pyscf.__version__,
        "libxc_version": dft.libxc.__version__ if hasattr(dft.libxc, "__version__") else None,
        "units": "hartree; geometries in bohr",
        "cases": [],
    }
    for name, stem, cart, spin, method, functional in HF_CASES + KS_CASES:
        mol = molecule(name, stem, cart, spin)
        mf = solver(mol, method, functional)
        e = mf.kernel()
        assert mf.converged, (name, method, functional)
        case = {
            "molecule": name,
            "atoms": [{"z": z, "position_bohr": list(xyz)} for z, xyz in ATOMS[name]],
            "basis": stem,
            "cartesian": cart,
            "multiplicity": spin + 1,
            "method": method,
            "functional": functional,
            "energy": e,
            "nao": mol.nao,
        }
        if method in ("uhf", "uks"):
            case["s_squared"] = float(mf.spin_square()[0])
        if functional:
            mf2 = solver(mol, method, functional, atom_grid=(250, 974))
            case["grid_check"] = mf2.kernel()
            case["atom_grid"] = [150, 974]
        out["cases"].append(case)
        print(name, stem, method, functional, e, file=sys.stderr)
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=1)
        fh.write("\n")


if __name__ == "__main__":
    main()
