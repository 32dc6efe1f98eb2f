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

mod common;
use common::qc::*;

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::BasisSet;
use flipswarm::electronic::qc::dft::grid::GridSpec;
use flipswarm::electronic::qc::dft::ks::{kohn_sham, KsOptions};
use flipswarm::electronic::qc::integrals::JkOptions;
use flipswarm::electronic::qc::scf::{self, hartree_fock, Electrons, Guess, Reference, ScfOptions};
use serde_json::Value;

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
        let Some(functional) = case["functional"].as_str() else {
            continue;
        };
        let (basis, el, reference) = setup(case);
        let r = kohn_sham(
            &basis,
            el,
            reference,
            &Guess::AtomicSuperposition,
            &tight(),
            &ks_options(functional, "fine"),
        )
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
        assert!(
            residual < 1e-7,
            "the reference itself is not grid-converged"
        );
        assert!(
            err < 1e-6,
            "{} {} {functional}: {} vs {expect}",
            case["molecule"],
            case["method"],
            r.energy
        );
        if let Some(s2) = case.get("s_squared").and_then(Value::as_f64) {
            assert!(
                (r.s_squared - s2).abs() < 1e-5,
                "<S2> {} vs {s2}",
                r.s_squared
            );
        }
        worst = worst.max(err);
        n += 1;
    }
    assert!(n >= 12, "only {n} KS cases");
    eprintln!("{n} cases, largest deviation {worst:.1e} Eh");
}

fn case<'a>(fx: &'a Value, molecule: &str, method: &str, functional: &str) -> &'a Value {
    fx["cases"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| {
            c["molecule"] == molecule && c["method"] == method && c["functional"] == functional
        })
        .unwrap_or_else(|| panic!("no case {molecule} {method} {functional}"))
}

// Grid convergence across the named levels (the issue asks to show it):
// the error against the PySCF 2.14.0 reference falls from coarse to fine and
// stays below 1e-6 Eh from "fine" on.
#[test]
fn grid_levels_converge() {
    let fx = fixture("scf_energies.json");
    let c = case(&fx, "ch2", "roks", "bhhlyp");
    let (basis, el, reference) = setup(c);
    let expect = c["energy"].as_f64().unwrap();
    let mut errors = Vec::new();
    for level in ["coarse", "medium", "fine", "ultrafine"] {
        let r = kohn_sham(
            &basis,
            el,
            reference,
            &Guess::AtomicSuperposition,
            &tight(),
            &ks_options("bhhlyp", level),
        )
        .unwrap();
        let err = (r.energy - expect).abs();
        eprintln!(
            "{level:10} |dE| = {err:.2e} Eh, electrons off by {:.1e}",
            (r.grid_electrons.unwrap() - 8.0).abs()
        );
        errors.push(err);
    }
    assert!(errors[0] > errors[2] && errors[1] > errors[2], "{errors:?}");
    assert!(errors[2] < 1e-6 && errors[3] < 1e-6, "{errors:?}");
    assert!(errors[0] < 1e-3, "coarse grid is unusable: {errors:?}");
}

// Exact identities: ROKS of a closed shell is RKS (the polarised functional
// at ρα = ρβ equals the unpolarised one), UKS of a closed shell is RKS, and
// the "hf" functional through the Kohn–Sham path is Hartree–Fock.
#[test]
fn closed_shell_kohn_sham_references_agree_and_hf_is_hartree_fock() {
    let fx = fixture("scf_energies.json");
    let c = case(&fx, "h2o", "rks", "bhhlyp");
    let (basis, el, _) = setup(c);
    let e: Vec<f64> = [
        Reference::Restricted,
        Reference::RestrictedOpen,
        Reference::Unrestricted,
    ]
    .iter()
    .map(|&r| {
        kohn_sham(
            &basis,
            el,
            r,
            &Guess::AtomicSuperposition,
            &tight(),
            &ks_options("bhhlyp", "medium"),
        )
        .unwrap()
        .energy
    })
    .collect();
    assert!(
        (e[0] - e[1]).abs() < 1e-9 && (e[0] - e[2]).abs() < 1e-9,
        "{e:?}"
    );
    let via_ks = kohn_sham(
        &basis,
        el,
        Reference::Restricted,
        &Guess::AtomicSuperposition,
        &tight(),
        &ks_options("hf", "coarse"),
    )
    .unwrap();
    let hf = hartree_fock(
        &basis,
        el,
        Reference::Restricted,
        &Guess::AtomicSuperposition,
        &tight(),
        JkOptions::default(),
    )
    .unwrap();
    assert!((via_ks.energy - hf.energy).abs() < 1e-10);
    assert_eq!(via_ks.xc, 0.0);
    // A functional given as a sum of libxc parts equals its preset
    // (BH&HLYP = 0.5 HF + 0.5 B88 + LYP, as libxc defines it).
    let sum = kohn_sham(
        &basis,
        el,
        Reference::Restricted,
        &Guess::AtomicSuperposition,
        &tight(),
        &ks_options("0.5*HF+0.5*GGA_X_B88+GGA_C_LYP", "medium"),
    )
    .unwrap();
    assert!(
        (sum.energy - e[0]).abs() < 1e-9,
        "{} vs {}",
        sum.energy,
        e[0]
    );
}

// Warm start for dynamics: the ROKS orbitals of the previous geometry
// converge the displaced geometry in fewer iterations than the atomic guess.
#[test]
fn roks_warm_start_needs_fewer_iterations() {
    let fx = fixture("scf_energies.json");
    let c = case(&fx, "ch2o", "roks", "bhhlyp");
    let (basis, el, reference) = setup(c);
    let opts = ks_options("bhhlyp", "medium");
    let first = kohn_sham(
        &basis,
        el,
        reference,
        &Guess::AtomicSuperposition,
        &tight(),
        &opts,
    )
    .unwrap();
    let mut mol = molecule_from(&c["atoms"]);
    let mut q = mol.positions_flat_bohr();
    for (k, x) in q.iter_mut().enumerate() {
        *x += 0.01 * ((k as f64) * 1.3).cos();
    }
    mol.set_positions_flat_bohr(&q).unwrap();
    let moved = BasisSet::builtin(&mol, "6-31G*").unwrap();
    let cold = kohn_sham(
        &moved,
        el,
        reference,
        &Guess::AtomicSuperposition,
        &tight(),
        &opts,
    )
    .unwrap();
    let warm = kohn_sham(
        &moved,
        el,
        reference,
        &Guess::Orbitals {
            alpha: first.orbitals_alpha.clone(),
            beta: first.orbitals_beta.clone(),
        },
        &tight(),
        &opts,
    )
    .unwrap();
    eprintln!(
        "iterations: cold {}, warm {}",
        cold.iterations, warm.iterations
    );
    assert!((warm.energy - cold.energy).abs() < 1e-8);
    assert!(warm.iterations < cold.iterations);
}

// Robustness (issue requirement): a bond-breaking and a strongly distorted
// geometry converge with the fallbacks, to a stationary ROKS solution whose
// energy is below every earlier iteration's by construction of the check
// (variational: the converged energy is the lowest of the history within
// 1e-8 Eh). Exact identity: integral-direct and in-core Kohn–Sham agree.
#[test]
fn hard_geometries_converge_and_direct_equals_in_core() {
    let fx = fixture("scf_energies.json");
    let c = case(&fx, "h2o", "rks", "bhhlyp");
    let o = Element::from_symbol("O").unwrap();
    let h = Element::from_symbol("H").unwrap();
    let geometries = [
        // one O–H stretched to 3.6 bohr (bond breaking), triplet
        [[0.0, 0.0, 0.1], [0.0, 1.43, -0.98], [0.1, -3.2, -2.1]],
        // both O–H compressed to 1.2 bohr and the angle opened to ~170°
        [[0.0, 0.0, 0.0], [0.0, 1.195, -0.105], [0.0, -1.195, -0.105]],
    ];
    for g in geometries {
        let mol = Molecule::from_elements_positions_bohr(&[o, h, h], &g).unwrap();
        let basis = BasisSet::builtin(&mol, "6-31G*").unwrap();
        let el = Electrons::from_charge_multiplicity(10, 0, 3).unwrap();
        let r = kohn_sham(
            &basis,
            el,
            Reference::RestrictedOpen,
            &Guess::Core,
            &tight(),
            &ks_options("bhhlyp", "coarse"),
        )
        .unwrap_or_else(|e| panic!("{g:?}: {e}"));
        let lowest = r
            .history
            .iter()
            .map(|h| h.energy)
            .fold(f64::INFINITY, f64::min);
        assert!(r.energy <= lowest + 1e-8, "{} vs {lowest}", r.energy);
        assert!(r.history.last().unwrap().gradient < 1e-7);
    }
    let (basis, el, _) = setup(c);
    let run = |max: usize| {
        let mut o = ks_options("bhhlyp", "coarse");
        o.jk = JkOptions {
            max_in_core_bytes: max,
            threshold: 1e-13,
            ..JkOptions::default()
        };
        kohn_sham(
            &basis,
            el,
            Reference::RestrictedOpen,
            &Guess::AtomicSuperposition,
            &tight(),
            &o,
        )
        .unwrap()
    };
    let (a, b) = (run(usize::MAX), run(0));
    assert!(a.in_core && !b.in_core);
    assert!(
        (a.energy - b.energy).abs() < 1e-10,
        "{} vs {}",
        a.energy,
        b.energy
    );
}
