#!/usr/bin/env python3
"""Write tests/data/chem/isotope_masses.json from the PyPI package `periodictable`.

For every element H (Z=1) to Kr (Z=36) this records the mass number and the
atomic mass (in u) of its most abundant naturally occurring isotope. The
reference library takes isotope masses from the atomic mass evaluation
AME2020 (M. Wang et al., Chinese Physics C 45, 030003 (2021)) and natural
abundances from IUPAC/CIAAW "Isotopic compositions of the elements 2021".

The fixture is only used by `tests/chem.rs` to check the hand-written table in
`src/chem/elements.rs`; nothing in the crate reads it at run time.

Usage (from the repository root):
    python3 -m venv /tmp/refvenv
    /tmp/refvenv/bin/pip install periodictable
    /tmp/refvenv/bin/python scripts/reference/element_masses.py
"""
import json
import pathlib

import periodictable

OUT = pathlib.Path(__file__).resolve().parents[2] / "tests" / "data" / "chem" / "isotope_masses.json"


def main() -> None:
    elements = []
    for z in range(1, 37):
        el = periodictable.elements[z]
        isotopes = [el[a] for a in el.isotopes if el[a].abundance > 0]
        top = max(isotopes, key=lambda iso: iso.abundance)
        elements.append(
            {
                "atomic_number": z,
                "symbol": el.symbol,
                "mass_number": top.isotope,
                "mass_u": top.mass,
                "abundance_percent": round(top.abundance, 6),
            }
        )
    doc = {
        "generator": "scripts/reference/element_masses.py",
        "library": "periodictable (PyPI)",
        "library_version": periodictable.__version__,
        "data_source": (
            "isotope masses: AME2020, M. Wang et al., Chinese Physics C 45, 030003 (2021); "
            "abundances: IUPAC/CIAAW Isotopic compositions of the elements 2021 "
            "(as shipped in periodictable.mass)"
        ),
        "selection": "most abundant naturally occurring isotope of each element",
        "elements": elements,
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(doc, indent=2) + "\n")
    print(f"wrote {OUT} ({len(elements)} elements, periodictable {periodictable.__version__})")


if __name__ == "__main__":
    main()
