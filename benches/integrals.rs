//! Integral and J/K throughput, printed, never asserted (`cargo bench --bench integrals`).
//!
//! Workloads: all unique ERIs (packed 8-fold store), an in-core J+K build from
//! it, and an integral-direct J+K build, for benzene in 6-31G* (102 Cartesian
//! functions) and cc-pVDZ (114 spherical functions). When Python with PySCF is
//! importable (interpreter from `FLIPSWARM_PYTHON`, else /tmp/qcvenv/bin/python,
//! else python3), the same basis data and geometry are timed with PySCF in the
//! same invocation (`int2e` with 8-fold symmetry and `scf.hf.get_jk`) and the
//! ratio is printed. Then a scaling table of the direct J+K build for linear
//! alkanes in 6-31G from about 50 to about 400 basis functions
//! (`FLIPSWARM_BENCH_MAX_NBF` caps it).

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::BasisSet;
use flipswarm::electronic::qc::integrals::{
    self, coulomb_exchange_direct, coulomb_exchange_in_core, EriStore, JkOptions, ShellPairs,
};
use flipswarm::units::angstrom_to_bohr;
use nalgebra::{DMatrix, SymmetricEigen};
use std::process::Command;
use std::time::Instant;

fn benzene() -> Molecule {
    let (rc, rh) = (1.39, 1.39 + 1.09);
    let c = Element::from_symbol("C").unwrap();
    let h = Element::from_symbol("H").unwrap();
    let mut els = Vec::new();
    let mut pos = Vec::new();
    for k in 0..6 {
        let t = std::f64::consts::PI / 3.0 * k as f64;
        els.push(c);
        pos.push([
            angstrom_to_bohr(rc * t.cos()),
            angstrom_to_bohr(rc * t.sin()),
            0.0,
        ]);
        els.push(h);
        pos.push([
            angstrom_to_bohr(rh * t.cos()),
            angstrom_to_bohr(rh * t.sin()),
            0.0,
        ]);
    }
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

/// Zig-zag n-alkane C_nH_{2n+2} (idealised geometry).
fn alkane(n: usize) -> Molecule {
    let c = Element::from_symbol("C").unwrap();
    let h = Element::from_symbol("H").unwrap();
    let (dx, dy) = (1.26, 0.44); // Å, C–C zig-zag
    let mut els = Vec::new();
    let mut pos = Vec::new();
    for i in 0..n {
        let y = if i % 2 == 0 { 0.0 } else { dy * 2.0 };
        let x = dx * i as f64;
        let s = if i % 2 == 0 { -1.0 } else { 1.0 };
        els.push(c);
        pos.push([x, y, 0.0]);
        for z in [0.89, -0.89] {
            els.push(h);
            pos.push([x, y + s * 0.63, z]);
        }
        if i == 0 || i == n - 1 {
            els.push(h);
            pos.push([x + if i == 0 { -1.03 } else { 1.03 }, y + s * 0.36, 0.0]);
        }
    }
    let pos: Vec<[f64; 3]> = pos
        .iter()
        .map(|p| {
            [
                angstrom_to_bohr(p[0]),
                angstrom_to_bohr(p[1]),
                angstrom_to_bohr(p[2]),
            ]
        })
        .collect();
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

fn guess_density(b: &BasisSet, nocc: usize) -> DMatrix<f64> {
    let s = integrals::overlap(b);
    let h = integrals::core_hamiltonian(b);
    let es = SymmetricEigen::new(s);
    let x = &es.eigenvectors
        * DMatrix::from_diagonal(&es.eigenvalues.map(|v| 1.0 / v.sqrt()))
        * es.eigenvectors.transpose();
    let eh = SymmetricEigen::new(x.transpose() * h * &x);
    let mut order: Vec<usize> = (0..eh.eigenvalues.len()).collect();
    order.sort_by(|&i, &j| eh.eigenvalues[i].partial_cmp(&eh.eigenvalues[j]).unwrap());
    let c = &x * &eh.eigenvectors;
    let mut d = DMatrix::zeros(b.nbf, b.nbf);
    for &k in order.iter().take(nocc) {
        let col = c.column(k);
        d += 2.0 * &col * col.transpose();
    }
    d
}

fn secs<T>(f: impl FnOnce() -> T) -> (T, f64) {
    let t = Instant::now();
    let r = f();
    (r, t.elapsed().as_secs_f64())
}

fn python() -> Option<String> {
    let mut cands = Vec::new();
    if let Ok(p) = std::env::var("FLIPSWARM_PYTHON") {
        cands.push(p);
    }
    cands.push("/tmp/qcvenv/bin/python".into());
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
import numpy as np
from pyscf import gto, scf
atoms = json.loads(sys.argv[2]); stem = sys.argv[3]; cart = sys.argv[4] == "1"
mol = gto.Mole(); mol.atom = [(SYMBOL[z], p) for z, p in atoms]; mol.unit = "Bohr"
mol.basis = pyscf_basis(stem, [z for z, _ in atoms]); mol.cart = cart; mol.build()
dm = scf.hf.init_guess_by_1e(mol)
t = time.perf_counter(); mol.intor("int2e", aosym="s8"); t_eri = time.perf_counter() - t
t = time.perf_counter(); scf.hf.get_jk(mol, dm); t_jk = time.perf_counter() - t
import pyscf; print(json.dumps({"nao": mol.nao, "eri": t_eri, "jk": t_jk, "version": pyscf.__version__}))
"#;

fn pyscf_times(py: &str, mol: &Molecule, stem: &str, cart: bool) -> Option<serde_json::Value> {
    let atoms: Vec<(u8, [f64; 3])> = mol
        .atoms
        .iter()
        .map(|a| (a.element.atomic_number(), a.position_bohr))
        .collect();
    let out = Command::new(py)
        .args([
            "-c",
            PYSCF_SCRIPT,
            env!("CARGO_MANIFEST_DIR"),
            &serde_json::to_string(&atoms).unwrap(),
            stem,
            if cart { "1" } else { "0" },
        ])
        .output()
        .ok()?;
    if !out.status.success() {
        eprintln!("PySCF run failed: {}", String::from_utf8_lossy(&out.stderr));
        return None;
    }
    serde_json::from_slice(out.stdout.split(|&c| c == b'\n').rfind(|l| !l.is_empty())?).ok()
}

fn main() {
    let threads = rayon::current_num_threads();
    println!("flipswarm integrals benchmark ({threads} rayon threads)");
    let py = python();
    match &py {
        Some(p) => println!("reference: PySCF via {p}"),
        None => println!("reference: PySCF not importable, flipswarm numbers only"),
    }
    let mol = benzene();
    let opts = JkOptions::default();
    for (name, stem, cart) in [("6-31G*", "6-31g_st", true), ("cc-pVDZ", "cc-pvdz", false)] {
        let b = BasisSet::builtin(&mol, name).unwrap();
        let d = guess_density(&b, 21);
        let (sp, t_pairs) = secs(|| ShellPairs::new(&b));
        let (store, t_eri) = secs(|| EriStore::new(&sp, opts.threshold));
        let (_, t_jk_in) =
            secs(|| coulomb_exchange_in_core(&store, std::slice::from_ref(&d), true).unwrap());
        let (r, t_jk_dir) =
            secs(|| coulomb_exchange_direct(&sp, std::slice::from_ref(&d), &opts).unwrap());
        println!(
            "benzene {name:8} nbf {:4}: shell pairs {:.3} s, all unique ERIs {:.3} s ({} quartets, {} screened), J+K in-core {:.3} s, J+K direct {:.3} s",
            b.nbf, t_pairs, t_eri, store.quartets.0, store.quartets.1, t_jk_in, t_jk_dir
        );
        let _ = r;
        if let Some(p) = &py {
            if let Some(v) = pyscf_times(p, &mol, stem, cart) {
                let (pe, pj) = (v["eri"].as_f64().unwrap(), v["jk"].as_f64().unwrap());
                println!(
                    "        PySCF {} nao {}: int2e s8 {:.3} s, get_jk {:.3} s  -> ratio flipswarm/PySCF: ERIs {:.2}, J+K direct {:.2}",
                    v["version"].as_str().unwrap_or("?"),
                    v["nao"],
                    pe,
                    pj,
                    (t_pairs + t_eri) / pe,
                    (t_pairs + t_jk_dir) / pj
                );
            }
        }
    }
    let max_nbf: usize = std::env::var("FLIPSWARM_BENCH_MAX_NBF")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(400);
    println!("\nscaling, direct J+K, n-alkanes in 6-31G:");
    println!(
        "{:>8} {:>6} {:>12} {:>12} {:>10}",
        "molecule", "nbf", "J+K (s)", "quartets", "screened"
    );
    let mut prev: Option<(usize, f64)> = None;
    for n in [3usize, 4, 6, 8, 12, 15, 20, 23, 30] {
        let m = alkane(n);
        let b = BasisSet::builtin(&m, "6-31G").unwrap();
        if b.nbf > max_nbf {
            break;
        }
        let nocc = (6 * n + 2 * n + 2) / 2;
        let d = guess_density(&b, nocc);
        let (r, t) = secs(|| {
            let sp = ShellPairs::new(&b);
            coulomb_exchange_direct(&sp, std::slice::from_ref(&d), &opts).unwrap()
        });
        let slope = prev
            .map(|(n0, t0)| {
                format!(
                    "  (local exponent {:.2})",
                    (t / t0).ln() / (b.nbf as f64 / n0 as f64).ln()
                )
            })
            .unwrap_or_default();
        println!(
            "{:>8} {:>6} {:>12.3} {:>12} {:>10}{}",
            format!("C{n}H{}", 2 * n + 2),
            b.nbf,
            t,
            r.quartets.0,
            r.quartets.1,
            slope
        );
        prev = Some((b.nbf, t));
    }
}
