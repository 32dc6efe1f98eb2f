#!/usr/bin/env python3
"""Write tests/data/chem/codata2018.json from the PyPI package `scipy`.

scipy.constants ships several CODATA adjustments. Since scipy 1.15 its default
set (`scipy.constants.physical_constants`) is CODATA 2022, so this script reads
the CODATA 2018 table explicitly (`scipy.constants._codata._physical_constants_2018`,
parsed by scipy from the NIST ASCII table of the 2018 adjustment,
E. Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021)). It refuses to run if that
table is missing rather than silently falling back to another adjustment.

The fixture is only used by `tests/units.rs` to check `src/units.rs`.

Usage (from the repository root):
    python3 -m venv /tmp/refvenv
    /tmp/refvenv/bin/pip install scipy
    /tmp/refvenv/bin/python scripts/reference/codata2018.py
"""
import json
import pathlib

import scipy
from scipy.constants import _codata

OUT = pathlib.Path(__file__).resolve().parents[2] / "tests" / "data" / "chem" / "codata2018.json"

NAMES = [
    "Hartree energy in eV",
    "Bohr radius",
    "atomic unit of time",
    "electron mass in u",
    "kelvin-hartree relationship",
    "Boltzmann constant in eV/K",
    "hartree-inverse meter relationship",
    "inverse fine-structure constant",
    "speed of light in vacuum",
    "elementary charge",
    "Planck constant",
    "Boltzmann constant",
    "Avogadro constant",
    "atomic unit of electric dipole mom.",
    "electron volt-hartree relationship",
]


def main() -> None:
    table = getattr(_codata, "_physical_constants_2018", None)
    if table is None:
        raise SystemExit("this scipy has no CODATA 2018 table; cannot make the fixture")
    constants = {}
    for name in NAMES:
        value, unit, uncertainty = table[name]
        constants[name] = {"value": value, "unit": unit, "uncertainty": uncertainty}
    doc = {
        "generator": "scripts/reference/codata2018.py",
        "library": "scipy (PyPI)",
        "library_version": scipy.__version__,
        "scipy_default_codata": getattr(_codata, "_current_codata", "unknown"),
        "data_source": "CODATA 2018 table inside scipy.constants._codata (Rev. Mod. Phys. 93, 025010 (2021))",
        "constants": constants,
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(doc, indent=2) + "\n")
    print(f"wrote {OUT} ({len(constants)} constants, scipy {scipy.__version__})")


if __name__ == "__main__":
    main()
