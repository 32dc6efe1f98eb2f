//! Cost of analytic MRSF-TDDFT state gradients, printed, never asserted
//! (`cargo bench --bench gradient`).
//!
//! Workloads: triplet formaldehyde (4 atoms, generic off-symmetry geometry)
//! and triplet ethylene twisted by about 70° (6 atoms, the size the goal
//! "≥ 20× faster than numerical" is stated for) in 6-31G*,
//! ROHF and ROKS BH&HLYP ("coarse" grid; for ethylene also the command
//! line's default "fine" grid) references, MRSF with 2 singlets
//! and 1 triplet. Per reference, in the same run: the SCF, the MRSF energy
//! (response solve, reusing the SCF's integral engine), the analytic S1
//! gradient (same engine; Z-vector and derivative
//! integrals; the SCF and response are not included) and the central-
//! difference S1 gradient (6N displaced SCF + MRSF calculations). Figures of
//! merit: analytic / MRSF energy (goal ≤ 2) and numerical / analytic.

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::BasisSetData;
use flipswarm::electronic::qc::dft::grid::GridSpec;
use flipswarm::electronic::qc::gradient::mrsf::{mrsf_state_gradients_reusing, ZVectorOptions};
use flipswarm::electronic::qc::gradient::numerical::{ScfEnergy, Target};
use flipswarm::electronic::qc::gradient::scf::Potential;
use flipswarm::electronic::qc::integrals::JkOptions;
use flipswarm::electronic::qc::response::davidson::DavidsonOptions;
use flipswarm::electronic::qc::response::{self, Method, StateRequest};
use flipswarm::electronic::qc::scf::{Electrons, Guess, Reference, ScfOptions};
use std::time::Instant;

fn formaldehyde() -> Vec<(u64, [f64; 3])> {
    vec![
        (6, [0.0, 0.0, -1.0]),
        (8, [0.0, 0.02, 1.28]),
        (1, [0.0, 1.77, -2.08]),
        (1, [0.03, -1.76, -2.1]),
    ]
}

/// Ethylene with the second CH₂ rotated by ≈ 70° about the C–C axis (bohr;
/// C–C 2.52, C–H 2.05, H–C–C ≈ 121.5°, slightly off-symmetric).
fn twisted_ethylene() -> Vec<(u64, [f64; 3])> {
    let (s, c) = (70f64.to_radians().sin(), 70f64.to_radians().cos());
    vec![
        (6, [0.0, 0.0, 1.26]),
        (6, [0.0, 0.01, -1.26]),
        (1, [0.0, 1.748, 2.331]),
        (1, [0.02, -1.748, 2.331]),
        (1, [-1.748 * s, 1.748 * c, -2.331]),
        (1, [1.748 * s, -1.748 * c, -2.34]),
    ]
}

fn molecule(atoms: &[(u64, [f64; 3])]) -> (Molecule, Vec<[f64; 3]>) {
    let els: Vec<Element> = atoms
        .iter()
        .map(|(z, _)| Element::from_atomic_number(*z).unwrap())
        .collect();
    let pos: Vec<[f64; 3]> = atoms.iter().map(|(_, p)| *p).collect();
    (
        Molecule::from_elements_positions_bohr(&els, &pos).unwrap(),
        pos,
    )
}

fn run(name: &str, what: &str, atoms: &[(u64, [f64; 3])], potential: Potential) {
    let (mol, pos) = molecule(atoms);
    let calc = ScfEnergy {
        molecule: mol,
        basis: BasisSetData::builtin("6-31G*").unwrap(),
        harmonics: None,
        electrons: Electrons::from_charge_multiplicity(
            atoms.iter().map(|(z, _)| *z as usize).sum(),
            0,
            3,
        )
        .unwrap(),
        reference: Reference::RestrictedOpen,
        potential: potential.clone(),
        scf: ScfOptions {
            gradient_tolerance: 1e-10,
            energy_tolerance: 1e-12,
            max_iterations: 300,
            ..ScfOptions::default()
        },
        jk: JkOptions::default(),
        davidson: DavidsonOptions {
            residual_tolerance: 1e-8,
            energy_tolerance: 1e-12,
            ..DavidsonOptions::default()
        },
    };
    let t = Instant::now();
    let (ground, mut engine) = calc
        .compute_with_engine(&pos, &Guess::AtomicSuperposition, &Target::Ground)
        .expect("SCF");
    let t_scf = t.elapsed().as_secs_f64();
    let cx = match &potential {
        Potential::HartreeFock => 1.0,
        Potential::KohnSham { .. } => 0.5,
    };
    // The response and the gradients reuse the SCF's integral engine, as
    // every caller does.
    let t = Instant::now();
    let request = StateRequest {
        method: Method::Mrsf,
        singlets: 2,
        triplets: 1,
    };
    let x = response::excited_states(
        &ground.basis,
        &ground.scf,
        cx,
        &mut engine,
        request,
        &calc.davidson,
    )
    .expect("MRSF");
    let t_mrsf = t.elapsed().as_secs_f64();
    let s1 = (0..x.states.len())
        .find(|&i| x.label(i).unwrap() == "S1")
        .unwrap();
    // best of 3 (the first call also pays for lazily built tables and the
    // thread pool's warm-up)
    let mut t_an = f64::INFINITY;
    let mut g = Vec::new();
    for _ in 0..3 {
        let t = Instant::now();
        let (gs, e) = mrsf_state_gradients_reusing(
            &ground.basis,
            &ground.scf,
            &x,
            &[s1],
            &potential,
            &calc.jk,
            engine,
            &ZVectorOptions::default(),
        )
        .expect("analytic gradient");
        g = gs;
        engine = e;
        t_an = t_an.min(t.elapsed().as_secs_f64());
    }
    if analytic_only() {
        println!(
            "{name} {what} 6-31G* ({} functions): SCF {t_scf:.3} s | MRSF energy {t_mrsf:.3} s | \
             analytic S1 gradient {t_an:.3} s ({:.2} × MRSF energy)",
            ground.basis.nbf,
            t_an / t_mrsf
        );
        return;
    }
    let t = Instant::now();
    let target = Target::Mrsf {
        label: "S1".into(),
        singlets: 2,
        triplets: 1,
    };
    let n = calc
        .numerical_gradient(&pos, 1e-3, &target, Some(&ground.scf))
        .expect("numerical gradient");
    let t_num = t.elapsed().as_secs_f64();
    let diff = g[0]
        .iter()
        .flatten()
        .zip(n.iter().flatten())
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max);
    println!(
        "{name} {what} 6-31G* ({} functions): SCF {t_scf:.3} s | MRSF energy {t_mrsf:.3} s | \
         analytic S1 gradient {t_an:.3} s ({:.2} × MRSF energy, {:.2} × SCF + MRSF) | \
         numerical S1 gradient {t_num:.3} s ({:.1} × analytic) | max |analytic − numerical| {diff:.1e} Eh/bohr",
        ground.basis.nbf,
        t_an / t_mrsf,
        t_an / (t_scf + t_mrsf),
        t_num / t_an
    );
}

/// `--analytic` skips the numerical gradient (profiling); the phase timings
/// of the analytic gradient are logged with `RUST_LOG=info`.
fn analytic_only() -> bool {
    std::env::args().any(|a| a == "--analytic")
}

fn main() {
    tracing_subscriber::fmt()
        .with_env_filter(tracing_subscriber::EnvFilter::from_default_env())
        .with_writer(std::io::stderr)
        .init();
    let roks = || Potential::KohnSham {
        functional: "bhhlyp".into(),
        grid: GridSpec::level("coarse").unwrap(),
    };
    for (what, atoms) in [
        ("formaldehyde", formaldehyde()),
        ("twisted ethylene", twisted_ethylene()),
    ] {
        run("ROHF", what, &atoms, Potential::HartreeFock);
        run("ROKS BH&HLYP (coarse grid)", what, &atoms, roks());
    }
    // The command line's default grid, for the 6-atom case.
    run(
        "ROKS BH&HLYP (fine grid)",
        "twisted ethylene",
        &twisted_ethylene(),
        Potential::KohnSham {
            functional: "bhhlyp".into(),
            grid: GridSpec::level("fine").unwrap(),
        },
    );
}
