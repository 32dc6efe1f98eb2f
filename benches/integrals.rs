//! Integral and J/K throughput, printed, never asserted (`cargo bench --bench integrals`).
//!
//! Workloads: all unique ERIs (packed 8-fold store), an in-core J+K build from
//! it, and an integral-direct J+K build, for water, benzene (102 Cartesian
//! functions in 6-31G*, 114 spherical in cc-pVDZ) and n-octane in 6-31G* (156,
//! direct only: its store exceeds the default in-core limit). When Python with
//! PySCF is importable (interpreter from `FLIPSWARM_PYTHON`, else
//! /tmp/qcvenv/bin/python, else python3), the same basis data and geometry are
//! timed with PySCF in the same invocation, with `OMP_NUM_THREADS` equal to the
//! rayon thread count: `int2e` with 8-fold symmetry, the in-core J+K
//! (`scf.hf.dot_eri_dm`), `scf.hf.get_jk` without screening, and `get_jk` with
//! PySCF's direct-SCF screening at our Schwarz threshold (`direct_scf_tol`); the
//! ratios are printed. `FLIPSWARM_BENCH_ONLY=benzene,water 6-31G*` selects
//! cases (substring match, comma separated; skips the scaling table),
//! `FLIPSWARM_BENCH_NO_PYSCF=1` skips the reference runs. Then a scaling table of the direct J+K build for linear
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

/// Repetitions per timed workload (`FLIPSWARM_BENCH_REPEAT`, default 3); the
/// minimum is reported, for flipswarm and PySCF alike (shared machines are noisy).
fn repeats() -> usize {
    std::env::var("FLIPSWARM_BENCH_REPEAT")
        .ok()
        .and_then(|v| v.parse().ok())
        .filter(|&r| r > 0)
        .unwrap_or(3)
}

/// Minimum wall time of `repeats()` runs, and the last result.
fn best<T>(mut f: impl FnMut() -> T) -> (T, f64) {
    let (mut r, mut t) = secs(&mut f);
    for _ in 1..repeats() {
        let (r2, t2) = secs(&mut f);
        r = r2;
        t = t.min(t2);
    }
    (r, t)
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
tol = float(sys.argv[5]); in_core = sys.argv[6] == "1"; reps = int(sys.argv[7])
mol = gto.Mole(); mol.atom = [(SYMBOL[z], p) for z, p in atoms]; mol.unit = "Bohr"
mol.basis = pyscf_basis(stem, [z for z, _ in atoms]); mol.cart = cart; mol.build()
dm = scf.hf.init_guess_by_1e(mol)
out = {"nao": mol.nao}
def best(f):
    ts = []
    for _ in range(reps):
        t = time.perf_counter(); f(); ts.append(time.perf_counter() - t)
    return min(ts)
if in_core:
    eri = mol.intor("int2e", aosym="s8")
    out["eri"] = best(lambda: mol.intor("int2e", aosym="s8"))
    out["jk_in_core"] = best(lambda: scf.hf.dot_eri_dm(eri, dm, hermi=1))
    del eri
out["jk"] = best(lambda: scf.hf.get_jk(mol, dm))
mf = scf.RHF(mol); mf.direct_scf_tol = tol
out["jk_screened"] = best(lambda: scf.hf.get_jk(mol, dm, vhfopt=mf.init_direct_scf(mol)))
import pyscf; out["version"] = pyscf.__version__; print(json.dumps(out))
"#;

/// PySCF timings (seconds) of the same workload, with `OMP_NUM_THREADS` set
/// to our rayon thread count.
fn pyscf_times(
    py: &str,
    mol: &Molecule,
    stem: &str,
    cart: bool,
    tol: f64,
    in_core: bool,
) -> Option<serde_json::Value> {
    let atoms: Vec<(u8, [f64; 3])> = mol
        .atoms
        .iter()
        .map(|a| (a.element.atomic_number(), a.position_bohr))
        .collect();
    let out = Command::new(py)
        .env("OMP_NUM_THREADS", rayon::current_num_threads().to_string())
        .args([
            "-c",
            PYSCF_SCRIPT,
            env!("CARGO_MANIFEST_DIR"),
            &serde_json::to_string(&atoms).unwrap(),
            stem,
            if cart { "1" } else { "0" },
            &format!("{tol:e}"),
            if in_core { "1" } else { "0" },
            &repeats().to_string(),
        ])
        .output()
        .ok()?;
    if !out.status.success() {
        eprintln!("PySCF run failed: {}", String::from_utf8_lossy(&out.stderr));
        return None;
    }
    serde_json::from_slice(out.stdout.split(|&c| c == b'\n').rfind(|l| !l.is_empty())?).ok()
}

fn water() -> Molecule {
    let o = Element::from_symbol("O").unwrap();
    let h = Element::from_symbol("H").unwrap();
    let pos = [[0.0, 0.0, 0.22], [0.0, 1.43, -0.89], [0.0, -1.43, -0.89]];
    Molecule::from_elements_positions_bohr(&[o, h, h], &pos).unwrap()
}

/// One timed case: flipswarm and (if importable) PySCF side by side.
fn run_case(
    label: &str,
    mol: &Molecule,
    name: &str,
    stem: &str,
    cart: bool,
    nocc: usize,
    py: Option<&str>,
) {
    let opts = JkOptions::default();
    let b = BasisSet::builtin(mol, name).unwrap();
    let d = guess_density(&b, nocc);
    let (sp, t_pairs) = best(|| ShellPairs::new(&b));
    let in_core = EriStore::bytes_needed(b.nbf) <= opts.max_in_core_bytes;
    let mut t_eri = f64::NAN;
    let mut t_jk_in = f64::NAN;
    if in_core {
        let (store, t) = best(|| EriStore::new(&sp, opts.threshold));
        t_eri = t;
        let (_, t) =
            best(|| coulomb_exchange_in_core(&store, std::slice::from_ref(&d), true).unwrap());
        t_jk_in = t;
    }
    let (r, t_jk_dir) =
        best(|| coulomb_exchange_direct(&sp, std::slice::from_ref(&d), &opts).unwrap());
    println!(
        "{label:8} {name:8} nbf {:4}: shell pairs {:.3} s, all unique ERIs {:.3} s, J+K in-core {:.3} s, J+K direct {:.3} s ({} quartets, {} screened)",
        b.nbf, t_pairs, t_eri, t_jk_in, t_jk_dir, r.quartets.0, r.quartets.1
    );
    let Some(p) = py else { return };
    let Some(v) = pyscf_times(p, mol, stem, cart, opts.threshold, in_core) else {
        return;
    };
    let g = |k: &str| v[k].as_f64().unwrap_or(f64::NAN);
    println!(
        "         PySCF {} nao {}: int2e s8 {:.3} s, in-core J+K {:.3} s, get_jk unscreened {:.3} s, get_jk screened {:.3} s",
        v["version"].as_str().unwrap_or("?"),
        v["nao"],
        g("eri"),
        g("jk_in_core"),
        g("jk"),
        g("jk_screened")
    );
    println!(
        "         ratio flipswarm/PySCF: ERIs {:.2}, in-core J+K {:.2}, direct J+K vs unscreened {:.2}, vs screened at {:.0e} {:.2}",
        (t_pairs + t_eri) / g("eri"),
        t_jk_in / g("jk_in_core"),
        (t_pairs + t_jk_dir) / g("jk"),
        opts.threshold,
        (t_pairs + t_jk_dir) / g("jk_screened")
    );
}

/// Time per shell-quartet class (l and number of contractions of each group)
/// over all canonical quartets of benzene in `name` (profiling aid, one thread).
fn class_profile(spec: &str) {
    use std::collections::BTreeMap;
    let (mol, name) = match spec.split_once(':') {
        Some(("water", n)) => (water(), n),
        Some(("ethane", n)) => (alkane(2), n),
        Some((_, n)) => (benzene(), n),
        None => (benzene(), spec),
    };
    let b = BasisSet::builtin(&mol, name).unwrap();
    let sp = ShellPairs::new(&b);
    let ng = sp.ngroups();
    let mut w = integrals::EriWork::new();
    let mut acc: BTreeMap<String, (usize, usize, f64)> = BTreeMap::new();
    let pidx = |i: usize, j: usize| i * (i + 1) / 2 + j;
    for i in 0..ng {
        for j in 0..=i {
            for k in 0..=i {
                for l in 0..=k {
                    if pidx(k, l) > pidx(i, j) {
                        break;
                    }
                    if sp.schwarz[pidx(i, j)] * sp.schwarz[pidx(k, l)] < 1e-12 {
                        continue;
                    }
                    let g = |x: usize| sp.group_info[x];
                    let key = format!(
                        "({}{}|{}{}) ctr {}{}{}{}",
                        g(i).0,
                        g(j).0,
                        g(k).0,
                        g(l).0,
                        g(i).2,
                        g(j).2,
                        g(k).2,
                        g(l).2
                    );
                    let np = sp.pairs[pidx(i, j)].prims.len() * sp.pairs[pidx(k, l)].prims.len();
                    let t = Instant::now();
                    sp.quartet(i, j, k, l, &mut w);
                    let dt = t.elapsed().as_secs_f64();
                    let e = acc.entry(key).or_insert((0, 0, 0.0));
                    e.0 += 1;
                    e.1 += np;
                    e.2 += dt;
                }
            }
        }
    }
    let total: f64 = acc.values().map(|v| v.2).sum();
    let mut v: Vec<_> = acc.into_iter().collect();
    v.sort_by(|a, b| b.1 .2.total_cmp(&a.1 .2));
    println!("class profile {spec}: total {total:.3} s");
    for (k, (n, np, t)) in v.iter().take(25) {
        println!(
            "  {k:24} {n:7} quartets {np:10} prim quartets {t:7.3} s ({:4.1}%) {:6.1} ns/prim quartet",
            100.0 * t / total,
            1e9 * t / *np as f64
        );
    }
}

fn main() {
    if let Ok(name) = std::env::var("FLIPSWARM_BENCH_CLASSES") {
        class_profile(&name);
        return;
    }
    let threads = rayon::current_num_threads();
    println!(
        "flipswarm integrals benchmark ({threads} rayon threads = OMP_NUM_THREADS for PySCF; best of {} runs each)",
        repeats()
    );
    let py = python();
    match &py {
        Some(p) => println!("reference: PySCF via {p}"),
        None => println!("reference: PySCF not importable, flipswarm numbers only"),
    }
    let only = std::env::var("FLIPSWARM_BENCH_ONLY").unwrap_or_default();
    let py = if std::env::var_os("FLIPSWARM_BENCH_NO_PYSCF").is_some() {
        None
    } else {
        py
    };
    let cases: Vec<(&str, Molecule, usize)> = vec![
        ("water", water(), 5),
        ("benzene", benzene(), 21),
        ("C8H18", alkane(8), 33),
    ];
    for (label, mol, nocc) in &cases {
        for (name, stem, cart) in [("6-31G*", "6-31g_st", true), ("cc-pVDZ", "cc-pvdz", false)] {
            let tag = format!("{label} {name}");
            if *label == "C8H18" && name == "cc-pVDZ" {
                continue;
            }
            if !only.is_empty() && !only.split(',').any(|o| tag.contains(o.trim())) {
                continue;
            }
            run_case(label, mol, name, stem, cart, *nocc, py.as_deref());
        }
    }
    if !only.is_empty() {
        return;
    }
    let opts = JkOptions::default();
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
