#!/usr/bin/env python3
"""Reference SCF nuclear gradients and minima for tests/gradients.rs.

Usage (from the repository root):
    python3 -m pip install pyscf==2.14.0 scipy
    python3 scripts/reference/scf_gradients.py

PySCF (PyPI `pyscf`) and SciPy are used only here, as general-purpose
reference libraries, to produce the numbers stored in
tests/data/qc/scf_gradients.json; the Rust tests never need Python. The basis
functions come from this repository's data/basis/*.json (via
qc_integrals.pyscf_basis), Cartesian d functions for 6-31G*, as
scf_energies.py.

* Gradients: PySCF analytic nuclear gradients (Eh/bohr) at the generic
  geometries of scf_energies.py. Kohn-Sham: libxc HYB_GGA_XC_BHANDHLYP on an
  unpruned (150, 974) grid with the grid-weight response included
  (`grid_response = True`).
* Minima (Kohn-Sham on an unpruned (99, 590) grid, recorded as
  `atom_grid` of each minimum): SciPy's BFGS (scipy.optimize.minimize, gtol 1e-7 Eh/bohr on PySCF
  analytic gradients) from the same start geometry; the stored geometry is the
  PySCF minimum (bohr) with its energy. PySCF's own optimiser interface needs
  extra packages (geomeTRIC or PyBerny) that are not installed here, hence
  SciPy.
* SCF convergence: conv_tol 1e-12 Eh, conv_tol_grad 1e-8.
"""
import json
import os
import sys

import numpy as np
import pyscf
import scipy
from scipy.optimize import minimize

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from scf_energies import ATOMS, SYMBOL, molecule, solver, FUNCTIONALS  # noqa: E402
from qc_integrals import pyscf_basis  # noqa: E402
from pyscf import gto  # noqa: E402

ROOT = os.path.normpath(os.path.join(HERE, "..", ".."))
OUT = os.path.join(ROOT, "tests", "data", "qc", "scf_gradients.json")

GRADIENT_CASES = [
    ("h2o", 0, "rhf", None),
    ("ch2", 2, "uhf", None),
    ("ch2", 2, "rohf", None),
    ("ch2o", 2, "rohf", None),
    ("h2o", 0, "rks", "bhhlyp"),
    ("ch2", 2, "uks", "bhhlyp"),
    ("ch2", 2, "roks", "bhhlyp"),
    ("ch2o", 2, "roks", "bhhlyp"),
]
MINIMUM_CASES = [
    ("h2o", 0, "rhf", None, None),
    # Minima need many gradients: a (99, 590) unpruned grid keeps this quick.
    ("ch2", 2, "roks", "bhhlyp", (99, 590)),
    ("ch2o", 0, "rhf", None, None),
]


def mol_at(name, spin, coords):
    atoms = ATOMS[name]
    mol = gto.Mole()
    mol.atom = [(SYMBOL[z], tuple(c)) for (z, _), c in zip(atoms, coords)]
    mol.unit = "Bohr"
    mol.basis = pyscf_basis("6-31g_st", [z for z, _ in atoms])
    mol.cart = True
    mol.spin = spin
    mol.verbose = 0
    mol.build()
    return mol


def energy_gradient(name, spin, method, functional, coords, dm0=None, atom_grid=(150, 974)):
    mol = mol_at(name, spin, coords)
    mf = solver(mol, method, functional, atom_grid=atom_grid)
    e = mf.kernel(dm0=dm0)
    assert mf.converged, (name, method)
    g = mf.nuc_grad_method()
    if functional:
        g.grid_response = True
    grad = g.kernel()
    return e, np.asarray(grad), mf.make_rdm1()


def main():
    out = {
        "generator": "scripts/reference/scf_gradients.py",
        "pyscf_version": pyscf.__version__,
        "scipy_version": scipy.__version__,
        "units": "hartree, bohr",
        "basis": "6-31g_st",
        "atom_grid": [150, 974],
        "gradients": [],
        "minima": [],
    }
    for name, spin, method, functional in GRADIENT_CASES:
        coords = np.array([xyz for _, xyz in ATOMS[name]], dtype=float)
        e, g, _ = energy_gradient(name, spin, method, functional, coords)
        out["gradients"].append({
            "molecule": name, "multiplicity": spin + 1, "method": method,
            "functional": functional,
            "atoms": [{"z": z, "position_bohr": list(xyz)} for z, xyz in ATOMS[name]],
            "energy": e, "gradient": g.tolist(),
        })
        print(name, method, functional, e, np.abs(g.sum(axis=0)).max(), file=sys.stderr)
    write(out)
    for name, spin, method, functional, grid in MINIMUM_CASES:
        start = np.array([xyz for _, xyz in ATOMS[name]], dtype=float)
        state = {"dm": None}

        def fun(x):
            e, g, dm = energy_gradient(name, spin, method, functional, x.reshape(-1, 3), state["dm"],
                                       atom_grid=grid or (150, 974))
            state["dm"] = dm
            return e, g.ravel()

        res = minimize(fun, start.ravel(), jac=True, method="BFGS",
                       options={"gtol": 1e-7, "maxiter": 500})
        e, g = fun(res.x)
        out["minima"].append({
            "molecule": name, "multiplicity": spin + 1, "method": method,
            "functional": functional, "atom_grid": grid,
            "start": [{"z": z, "position_bohr": list(xyz)} for z, xyz in ATOMS[name]],
            "minimum_bohr": res.x.reshape(-1, 3).tolist(),
            "energy": e, "max_gradient": float(np.abs(g).max()),
            "iterations": int(res.nit),
        })
        print("minimum", name, method, e, np.abs(g).max(), res.nit, file=sys.stderr)
        write(out)


def write(out):
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=1)
        fh.write("\n")


if __name__ == "__main__":
    main()
