//! Spin-flip response cost, printed, never asserted (`cargo bench --bench response`).
//!
//! Workload: s-trans acrolein (8 atoms, idealised geometry) in 6-31G*
//! (68 Cartesian functions), BH&HLYP triplet ROKS on the "medium" grid, then
//! MRSF-TDDFT for 4 singlets — the ratio MRSF/ROKS in the same run is the
//! figure of merit (goal ≤ 1) — and the growth with the number of roots
//! (1, 2, 4, 8 singlets; 4 singlets + 4 triplets; plain SF with 4 states).
//! The integral store of the response engine is timed separately (the ROKS
//! builder keeps its own; sharing it would remove that cost).

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::BasisSet;
use flipswarm::electronic::qc::dft::grid::GridSpec;
use flipswarm::electronic::qc::dft::ks::{kohn_sham, KsOptions};
use flipswarm::electronic::qc::integrals::JkOptions;
use flipswarm::electronic::qc::response::davidson::DavidsonOptions;
use flipswarm::electronic::qc::response::{Mrsf, SpinFlip};
use flipswarm::electronic::qc::scf::fock::JkEngine;
use flipswarm::electronic::qc::scf::{self, Electrons, Guess, Reference, ScfOptions};
use flipswarm::units::angstrom_to_bohr;
use std::time::Instant;

fn acrolein() -> Molecule {
    let atoms: [(&str, [f64; 2]); 8] = [
        ("C", [0.0, 0.0]),
        ("C", [1.34, 0.0]),
        ("C", [2.10, 1.25]),
        ("O", [3.32, 1.25]),
        ("H", [-0.55, 0.93]),
        ("H", [-0.55, -0.93]),
        ("H", [1.89, -0.93]),
        ("H", [1.55, 2.19]),
    ];
    let els: Vec<Element> = atoms
        .iter()
        .map(|(s, _)| Element::from_symbol(s).unwrap())
        .collect();
    let pos: Vec<[f64; 3]> = atoms
        .iter()
        .map(|(_, p)| [angstrom_to_bohr(p[0]), angstrom_to_bohr(p[1]), 0.0])
        .collect();
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

fn main() {
    let basis = BasisSet::builtin(&acrolein(), "6-31G*").unwrap();
    let el = Electrons::from_charge_multiplicity(scf::nuclear_charge(&basis), 0, 3).unwrap();
    let ks = KsOptions {
        functional: "bhhlyp".into(),
        grid: GridSpec::level("medium").unwrap(),
        jk: JkOptions::default(),
    };
    let t = Instant::now();
    let roks = kohn_sham(
        &basis,
        el,
        Reference::RestrictedOpen,
        &Guess::AtomicSuperposition,
        &ScfOptions::default(),
        &ks,
    )
    .expect("ROKS");
    let t_roks = t.elapsed().as_secs_f64();
    println!(
        "acrolein 6-31G* ({} functions): ROKS BH&HLYP triplet {:.3} s, {} iterations, E = {:.8} Eh",
        basis.nbf, t_roks, roks.iterations, roks.energy
    );
    let t = Instant::now();
    let mut engine = JkEngine::new(&basis, JkOptions::default());
    let t_store = t.elapsed().as_secs_f64();
    println!(
        "response integral store: {t_store:.3} s (in core: {})",
        engine.in_core()
    );
    let opts = DavidsonOptions::default();
    let t = Instant::now();
    let mut mrsf = Mrsf::new(&basis, &roks, 0.5, &mut engine).expect("MRSF set-up");
    let t_setup = t.elapsed().as_secs_f64();
    println!(
        "MRSF set-up {t_setup:.3} s; singlet dimension {}, triplet dimension {}",
        mrsf.singlet_dimension(),
        mrsf.triplet_dimension()
    );
    for (ns, nt) in [(4, 0), (1, 0), (2, 0), (8, 0), (4, 4)] {
        let before = mrsf.products();
        let t = Instant::now();
        let r = mrsf.solve(ns, nt, &opts).expect("MRSF");
        let dt = t.elapsed().as_secs_f64();
        let iters: Vec<usize> = r.solver.iter().map(|s| s.iterations).collect();
        println!(
            "MRSF {ns} singlets + {nt} triplets: {dt:.3} s ({:.2} × ROKS), {} products, iterations {iters:?}; S0 {:.8} Eh, S1 {:+.3} eV",
            dt / t_roks,
            mrsf.products() - before,
            r.states[r.ground.unwrap_or(0)].energy,
            r.states.iter().filter(|s| s.spin == r.states[r.ground.unwrap_or(0)].spin).nth(1).map_or(f64::NAN, |s| s.excitation.unwrap_or(f64::NAN) * 27.211386)
        );
    }
    drop(mrsf);
    let t = Instant::now();
    let mut sf = SpinFlip::new(&basis, &roks, 0.5, &mut engine).expect("SF set-up");
    let r = sf.solve(4, &opts).expect("SF");
    let dt = t.elapsed().as_secs_f64();
    println!(
        "SF 4 states (with set-up): {dt:.3} s ({:.2} × ROKS), {} products",
        dt / t_roks,
        sf.products()
    );
    let _ = r;
}
