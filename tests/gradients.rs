//! Analytic SCF gradients, numerical gradients and geometry optimisation.
//!
//! Sources of the reference numbers:
//! * Central finite differences of our own SCF energies (the definition of
//!   the derivative; step 5e-4 bohr, SCF converged to 1e-11 Eh / 1e-8).
//! * `tests/data/qc/scf_gradients.json`: PySCF analytic gradients and
//!   PySCF-energy minima (PyPI `pyscf` 2.14.0, version in the file; minima by
//!   SciPy's BFGS on PySCF gradients, SciPy version in the file), made by
//!   `scripts/reference/scf_gradients.py` from this repository's basis files.
//! * Exact invariances: Σ_A ∂E/∂R_A = 0 (translation) and g(QR) = Q g(R)
//!   (rotation).

mod common;

use common::qc::{molecule_z, test_atoms};
use flipswarm::electronic::qc::basis::BasisSetData;
use flipswarm::electronic::qc::dft::grid::GridSpec;
use flipswarm::electronic::qc::gradient::numerical::{ScfEnergy, Target};
use flipswarm::electronic::qc::gradient::scf::{scf_gradient, scf_gradient_terms, Potential};
use flipswarm::electronic::qc::gradient::GradientError;
use flipswarm::electronic::qc::integrals::JkOptions;
use flipswarm::electronic::qc::optimize::{
    minimize_energy, GradientKind, OptimizeError, OptimizeOptions,
};
use flipswarm::electronic::qc::response::davidson::DavidsonOptions;
use flipswarm::electronic::qc::scf::{Electrons, Guess, Reference, ScfOptions};
use serde_json::Value;

fn fixture(name: &str) -> Value {
    let path = format!("{}/tests/data/qc/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    serde_json::from_str(&text).unwrap()
}

fn tight() -> ScfOptions {
    ScfOptions {
        energy_tolerance: 1e-11,
        gradient_tolerance: 1e-8,
        max_iterations: 200,
        ..ScfOptions::default()
    }
}

fn setup(
    name: &str,
    multiplicity: usize,
    reference: Reference,
    potential: Potential,
) -> (ScfEnergy, Vec<[f64; 3]>) {
    let list = test_atoms(name);
    let mol = molecule_z(&list);
    let data = BasisSetData::builtin("6-31G*").unwrap();
    let z: usize = list.iter().map(|(z, _)| *z as usize).sum();
    let electrons = Electrons::from_charge_multiplicity(z, 0, multiplicity).unwrap();
    let e = ScfEnergy {
        molecule: mol,
        basis: data,
        harmonics: None,
        electrons,
        reference,
        potential,
        scf: tight(),
        jk: JkOptions::default(),
        davidson: DavidsonOptions::default(),
    };
    (e, list.iter().map(|(_, p)| *p).collect())
}

fn ks(level: &str) -> Potential {
    Potential::KohnSham {
        functional: "bhhlyp".into(),
        grid: GridSpec::level(level).unwrap(),
    }
}

fn max_diff(a: &[[f64; 3]], b: &[[f64; 3]]) -> f64 {
    a.iter()
        .flatten()
        .zip(b.iter().flatten())
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

fn sum_of(g: &[[f64; 3]]) -> [f64; 3] {
    let mut s = [0.0; 3];
    for v in g {
        for k in 0..3 {
            s[k] += v[k];
        }
    }
    s
}

/// Analytic vs central differences of our own energies (same grid for KS).
fn check_fd(name: &str, mult: usize, reference: Reference, potential: Potential, tol: f64) {
    let (calc, pos) = setup(name, mult, reference, potential);
    let (c, analytic) = calc
        .analytic_gradient(&pos, &Guess::AtomicSuperposition)
        .unwrap();
    let numeric = calc
        .numerical_gradient(&pos, 5e-4, &Target::Ground, Some(&c.scf))
        .unwrap();
    let d = max_diff(&analytic, &numeric);
    let s = sum_of(&analytic);
    eprintln!(
        "{name} {reference:?} {:?}: max |analytic - FD| = {d:.2e}; sum = {s:?}",
        calc.potential
    );
    eprintln!("  analytic {analytic:?}");
    assert!(d < tol, "{name}: analytic vs FD differ by {d:e}");
    assert!(
        s.iter().all(|v| v.abs() < 1e-8),
        "{name}: sum of gradient {s:?}"
    );
}

// Source: central finite differences of our own energies (definition of the derivative).
#[test]
fn rhf_water_gradient_matches_finite_differences() {
    check_fd(
        "h2o",
        1,
        Reference::Restricted,
        Potential::HartreeFock,
        1e-6,
    );
}

// Source: central finite differences of our own energies.
#[test]
fn uhf_and_rohf_methylene_triplet_gradients_match_finite_differences() {
    check_fd(
        "ch2",
        3,
        Reference::Unrestricted,
        Potential::HartreeFock,
        1e-6,
    );
    check_fd(
        "ch2",
        3,
        Reference::RestrictedOpen,
        Potential::HartreeFock,
        1e-6,
    );
}

// Source: central finite differences of our own energies.
#[test]
fn rohf_formaldehyde_triplet_gradient_matches_finite_differences() {
    check_fd(
        "ch2o",
        3,
        Reference::RestrictedOpen,
        Potential::HartreeFock,
        1e-6,
    );
}

// Source: central finite differences of our own energies on the same (coarse) grid.
#[test]
fn ks_bhhlyp_gradients_match_finite_differences() {
    check_fd("h2o", 1, Reference::Restricted, ks("coarse"), 1e-6);
    check_fd("ch2", 3, Reference::Unrestricted, ks("coarse"), 1e-6);
    check_fd("ch2", 3, Reference::RestrictedOpen, ks("coarse"), 1e-6);
}

// Source: central finite differences of our own energies on the same (coarse) grid.
#[test]
fn roks_formaldehyde_triplet_gradient_matches_finite_differences() {
    check_fd("ch2o", 3, Reference::RestrictedOpen, ks("coarse"), 1e-6);
}

fn method_of(m: &str) -> (Reference, bool) {
    match m {
        "rhf" => (Reference::Restricted, false),
        "uhf" => (Reference::Unrestricted, false),
        "rohf" => (Reference::RestrictedOpen, false),
        "rks" => (Reference::Restricted, true),
        "uks" => (Reference::Unrestricted, true),
        "roks" => (Reference::RestrictedOpen, true),
        other => panic!("unknown method {other}"),
    }
}

fn fixture_positions(v: &Value) -> Vec<[f64; 3]> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|p| {
            let p = p.as_array().unwrap();
            [
                p[0].as_f64().unwrap(),
                p[1].as_f64().unwrap(),
                p[2].as_f64().unwrap(),
            ]
        })
        .collect()
}

// Source: PySCF 2.14.0 analytic gradients (tests/data/qc/scf_gradients.json,
// scripts/reference/scf_gradients.py). Hartree–Fock to 1e-7 Eh/bohr; Kohn–Sham
// on our "fine" grid against PySCF's unpruned (150, 974) grid with grid
// response, to the tolerance below (different grids: their quadrature errors
// differ; measured at most 4.4e-7).
#[test]
fn gradients_match_the_reference_library() {
    let fx = fixture("scf_gradients.json");
    for case in fx["gradients"].as_array().unwrap() {
        let name = case["molecule"].as_str().unwrap();
        let (reference, is_ks) = method_of(case["method"].as_str().unwrap());
        let potential = if is_ks {
            ks("fine")
        } else {
            Potential::HartreeFock
        };
        let (calc, pos) = setup(
            name,
            case["multiplicity"].as_u64().unwrap() as usize,
            reference,
            potential,
        );
        let atoms_fx: Vec<[f64; 3]> = case["atoms"]
            .as_array()
            .unwrap()
            .iter()
            .map(|a| {
                let p = a["position_bohr"].as_array().unwrap();
                [
                    p[0].as_f64().unwrap(),
                    p[1].as_f64().unwrap(),
                    p[2].as_f64().unwrap(),
                ]
            })
            .collect();
        assert_eq!(atoms_fx, pos);
        let (c, g) = calc
            .analytic_gradient(&pos, &Guess::AtomicSuperposition)
            .unwrap();
        let expect = fixture_positions(&case["gradient"]);
        let d = max_diff(&g, &expect);
        let de = (c.energy - case["energy"].as_f64().unwrap()).abs();
        eprintln!(
            "{name} {}: max |g - PySCF| = {d:.2e}, |E - PySCF| = {de:.1e}",
            case["method"]
        );
        let tol = if is_ks { 1e-6 } else { 1e-7 };
        assert!(d < tol, "{name} {}: {g:?} vs {expect:?}", case["method"]);
    }
}

fn rotation() -> [[f64; 3]; 3] {
    // Rotation by 0.7 rad about the axis (1, 2, 2)/3 (Rodrigues' formula).
    let (c, s) = (0.7f64.cos(), 0.7f64.sin());
    let u = [1.0 / 3.0, 2.0 / 3.0, 2.0 / 3.0];
    let mut r = [[0.0; 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            let cross = match (i, j) {
                (0, 1) => -u[2],
                (0, 2) => u[1],
                (1, 0) => u[2],
                (1, 2) => -u[0],
                (2, 0) => -u[1],
                (2, 1) => u[0],
                _ => 0.0,
            };
            r[i][j] = if i == j { c } else { 0.0 } + (1.0 - c) * u[i] * u[j] + s * cross;
        }
    }
    r
}

fn rotate(r: &[[f64; 3]; 3], v: [f64; 3]) -> [f64; 3] {
    std::array::from_fn(|i| r[i][0] * v[0] + r[i][1] * v[1] + r[i][2] * v[2])
}

// Source: exact invariance of the energy under rigid rotation and translation:
// g(QR + t) = Q g(R) (Hartree–Fock; no grid).
#[test]
fn gradients_rotate_and_translate_with_the_molecule() {
    for (name, mult, reference) in [
        ("h2o", 1, Reference::Restricted),
        ("ch2", 3, Reference::RestrictedOpen),
    ] {
        let (calc, pos) = setup(name, mult, reference, Potential::HartreeFock);
        let (_, g) = calc
            .analytic_gradient(&pos, &Guess::AtomicSuperposition)
            .unwrap();
        let q = rotation();
        let moved: Vec<[f64; 3]> = pos
            .iter()
            .map(|p| {
                let r = rotate(&q, *p);
                [r[0] + 0.31, r[1] - 0.52, r[2] + 1.7]
            })
            .collect();
        let (_, gm) = calc
            .analytic_gradient(&moved, &Guess::AtomicSuperposition)
            .unwrap();
        let expect: Vec<[f64; 3]> = g.iter().map(|v| rotate(&q, *v)).collect();
        let d = max_diff(&gm, &expect);
        eprintln!("{name}: max |g(QR+t) - Q g(R)| = {d:.2e}");
        assert!(d < 1e-8, "{name}: {gm:?} vs {expect:?}");
    }
}

// Source: exact identity — the sum of the contributions is the total, and
// each of the basis-centre/point and grid-weight XC parts sums to zero over
// atoms (translation invariance), tested with the grid-weight term non-zero.
#[test]
fn xc_grid_weight_term_is_present_and_translation_invariant() {
    let (calc, pos) = setup("ch2", 3, Reference::RestrictedOpen, ks("coarse"));
    let c = calc
        .compute(&pos, &Guess::AtomicSuperposition, &Target::Ground)
        .unwrap();
    let t = scf_gradient_terms(&c.basis, &c.scf, &calc.potential).unwrap();
    let w = sum_of(&t.grid_weights);
    let x = sum_of(&t.xc);
    let largest = t
        .grid_weights
        .iter()
        .flatten()
        .fold(0.0f64, |m, v| m.max(v.abs()));
    eprintln!("grid-weight term: largest {largest:.2e}, sums {w:?}; XC sums {x:?}");
    assert!(
        largest > 1e-6,
        "the grid-weight term should matter on a coarse grid"
    );
    assert!(w.iter().chain(&x).all(|v| v.abs() < 1e-9));
    let g = scf_gradient(&c.basis, &c.scf, &calc.potential).unwrap();
    assert!(max_diff(&g, &t.total) == 0.0);
}

fn distances(p: &[[f64; 3]]) -> Vec<f64> {
    let mut d = Vec::new();
    for i in 0..p.len() {
        for j in 0..i {
            d.push(
                ((p[i][0] - p[j][0]).powi(2)
                    + (p[i][1] - p[j][1]).powi(2)
                    + (p[i][2] - p[j][2]).powi(2))
                .sqrt(),
            );
        }
    }
    d
}

const BOHR_IN_ANGSTROM: f64 = 0.529177210903; // CODATA 2018

fn check_minimum(index: usize, grid: &str, tol_angstrom: f64) {
    let fx = fixture("scf_gradients.json");
    let case = &fx["minima"][index];
    assert!(case.is_object(), "fixture minimum {index} missing");
    let name = case["molecule"].as_str().unwrap();
    let (reference, is_ks) = method_of(case["method"].as_str().unwrap());
    let potential = if is_ks {
        ks(grid)
    } else {
        Potential::HartreeFock
    };
    let (calc, start) = setup(
        name,
        case["multiplicity"].as_u64().unwrap() as usize,
        reference,
        potential,
    );
    let opts = OptimizeOptions::default().scaled(0.01);
    let r = minimize_energy(
        &calc,
        &start,
        &Target::Ground,
        GradientKind::Analytic,
        &opts,
    )
    .unwrap();
    let expect = fixture_positions(&case["minimum_bohr"]);
    let (a, b) = (distances(&r.positions), distances(&expect));
    let dd = a
        .iter()
        .zip(&b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
        * BOHR_IN_ANGSTROM;
    let de = (r.energy - case["energy"].as_f64().unwrap()).abs();
    eprintln!(
        "{name} {}: {} steps, max |distance - PySCF minimum| = {dd:.2e} Å, |E - E_PySCF| = {de:.1e} Eh",
        case["method"],
        r.history.len()
    );
    assert!(dd < tol_angstrom, "{name}: distances {a:?} vs {b:?}");
}

// Source: PySCF 2.14.0 RHF/6-31G* minimum of water (SciPy BFGS on PySCF
// analytic gradients), tests/data/qc/scf_gradients.json; 1e-4 Å on all
// interatomic distances.
#[test]
fn rhf_water_minimum_matches_the_reference_library() {
    check_minimum(0, "fine", 1e-4);
}

// Source: PySCF 2.14.0 ROKS/BH&HLYP/6-31G* minimum of triplet methylene
// (SciPy BFGS on PySCF analytic gradients, unpruned (99, 590) grid); ours on the
// "fine" grid; 1e-4 Å on all interatomic distances.
#[test]
fn roks_methylene_minimum_matches_the_reference_library() {
    check_minimum(1, "fine", 1e-4);
}

// Source: PySCF 2.14.0 RHF/6-31G* minimum of formaldehyde (SciPy BFGS on
// PySCF analytic gradients), tests/data/qc/scf_gradients.json; 1e-4 Å on all
// interatomic distances.
#[test]
fn rhf_formaldehyde_minimum_matches_the_reference_library() {
    check_minimum(2, "fine", 1e-4);
}

// Source: exact behaviour of the interface — two steps cannot converge from a
// distorted start; the error carries the last accepted geometry, which must
// have a lower energy than the start (computed again here).
#[test]
fn step_limit_is_a_typed_error_with_the_last_geometry() {
    let (calc, start) = setup("h2o", 1, Reference::Restricted, Potential::HartreeFock);
    let opts = OptimizeOptions {
        max_steps: 2,
        ..OptimizeOptions::default()
    };
    let err = minimize_energy(
        &calc,
        &start,
        &Target::Ground,
        GradientKind::Analytic,
        &opts,
    )
    .unwrap_err();
    let msg = err.to_string();
    assert!(
        msg.contains("not converged") && msg.contains("step limit 2"),
        "{msg}"
    );
    let last = match &err {
        OptimizeError::NotConverged {
            last_positions,
            steps,
            ..
        } => {
            assert_eq!(*steps, 2);
            last_positions.clone()
        }
        other => panic!("unexpected {other:?}"),
    };
    let e0 = calc
        .compute(&start, &Guess::AtomicSuperposition, &Target::Ground)
        .unwrap()
        .energy;
    let e1 = calc
        .compute(&last, &Guess::AtomicSuperposition, &Target::Ground)
        .unwrap()
        .energy;
    assert!(e1 < e0, "{e1} vs {e0}");
}

// Source: interface contract — asking for a state that was not computed
// names the state and lists the computed ones.
#[test]
fn gradient_of_an_uncomputed_state_is_a_clear_error() {
    let (calc, pos) = setup("ch2", 3, Reference::RestrictedOpen, Potential::HartreeFock);
    let target = Target::Mrsf {
        label: "S5".into(),
        singlets: 2,
        triplets: 1,
    };
    let err = calc
        .compute(&pos, &Guess::AtomicSuperposition, &target)
        .unwrap_err();
    match &err {
        GradientError::StateNotComputed {
            requested,
            available,
        } => {
            assert_eq!(requested, "S5");
            assert!(
                available.contains("S0") && available.contains("S1") && available.contains("T1"),
                "{available}"
            );
        }
        other => panic!("unexpected {other:?}"),
    }
    assert!(err.to_string().contains("S5 was not computed"));
}

// Source: exact invariances of any energy under rigid motion, applied to the
// central-difference gradient of the MRSF-TDDFT S1 energy (ROHF triplet
// reference, no grid): Σ_A g_A = 0 and g(QR + t) = Q g(R), to the
// finite-difference accuracy (step 1e-3 bohr); exact identity between the
// single-state and several-state calls.
#[test]
fn numerical_mrsf_s1_gradient_is_invariant() {
    let (mut calc, pos) = setup("ch2", 3, Reference::RestrictedOpen, Potential::HartreeFock);
    calc.davidson = DavidsonOptions {
        residual_tolerance: 1e-8,
        energy_tolerance: 1e-12,
        ..DavidsonOptions::default()
    };
    // The response energy is not variational in the orbitals: its noise is
    // linear in the SCF residual, so the reference is converged further.
    calc.scf.gradient_tolerance = 1e-10;
    calc.scf.energy_tolerance = 1e-12;
    let target = Target::Mrsf {
        label: "S1".into(),
        singlets: 3,
        triplets: 1,
    };
    let g = calc.numerical_gradient(&pos, 1e-3, &target, None).unwrap();
    let q = rotation();
    let moved: Vec<[f64; 3]> = pos
        .iter()
        .map(|p| {
            let r = rotate(&q, *p);
            [r[0] - 0.4, r[1] + 0.2, r[2] + 0.9]
        })
        .collect();
    let gm = calc
        .numerical_gradient(&moved, 1e-3, &target, None)
        .unwrap();
    let expect: Vec<[f64; 3]> = g.iter().map(|v| rotate(&q, *v)).collect();
    let d = max_diff(&gm, &expect);
    let s = sum_of(&g);
    let largest = g.iter().flatten().fold(0.0f64, |m, v| m.max(v.abs()));
    eprintln!("MRSF S1 numerical gradient {g:?}\n  largest {largest:.2e}, sum {s:?}, rotation error {d:.2e}");
    assert!(
        largest > 1e-3,
        "a generic geometry has a non-zero S1 gradient"
    );
    assert!(s.iter().all(|v| v.abs() < 1e-7), "{s:?}");
    assert!(d < 1e-6, "{gm:?} vs {expect:?}");
    // Several states from one set of displaced calculations: the S1 entry is
    // the single-state gradient (same calculations), each sums to zero, and
    // an absent state is a clear error.
    let many = calc
        .numerical_state_gradients(&pos, 1e-3, &["S0", "S1", "T1"], 3, 1)
        .unwrap();
    assert_eq!(many.len(), 3);
    assert!(max_diff(&many[1], &g) < 1e-10);
    for gs in &many {
        assert!(sum_of(gs).iter().all(|v| v.abs() < 1e-7), "{gs:?}");
    }
    assert!(
        max_diff(&many[0], &many[1]) > 1e-4,
        "S0 and S1 gradients differ"
    );
    let err = calc
        .numerical_state_gradients(&pos, 1e-3, &["S1", "T2"], 3, 1)
        .unwrap_err();
    assert!(
        matches!(err, GradientError::StateNotComputed { .. }),
        "{err}"
    );
}

// Source: definition of a minimum — an optimisation of the MRSF-TDDFT S1
// state (numerical gradients, ROHF triplet reference) converges under the
// standard criteria, lowers the S1 energy, and a gradient computed afresh at
// the result (not the optimiser's own) is below the force thresholds.
#[test]
fn mrsf_s1_minimum_converges() {
    let (mut calc, pos) = setup("ch2", 3, Reference::RestrictedOpen, Potential::HartreeFock);
    calc.davidson = DavidsonOptions {
        residual_tolerance: 1e-8,
        energy_tolerance: 1e-12,
        ..DavidsonOptions::default()
    };
    calc.scf.gradient_tolerance = 1e-10;
    calc.scf.energy_tolerance = 1e-12;
    let target = Target::Mrsf {
        label: "S1".into(),
        singlets: 3,
        triplets: 1,
    };
    let opts = OptimizeOptions::default();
    let r = minimize_energy(&calc, &pos, &target, GradientKind::Numerical(1e-3), &opts).unwrap();
    let e0 = r.history[0].energy;
    let g = calc
        .numerical_gradient(&r.positions, 1e-3, &target, None)
        .unwrap();
    let gmax = g.iter().flatten().fold(0.0f64, |m, v| m.max(v.abs()));
    eprintln!(
        "MRSF S1 minimum: {} steps, E {e0:.8} -> {:.8}, max |g| afresh {gmax:.2e}, geometry {:?}",
        r.history.len(),
        r.energy,
        r.positions
    );
    assert!(r.energy < e0);
    assert!(gmax < opts.max_force);
}
