#!/usr/bin/env python3
"""Write the basis-set data files in data/basis/ from the basis-set-exchange
package (PyPI `basis-set-exchange`), in its open JSON schema.

Usage:
    python3 -m venv /tmp/qcvenv
    /tmp/qcvenv/bin/pip install basis-set-exchange
    /tmp/qcvenv/bin/python scripts/reference/basis_sets.py

Each file keeps the package's JSON schema (`molssi_bse_schema`) unchanged and
only restricts the elements to Z <= 36 (H-Kr). The package version and the data
version are recorded in data/basis/VERSIONS.json; the package's licence and
citation notice is kept beside the data in data/basis/LICENSE-basis-set-exchange.txt.
"""
import json
import os

import basis_set_exchange as bse

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.normpath(os.path.join(HERE, "..", "..", "data", "basis"))

# (file stem used by flipswarm, name in the package)
BASES = [
    ("sto-3g", "STO-3G"),
    ("3-21g", "3-21G"),
    ("6-31g", "6-31G"),
    ("6-31g_st", "6-31G*"),
    ("6-31g_st_st", "6-31G**"),
    ("6-31+g_st", "6-31+G*"),
    ("cc-pvdz", "cc-pVDZ"),
    ("def2-svp", "def2-SVP"),
]
MAX_Z = 36


def main():
    os.makedirs(OUT, exist_ok=True)
    versions = {
        "package": "basis-set-exchange",
        "package_version": bse.version(),
        "max_atomic_number": MAX_Z,
        "bases": {},
    }
    for stem, name in BASES:
        meta = bse.get_metadata()[bse.misc.transform_basis_name(name)]
        data_version = meta["latest_version"]
        avail = [int(z) for z in meta["versions"][data_version]["elements"]]
        elems = [z for z in avail if z <= MAX_Z]
        text = bse.get_basis(name, elements=elems, fmt="json", header=False)
        obj = json.loads(text)
        # Keep only the data we read plus provenance; drop ECPs (none for Z <= 36 here).
        for z, el in obj["elements"].items():
            if "ecp_potentials" in el:
                raise SystemExit(f"{name}: element {z} has an ECP; not supported")
            # Literature keys and revision notes name other software; the
            # original references are found through the package and its
            # data version, recorded in VERSIONS.json.
            el.pop("references", None)
        obj.pop("revision_description", None)
        with open(os.path.join(OUT, stem + ".json"), "w") as fh:
            json.dump(obj, fh, separators=(",", ":"), sort_keys=True)
            fh.write("\n")
        versions["bases"][stem] = {
            "name": name,
            "data_version": data_version,
            "elements": elems,
            "function_types": obj.get("function_types"),
        }
        print(f"{name:10s} v{data_version} Z={min(elems)}-{max(elems)} -> {stem}.json")
    with open(os.path.join(OUT, "VERSIONS.json"), "w") as fh:
        json.dump(versions, fh, indent=1, sort_keys=True)
        fh.write("\n")
    # Licence notice of the package (BSD 3-clause) beside the data.
    import importlib.metadata as md

    dist = md.distribution("basis-set-exchange")
    lic = None
    for f in dist.files or []:
        if "LICENSE" in f.name.upper():
            lic = f.read_text()
            break
    if lic is None:
        lic = dist.metadata.get("License", "")
    with open(os.path.join(OUT, "LICENSE-basis-set-exchange.txt"), "w") as fh:
        fh.write(
            "The basis-set data files in this directory were produced with the\n"
            f"basis-set-exchange Python package, version {bse.version()}\n"
            "(J. Chem. Inf. Model. 59, 4814 (2019)); each basis set's original\n"
            "references can be looked up in that package for the data version\n"
            "recorded in VERSIONS.json. The package's licence follows.\n\n"
        )
        fh.write(lic)


if __name__ == "__main__":
    main()
