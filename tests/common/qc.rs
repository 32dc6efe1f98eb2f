//! Shared helpers of the quantum-chemistry tests: fixture loading and the
//! fixtures' molecule and basis conventions (see scripts/reference/).

#![allow(dead_code)] // each test file uses a subset

use flipswarm::chem::{Element, Molecule};
use serde_json::Value;

/// A JSON fixture from tests/data/qc.
pub fn fixture(name: &str) -> Value {
    let path = format!("{}/tests/data/qc/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    serde_json::from_str(&text).unwrap()
}

/// Built-in basis name of a fixture's basis file stem.
pub fn basis_name(stem: &str) -> &'static str {
    match stem {
        "sto-3g" => "STO-3G",
        "6-31g_st" => "6-31G*",
        "6-31+g_st" => "6-31+G*",
        "cc-pvdz" => "cc-pVDZ",
        "def2-svp" => "def2-SVP",
        other => panic!("unknown stem {other}"),
    }
}

/// The molecule of a fixture's `atoms` list (charges and positions in bohr).
pub fn molecule_from(atoms: &Value) -> Molecule {
    let mut els = Vec::new();
    let mut pos = Vec::new();
    for a in atoms.as_array().unwrap() {
        els.push(Element::from_atomic_number(a["z"].as_u64().unwrap()).unwrap());
        let p: Vec<f64> = a["position_bohr"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect();
        pos.push([p[0], p[1], p[2]]);
    }
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}
