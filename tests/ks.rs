//! Kohn–Sham SCF (RKS, UKS, ROKS) with BH&HLYP, B3LYP and PBE0.
//!
//! Sources of the reference numbers: `tests/data/qc/scf_energies.json`,
//! PySCF 2.14.0 (PyPI `pyscf`; its own libxc build, version in the file),
//! made by `scripts/reference/scf_energies.py` from this repository's basis
//! files, with functionals given by their libxc names and a large unpruned
//! grid whose residual error is recorded next to each energy
//! (`grid_check`, the same calculation on a still larger grid). Exact
//! identities: ROKS of a closed shell = RKS; "hf" through the Kohn–Sham path
//! = Hartree–Fock.

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::BasisSet;
use flipswarm::electronic::qc::dft::grid::GridSpec;
use flipswarm::electronic::qc::dft::ks::{kohn_sham, KsOptions};
use flipswarm::electronic::qc::integrals::JkOptions;
use flipswarm::electronic::qc::scf::{self, hartree_fock, Electrons, Guess, Reference, ScfOptions};
use serde_json::Value;

fn fixture(name: &str) -> Value {
    let path = format!("{}/tests/data/qc/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    serde_json::from_str(&text).unwrap()
}

fn molecule_from(atoms: &Value) -> Molecule {
    let mut els = Vec::new();
    let mut pos = Vec::new();
    for a in atoms.as_array().unwrap() {
        els.push(Element::from_atomic_number(a["z"].as_u64().unwrap()).unwrap());
        let p = a["position_bohr"].as_array().unwrap();
        pos.push([p[0].as_f64().unwrap(), p[1].as_f64().unwrap(), p[2].as_f64().unwrap()]);
    }
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

fn reference_of(method: &str) -> Reference {
    match method {
        "rks" => Reference::Restricted,
        "uks" => Reference::Unrestricted,
        "roks" => Reference::RestrictedOpen,
        other => panic!("unknown method {other}"),
    }
}

fn tight() -> ScfOptions {
    ScfOptions {
        energy_tolerance: 1e-10,
        gradient_tolerance: 1e-7,
        ..ScfOptions::default()
    }
}

fn ks_options(functional: &str, level: &str) -> KsOptions {
    KsOptions {
        functional: functional.to_string(),
        grid: GridSpec::level(level).unwrap(),
        jk: JkOptions::default(),
    }
}

fn setup(case: &Value) -> (BasisSet, Electrons, Reference) {
    assert_eq!(case["basis"], "6-31g_st");
    let mol = molecule_from(&case["atoms"]);
    let basis = BasisSet::builtin(&mol, "6-31G*").unwrap();
    let el = Electrons::from_charge_multiplicity(
        scf::nuclear_charge(&basis),
        0,
        case["multiplicity"].as_u64().unwrap() as usize,
    )
    .unwrap();
    (basis, el, reference_of(case["method"].as_str().unwrap()))
}

// Source: PySCF 2.14.0 fixtures (scripts/reference/scf_energies.py), 1e-6 Eh
// on our "fine" grid.
#[test]
fn kohn_sham_energies_match_the_reference_library() {
    let fx = fixture("scf_energies.json");
    let mut n = 0;
    let mut worst: f64 = 0.0;
    for case in fx["cases"].as_array().unwrap() {
        let Some(functional) = case["functional"].as_str() else { continue };
        let (basis, el, reference) = setup(case);
        let r = kohn_sham(&basis, el, reference, &Guess::AtomicSuperposition, &tight(), &ks_options(functional, "fine"))
            .unwrap_or_else(|e| panic!("{} {} {functional}: {e}", case["molecule"], case["method"]));
        let expect = case["energy"].as_f64().unwrap();
        let residual = (expect - case["grid_check"].as_f64().unwrap()).abs();
        let err = (r.energy - expect).abs();
        eprintln!(
            "{:6} {:5} {:7} E = {:.9}  ref {:.9}  |dE| = {:.1e} (reference grid residual {:.0e})  electrons {:.7}  iterations {}",
            case["molecule"].as_str().unwrap(),
            case["method"].as_str().unwrap(),
            functional,
            r.energy,
            expect,
            err,
            residual,
            r.grid_electrons.unwrap(),
            r.iterations
        );
        assert!(residual < 1e-7, "the reference itself is not grid-converged");
        assert!(err < 1e-6, "{} {} {functional}: {} vs {expect}", case["molecule"], case["method"], r.energy);
        if let Some(s2) = case.get("s_squared").and_then(Value::as_f64) {
            assert!((r.s_squared - s2).abs() < 1e-5, "<S2> {} vs {s2}", r.s_squared);
        }
        worst = worst.max(err);
        n += 1;
    }
    assert!(n >= 12, "only {n} KS cases");
    eprintln!("{n} cases, largest deviation {worst:.1e} Eh");
}
