//! SCF throughput, printed, never asserted (`cargo bench --bench scf`).
//!
//! Workload (issue: ROKS benchmark): the ROKS/BH&HLYP triplet of benzene in
//! 6-31G* (102 Cartesian functions) from the atomic-density guess, and one
//! SCF started from the previous geometry's orbitals after a displacement of
//! the size of a 0.5 fs step (0.005 bohr for H, 0.0015 bohr for C; thermal
//! speeds at 300 K, common practice). When Python with PySCF is importable
//! (interpreter from `FLIPSWARM_PYTHON`, else python3), the same basis data,
//! geometry, functional (libxc HYB_GGA_XC_BHANDHLYP), per-atom grid sizes
//! and convergence threshold are timed with PySCF's ROKS in the same
//! invocation, and the ratio is printed. Both sides use the same number of
//! threads (`RAYON_NUM_THREADS` / `OMP_NUM_THREADS`, default: all cores).
//! The point counts of both grids are printed: ours prunes by its own
//! scheme, PySCF by its default; compare them before reading the ratio.

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::BasisSet;
use flipswarm::electronic::qc::dft::grid::GridSpec;
use flipswarm::electronic::qc::dft::ks::{kohn_sham, KsOptions};
use flipswarm::electronic::qc::integrals::JkOptions;
use flipswarm::electronic::qc::scf::{self, Electrons, Guess, Reference, ScfOptions};
use flipswarm::units::angstrom_to_bohr;
use std::process::Command;
use std::time::Instant;

fn benzene() -> Molecule {
    let (rc, rh) = (1.39, 1.39 + 1.09);
    let c = Element::from_symbol("C").unwrap();
    let h = Element::from_symbol("H").unwrap();
    let mut els = Vec::new();
    let mut pos = Vec::new();
    for k in 0..6 {
        let t = std::f64::consts::PI / 3.0 * k as f64 + 0.1;
        els.push(c);
        pos.push([
            angstrom_to_bohr(rc * t.cos()),
            angstrom_to_bohr(rc * t.sin()),
            0.02 * k as f64,
        ]);
        els.push(h);
        pos.push([
            angstrom_to_bohr(rh * t.cos()),
            angstrom_to_bohr(rh * t.sin()),
            -0.01 * k as f64,
        ]);
    }
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

fn displaced(m: &Molecule) -> Molecule {
    let mut m = m.clone();
    let mut q = m.positions_flat_bohr();
    for (a, atom) in m.atoms.iter().enumerate() {
        let amp = if atom.element.atomic_number() == 1 {
            0.005
        } else {
            0.0015
        };
        for k in 0..3 {
            q[3 * a + k] += amp * ((7 * a + 3 * k) as f64 * 0.9).sin();
        }
    }
    m.set_positions_flat_bohr(&q).unwrap();
    m
}

fn python() -> Option<String> {
    let mut cands = Vec::new();
    if let Ok(p) = std::env::var("FLIPSWARM_PYTHON") {
        cands.push(p);
    }
    cands.push("python3".into());
    cands.into_iter().find(|p| {
        Command::new(p)
            .args(["-c", "import pyscf"])
            .output()
            .map(|o| o.status.success())
            .unwrap_or(false)
    })
}

const PYSCF_SCRIPT: &str = r#"
import json, sys, time
sys.path.insert(0, sys.argv[1] + "/scripts/reference")
from qc_integrals import pyscf_basis, SYMBOL
from pyscf import gto, dft
atoms = json.loads(sys.argv[2]); moved = json.loads(sys.argv[3]); grid = json.loads(sys.argv[4])
def mol_of(a):
    m = gto.Mole(); m.atom = [(SYMBOL[z], p) for z, p in a]; m.unit = "Bohr"
    m.basis = pyscf_basis("6-31g_st", [z for z, _ in a]); m.cart = True; m.spin = 2; m.verbose = 0; m.build()
    return m
def solver(m):
    mf = dft.ROKS(m); mf.xc = "HYB_GGA_XC_BHANDHLYP"
    mf.grids.atom_grid = {SYMBOL[int(z)]: tuple(v) for z, v in grid.items()}
    mf.conv_tol = 1e-9; mf.conv_tol_grad = 1e-5
    return mf
mol = mol_of(atoms)
t = time.perf_counter(); mf = solver(mol); e = mf.kernel(); t_cold = time.perf_counter() - t
cycles = mf.cycles if hasattr(mf, "cycles") else None
npts = mf.grids.weights.size
dm = mf.make_rdm1()
m2 = mol_of(moved)
t = time.perf_counter(); mf2 = solver(m2); e2 = mf2.kernel(dm0=dm); t_warm = time.perf_counter() - t
import pyscf
print(json.dumps({"energy": e, "cold": t_cold, "warm": t_warm, "points": int(npts), "cycles": cycles,
                  "warm_cycles": getattr(mf2, "cycles", None), "version": pyscf.__version__}))
"#;

fn atoms_json(m: &Molecule) -> String {
    let v: Vec<(u8, [f64; 3])> = m
        .atoms
        .iter()
        .map(|a| (a.element.atomic_number(), a.position_bohr))
        .collect();
    serde_json::to_string(&v).unwrap()
}

fn main() {
    let level = std::env::var("FLIPSWARM_BENCH_GRID").unwrap_or_else(|_| "medium".into());
    let spec = GridSpec::level(&level).unwrap();
    let mol = benzene();
    let moved = displaced(&mol);
    let basis = BasisSet::builtin(&mol, "6-31G*").unwrap();
    let el = Electrons::from_charge_multiplicity(scf::nuclear_charge(&basis), 0, 3).unwrap();
    let opts = ScfOptions {
        energy_tolerance: 1e-9,
        gradient_tolerance: 1e-6,
        ..ScfOptions::default()
    };
    let ks = KsOptions {
        functional: "bhhlyp".into(),
        grid: spec.clone(),
        jk: JkOptions::default(),
    };
    println!(
        "ROKS/BH&HLYP triplet benzene, 6-31G* ({} functions), grid level {level}",
        basis.nbf
    );
    let t = Instant::now();
    let cold = kohn_sham(
        &basis,
        el,
        Reference::RestrictedOpen,
        &Guess::AtomicSuperposition,
        &opts,
        &ks,
    )
    .unwrap();
    let t_cold = t.elapsed().as_secs_f64();
    let moved_basis = BasisSet::builtin(&moved, "6-31G*").unwrap();
    let t = Instant::now();
    let warm = kohn_sham(
        &moved_basis,
        el,
        Reference::RestrictedOpen,
        &Guess::Orbitals {
            alpha: cold.orbitals_alpha.clone(),
            beta: cold.orbitals_beta.clone(),
        },
        &opts,
        &ks,
    )
    .unwrap();
    let t_warm = t.elapsed().as_secs_f64();
    // Our grid size per element (radial, max angular) for PySCF.
    let grid_json = format!(
        "{{\"1\": [{}, {}], \"6\": [{}, {}]}}",
        spec.radial_points(1),
        spec.angular,
        spec.radial_points(6),
        spec.angular
    );
    let points = flipswarm::electronic::qc::dft::grid::MolecularGrid::build(&basis.nuclei, &spec)
        .unwrap()
        .len();
    println!(
        "  flipswarm: E = {:.8} Eh, {} iterations, {:.2} s; warm start after a 0.5 fs-sized step: {} iterations, {:.2} s; {} grid points",
        cold.energy, cold.iterations, t_cold, warm.iterations, t_warm, points
    );
    let Some(py) = python() else {
        println!("  PySCF not importable: no reference run (install with `python3 -m pip install pyscf`)");
        return;
    };
    let out = Command::new(&py)
        .args([
            "-c",
            PYSCF_SCRIPT,
            env!("CARGO_MANIFEST_DIR"),
            &atoms_json(&mol),
            &atoms_json(&moved),
            &grid_json,
        ])
        .output()
        .unwrap();
    if !out.status.success() {
        println!(
            "  PySCF run failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        return;
    }
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let (pc, pw) = (v["cold"].as_f64().unwrap(), v["warm"].as_f64().unwrap());
    println!(
        "  PySCF {}: E = {:.8} Eh, {:.2} s; warm start {:.2} s; {} grid points",
        v["version"].as_str().unwrap_or("?"),
        v["energy"].as_f64().unwrap(),
        pc,
        pw,
        v["points"]
    );
    println!(
        "  ratio flipswarm/PySCF: SCF {:.2}, warm-start SCF {:.2} (goal <= 1.0)",
        t_cold / pc,
        t_warm / pw
    );
}
