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
        let p: Vec<f64> = a["position_bohr"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect();
        pos.push([p[0], p[1], p[2]]);
    }
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

/// Generic off-symmetry test geometries (bohr), shared with
/// scripts/reference/scf_energies.py and qc_integrals.py: (Z, position).
pub fn test_atoms(name: &str) -> Vec<(u64, [f64; 3])> {
    match name {
        "h2o" => vec![
            (8, [0.0, 0.0, 0.1]),
            (1, [0.0, 1.43, -0.98]),
            (1, [0.05, -1.45, -0.95]),
        ],
        "ch2" => vec![
            (6, [0.0, 0.0, 0.19]),
            (1, [0.0, 1.87, -0.57]),
            (1, [0.02, -1.86, -0.58]),
        ],
        "ch2o" => vec![
            (6, [0.0, 0.0, -1.0]),
            (8, [0.0, 0.02, 1.28]),
            (1, [0.0, 1.77, -2.08]),
            (1, [0.03, -1.76, -2.1]),
        ],
        // Twisted-pyramidalised ethylene near its S1/S0 crossing: the start
        // of the crossing search in tests/intersection.rs with the second
        // CH2 folded 14° further (S1 − S0 = 0.29 eV with BH&HLYP/6-31G*).
        "c2h4-tp" => vec![
            (6, [0.0, 0.0, -1.322808]),
            (6, [0.0, 0.0, 1.322808]),
            (1, [0.0, 1.738797, -2.409329]),
            (1, [0.0, -1.738797, -2.409329]),
            (1, [1.738797, 1.352757, 1.777335]),
            (1, [-1.738797, 1.352757, 1.777335]),
        ],
        other => panic!("unknown molecule {other}"),
    }
}

/// A molecule from (Z, position in bohr).
pub fn molecule_z(list: &[(u64, [f64; 3])]) -> Molecule {
    let els: Vec<Element> = list
        .iter()
        .map(|(z, _)| Element::from_atomic_number(*z).unwrap())
        .collect();
    let pos: Vec<[f64; 3]> = list.iter().map(|(_, p)| *p).collect();
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

/// A molecule from (symbol, position in bohr).
pub fn molecule_of(atoms: &[(&str, [f64; 3])]) -> Molecule {
    let els: Vec<Element> = atoms
        .iter()
        .map(|(s, _)| Element::from_symbol(s).unwrap())
        .collect();
    let pos: Vec<[f64; 3]> = atoms.iter().map(|(_, p)| *p).collect();
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

/// Ethylene with the second CH2 group twisted by `twist_deg` about the C–C
/// axis (C=C 1.339 Å, C–H 1.086 Å, HCH 117.6°; common practice geometry).
pub fn ethylene(twist_deg: f64) -> Molecule {
    let cc = 2.5303;
    let ch = 2.0522;
    let half = (117.6f64 / 2.0).to_radians();
    let (y, z) = (ch * half.sin(), ch * half.cos());
    let t = twist_deg.to_radians();
    molecule_of(&[
        ("C", [0.0, 0.0, -cc / 2.0]),
        ("C", [0.0, 0.0, cc / 2.0]),
        ("H", [0.0, y, -cc / 2.0 - z]),
        ("H", [0.0, -y, -cc / 2.0 - z]),
        ("H", [-y * t.sin(), y * t.cos(), cc / 2.0 + z]),
        ("H", [y * t.sin(), -y * t.cos(), cc / 2.0 + z]),
    ])
}
