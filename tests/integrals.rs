//! Gaussian basis sets and integrals of the built-in quantum chemistry.
//!
//! Sources of the reference numbers:
//! * `tests/data/qc/integrals_*.json`: PySCF (PyPI `pyscf`, version recorded in
//!   each file, 2.14.0 when written), made by `scripts/reference/qc_integrals.py`
//!   from this repository's basis files, so both codes integrate the same
//!   contracted functions.
//! * `tests/data/qc/boys.json`: mpmath (PyPI `mpmath`, version in the file)
//!   at 50 digits, made by `scripts/reference/boys.py`.
//! * Szabo & Ostlund, *Modern Quantum Chemistry*, §3.5.2 (H2 in STO-3G at
//!   R = 1.4 bohr), printed to four decimals.
//! * Finite differences of our own integrals (derivatives), and exact
//!   invariances (rotation/translation of a rigid density).
//!
//! AO order mapping to PySCF (checked in `check_layout`): both codes order
//! atoms as given, shells within an atom by angular momentum (stable), a
//! general contraction as consecutive shells, Cartesian components xx, xy, xz,
//! yy, yz, zz, spherical m = −l..l with p as x, y, z. So the permutation is the
//! identity; what differs is the Cartesian normalisation for l ≥ 2: PySCF's
//! component x^i y^j z^k has self-overlap 4π (2i−1)!!(2j−1)!!(2k−1)!!/(2l+1)!!
//! while ours are unit-normalised, so PySCF's function = f · ours with f the
//! square root of that number (`pyscf_scale`). Bra derivatives: PySCF's
//! `int1e_ip*` and `int2e_ip1` are ⟨∇_r a|…⟩ = −⟨∂a/∂A|…⟩.

#![allow(clippy::needless_range_loop)] // index loops mirror the formulas

mod common;
use common::qc::*;

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::{
    double_factorial_odd, BasisError, BasisSet, BasisSetData, Harmonics,
};
use flipswarm::electronic::qc::boys::{boys, MAX_ORDER};
use flipswarm::electronic::qc::integrals::{self, cart, JkOptions};
use nalgebra::{DMatrix, Matrix3, SymmetricEigen};
use serde_json::Value;

// ---------------------------------------------------------------------------
// helpers
// ---------------------------------------------------------------------------

/// The basis of a fixture: a built-in set, or a repository file (the f/g test basis).
fn basis_data(fx: &Value) -> BasisSetData {
    let stem = fx["basis"].as_str().unwrap();
    if stem.contains('/') {
        let path = format!("{}/{stem}.json", env!("CARGO_MANIFEST_DIR"));
        BasisSetData::from_file(std::path::Path::new(&path), Harmonics::Spherical).unwrap()
    } else {
        BasisSetData::builtin(basis_name(stem)).unwrap()
    }
}

struct Case {
    fx: Value,
    basis: BasisSet,
    /// PySCF function = scale · ours.
    scale: Vec<f64>,
}

fn load_case(file: &str) -> Case {
    let fx = fixture(file);
    let mol = molecule_from(&fx["atoms"]);
    let harm = if fx["cartesian"].as_bool().unwrap() {
        Harmonics::Cartesian
    } else {
        Harmonics::Spherical
    };
    let data = basis_data(&fx);
    let basis = BasisSet::new(&mol, &data, Some(harm)).unwrap();
    check_layout(&fx, &basis);
    let scale = pyscf_scale(&basis);
    Case { fx, basis, scale }
}

/// Our shells must follow PySCF's (atom, l, exponents) sequence.
fn check_layout(fx: &Value, basis: &BasisSet) {
    let mut expected = Vec::new();
    for sh in fx["shells"].as_array().unwrap() {
        for _ in 0..sh["nctr"].as_u64().unwrap() {
            expected.push((
                sh["atom"].as_u64().unwrap() as usize,
                sh["l"].as_u64().unwrap() as usize,
                sh["exponents"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|x| x.as_f64().unwrap())
                    .collect::<Vec<_>>(),
            ));
        }
    }
    assert_eq!(expected.len(), basis.shells.len(), "shell count");
    for (s, (atom, l, exps)) in basis.shells.iter().zip(&expected) {
        assert_eq!((s.atom, s.l), (*atom, *l));
        // our shells drop zero-coefficient primitives of general contractions
        for e in &s.exponents {
            assert!(
                exps.iter().any(|x| (x - e).abs() <= 1e-12 * e),
                "exponent {e} not in PySCF shell"
            );
        }
    }
    assert_eq!(basis.nbf as u64, fx["nao"].as_u64().unwrap());
}

fn pyscf_scale(basis: &BasisSet) -> Vec<f64> {
    let mut v = Vec::new();
    for s in &basis.shells {
        if s.pure || s.l < 2 {
            v.extend(std::iter::repeat_n(1.0, s.nfunc()));
        } else {
            for c in cart::components(s.l) {
                let num = 4.0
                    * std::f64::consts::PI
                    * double_factorial_odd(c[0] as i64)
                    * double_factorial_odd(c[1] as i64)
                    * double_factorial_odd(c[2] as i64);
                v.push((num / double_factorial_odd(s.l as i64 + 1)).sqrt());
            }
        }
    }
    v
}

fn matrix(v: &Value) -> DMatrix<f64> {
    let rows = v.as_array().unwrap();
    let n = rows.len();
    let m = rows[0].as_array().unwrap().len();
    DMatrix::from_fn(n, m, |i, j| rows[i][j].as_f64().unwrap())
}

/// max |ours − pyscf / (f_a f_b)|
fn max_dev(ours: &DMatrix<f64>, pyscf: &DMatrix<f64>, fa: &[f64], fb: &[f64]) -> f64 {
    assert_eq!(ours.shape(), pyscf.shape());
    let mut m: f64 = 0.0;
    for i in 0..ours.nrows() {
        for j in 0..ours.ncols() {
            m = m.max((ours[(i, j)] - pyscf[(i, j)] / (fa[i] * fb[j])).abs());
        }
    }
    m
}

const ONE_E_FILES: &[&str] = &[
    "integrals_h2o_basis_spdfg_test.json",
    "integrals_h2o_basis_spdfg_test_cart.json",
    "integrals_h2_sto-3g.json",
    "integrals_h2o_sto-3g.json",
    "integrals_h2o_6-31g_st.json",
    "integrals_h2o_cc-pvdz.json",
    "integrals_nh3_6-31g_st.json",
    "integrals_nh3_cc-pvdz.json",
    "integrals_ch2o_6-31g_st.json",
    "integrals_ch2o_cc-pvdz.json",
    "integrals_ch2o_def2-svp.json",
    "integrals_c2h4_6-31+g_st.json",
    "integrals_c2h4_cc-pvdz.json",
];

// ---------------------------------------------------------------------------
// Boys function
// ---------------------------------------------------------------------------

/// F_n(x), 0 ≤ n ≤ 32, 0 ≤ x ≤ 1e6, against 50-digit mpmath values
/// (tests/data/qc/boys.json, mpmath version in the file): 1e−14 relative.
#[test]
fn boys_function_matches_mpmath() {
    let fx = fixture("boys.json");
    let mut worst: (f64, u64, f64) = (0.0, 0, 0.0);
    let mut buf = [0.0; MAX_ORDER + 1];
    let vals = fx["values"].as_array().unwrap();
    assert!(vals.len() > 5000);
    for v in vals {
        let n = v[0].as_u64().unwrap();
        let x = v[1].as_f64().unwrap();
        let r = v[2].as_f64().unwrap();
        // evaluate with several top orders: the recursion must not depend on it
        for top in [n as usize, MAX_ORDER] {
            boys(top, x, &mut buf);
            let rel = ((buf[n as usize] - r) / r).abs();
            if rel > worst.0 {
                worst = (rel, n, x);
            }
        }
    }
    eprintln!(
        "Boys worst relative deviation {:.2e} at n = {}, x = {}",
        worst.0, worst.1, worst.2
    );
    assert!(worst.0 < 1e-14, "worst {:?}", worst);
}

// ---------------------------------------------------------------------------
// one-electron integrals against PySCF
// ---------------------------------------------------------------------------

/// S, T, V, dipole and second moments for 5 molecules × 5 basis sets (and a
/// small s–g test basis, spherical and Cartesian) against PySCF (fixtures, version in each file): 1e−10 absolute.
#[test]
fn one_electron_matrices_match_pyscf() {
    let mut worst: f64 = 0.0;
    for file in ONE_E_FILES {
        let c = load_case(file);
        let f = &c.scale;
        // our convention check: PySCF's overlap diagonal is f² (documents the mapping)
        let s_py = matrix(&c.fx["overlap"]);
        for (i, fi) in f.iter().enumerate() {
            assert!(
                (s_py[(i, i)] - fi * fi).abs() < 1e-12,
                "{file}: PySCF normalisation convention changed"
            );
        }
        let s = integrals::overlap(&c.basis);
        for i in 0..s.nrows() {
            assert!((s[(i, i)] - 1.0).abs() < 1e-12, "{file}: diag S");
        }
        let mut d = vec![
            ("S", max_dev(&s, &s_py, f, f)),
            (
                "T",
                max_dev(
                    &integrals::kinetic(&c.basis),
                    &matrix(&c.fx["kinetic"]),
                    f,
                    f,
                ),
            ),
            (
                "V",
                max_dev(
                    &integrals::nuclear_attraction(&c.basis),
                    &matrix(&c.fx["nuclear"]),
                    f,
                    f,
                ),
            ),
        ];
        let o: Vec<f64> = c.fx["origin_bohr"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect();
        let dip = integrals::dipole(&c.basis, [o[0], o[1], o[2]]);
        for k in 0..3 {
            d.push((
                "dipole",
                max_dev(&dip[k], &matrix(&c.fx["dipole"][k]), f, f),
            ));
        }
        let quad = integrals::quadrupole(&c.basis, [o[0], o[1], o[2]]);
        for k in 0..6 {
            d.push((
                "quadrupole",
                max_dev(&quad[k], &matrix(&c.fx["quadrupole"][k]), f, f),
            ));
        }
        for (what, dev) in d {
            assert!(dev < 1e-10, "{file} {what}: deviation {dev:e}");
            worst = worst.max(dev);
        }
    }
    eprintln!("one-electron worst deviation vs PySCF: {worst:.2e}");
}

// ---------------------------------------------------------------------------
// Szabo & Ostlund H2 / STO-3G
// ---------------------------------------------------------------------------

/// Szabo & Ostlund, Modern Quantum Chemistry, §3.5.2, H2 STO-3G (ζ = 1.24),
/// R = 1.4 bohr: the tabulated integrals to the printed four decimals.
#[test]
fn szabo_ostlund_h2_sto3g() {
    let h = Element::from_symbol("H").unwrap();
    let r1 = [0.0, 0.0, 0.0];
    let r2 = [0.0, 0.0, 1.4];
    let mol = Molecule::from_elements_positions_bohr(&[h, h], &[r1, r2]).unwrap();
    let b = BasisSet::builtin(&mol, "STO-3G").unwrap();
    let s = integrals::overlap(&b);
    let t = integrals::kinetic(&b);
    let v1 = integrals::point_charge_attraction(&b, &[(1.0, r1)]);
    let hc = integrals::core_hamiltonian(&b);
    let eri = integrals::eri_tensor(&b);
    let g = |i: usize, j: usize, k: usize, l: usize| eri[((i * 2 + j) * 2 + k) * 2 + l];
    let tol = 0.5e-4 + 1e-9; // half a unit in the last printed digit
    let checks = [
        ("S12", s[(0, 1)], 0.6593),
        ("T11", t[(0, 0)], 0.7600),
        ("T12", t[(0, 1)], 0.2365),
        ("V1_11", v1[(0, 0)], -1.2266),
        ("V1_12", v1[(0, 1)], -0.5974),
        ("V1_22", v1[(1, 1)], -0.6538),
        ("H11", hc[(0, 0)], -1.1204),
        ("H12", hc[(0, 1)], -0.9584),
        ("(11|11)", g(0, 0, 0, 0), 0.7746),
        ("(11|22)", g(0, 0, 1, 1), 0.5697),
        ("(21|11)", g(1, 0, 0, 0), 0.4441),
        ("(21|21)", g(1, 0, 1, 0), 0.2970),
    ];
    for (name, ours, book) in checks {
        assert!((ours - book).abs() <= tol, "{name}: {ours} vs {book}");
    }
}

// ---------------------------------------------------------------------------
// ERIs against PySCF
// ---------------------------------------------------------------------------

fn weights(n: usize) -> impl Fn(usize, usize, usize, usize) -> f64 {
    let _ = n;
    |i, j, k, l| (0.31 * i as f64 + 0.17 * j as f64 + 0.23 * k as f64 + 0.11 * l as f64).cos()
}

const ERI_FILES: &[&str] = &[
    "integrals_h2o_basis_spdfg_test.json",
    "integrals_h2o_basis_spdfg_test_cart.json",
    "integrals_h2_sto-3g.json",
    "integrals_h2o_sto-3g.json",
    "integrals_h2o_6-31g_st.json",
    "integrals_h2o_cc-pvdz.json",
    "integrals_nh3_6-31g_st.json",
    "integrals_nh3_cc-pvdz.json",
    "integrals_ch2o_6-31g_st.json",
    "integrals_ch2o_cc-pvdz.json",
];

/// 300 selected ERIs (1e−10 absolute) and the weighted sum over all n⁴
/// elements (1e−10 relative) for 4 molecules × 3 basis sets, and water in a
/// small s–g test basis (f and g shells, spherical and Cartesian), against PySCF.
#[test]
fn eris_match_pyscf() {
    let (mut worst_el, mut worst_sum): (f64, f64) = (0.0, 0.0);
    for file in ERI_FILES {
        let c = load_case(file);
        let n = c.basis.nbf;
        let f = &c.scale;
        let eri = integrals::eri_tensor(&c.basis);
        let fx = &c.fx["eri"];
        let idx = fx["selected_indices"].as_array().unwrap();
        let vals = fx["selected_values"].as_array().unwrap();
        for (ix, v) in idx.iter().zip(vals) {
            let q: Vec<usize> = ix
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap() as usize)
                .collect();
            let r = v.as_f64().unwrap() / (f[q[0]] * f[q[1]] * f[q[2]] * f[q[3]]);
            let ours = eri[((q[0] * n + q[1]) * n + q[2]) * n + q[3]];
            let d = (ours - r).abs();
            assert!(d < 1e-10, "{file} {q:?}: {ours} vs {r}");
            worst_el = worst_el.max(d);
        }
        let w = weights(n);
        let mut sum = 0.0;
        for i in 0..n {
            for j in 0..n {
                for k in 0..n {
                    for l in 0..n {
                        sum += w(i, j, k, l)
                            * eri[((i * n + j) * n + k) * n + l]
                            * f[i]
                            * f[j]
                            * f[k]
                            * f[l];
                    }
                }
            }
        }
        let r = fx["weighted_sum"].as_f64().unwrap();
        let rel = ((sum - r) / r.abs().max(1.0)).abs();
        assert!(rel < 1e-10, "{file}: weighted sum {sum} vs {r}");
        worst_sum = worst_sum.max(rel);
    }
    eprintln!("ERI worst element deviation {worst_el:.2e}, worst weighted-sum relative deviation {worst_sum:.2e}");
}

// ---------------------------------------------------------------------------
// derivatives
// ---------------------------------------------------------------------------

const DERIV_FILES: &[&str] = &[
    "integrals_h2o_basis_spdfg_test.json",
    "integrals_h2o_basis_spdfg_test_cart.json",
    "integrals_h2o_sto-3g.json",
    "integrals_h2o_6-31g_st.json",
    "integrals_h2o_cc-pvdz.json",
    "integrals_nh3_6-31g_st.json",
    "integrals_nh3_cc-pvdz.json",
    "integrals_ch2o_cc-pvdz.json",
];

/// Bra-centre derivatives of S, T, V (PySCF int1e_ipovlp/ipkin/ipnuc with the
/// opposite sign), full dh/dR (PySCF's RHF-gradient hcore derivative) and the
/// mixed overlap between two geometries (PySCF intor_cross) against the
/// fixtures: 1e−10 absolute.
#[test]
fn derivative_and_mixed_integrals_match_pyscf() {
    let mut worst: f64 = 0.0;
    for file in DERIV_FILES {
        let c = load_case(file);
        let f = &c.scale;
        let mut devs = Vec::new();
        for (key, ours) in [
            ("ip_overlap", integrals::overlap_bra_derivative(&c.basis)),
            ("ip_kinetic", integrals::kinetic_bra_derivative(&c.basis)),
            ("ip_nuclear", integrals::nuclear_bra_derivative(&c.basis)),
        ] {
            for d in 0..3 {
                devs.push((key, max_dev(&(-&ours[d]), &matrix(&c.fx[key][d]), f, f)));
            }
        }
        let dh = integrals::core_hamiltonian_nuclear_derivatives(&c.basis);
        for (a, per_atom) in c.fx["hcore_derivatives"]
            .as_array()
            .unwrap()
            .iter()
            .enumerate()
        {
            for d in 0..3 {
                devs.push((
                    "hcore_derivatives",
                    max_dev(&dh[3 * a + d], &matrix(&per_atom[d]), f, f),
                ));
            }
        }
        let mol2 = molecule_from(&c.fx["displaced_atoms"]);
        let b2 = BasisSet::new(&mol2, &basis_data(&c.fx), Some(c.basis.harmonics)).unwrap();
        devs.push((
            "mixed_overlap",
            max_dev(
                &integrals::overlap_between(&c.basis, &b2),
                &matrix(&c.fx["mixed_overlap"]),
                f,
                f,
            ),
        ));
        for (what, dev) in devs {
            assert!(dev < 1e-10, "{file} {what}: {dev:e}");
            worst = worst.max(dev);
        }
    }
    eprintln!("derivative / mixed-overlap worst deviation vs PySCF: {worst:.2e}");
}

/// (∂a/∂A b|cd) against PySCF's int2e_ip1 (opposite sign): 300 elements at
/// 1e−10 absolute and the weighted sums at 1e−10 relative.
#[test]
fn eri_derivatives_match_pyscf() {
    let mut worst: f64 = 0.0;
    for file in [
        "integrals_h2o_sto-3g.json",
        "integrals_h2o_6-31g_st.json",
        "integrals_h2o_cc-pvdz.json",
        "integrals_nh3_6-31g_st.json",
        "integrals_nh3_cc-pvdz.json",
    ] {
        let c = load_case(file);
        let n = c.basis.nbf;
        let f = &c.scale;
        let d = integrals::eri_bra_derivative_tensor(&c.basis);
        let fx = &c.fx["eri_ip1"];
        for ((ix, comp), v) in fx["selected_indices"]
            .as_array()
            .unwrap()
            .iter()
            .zip(fx["selected_components"].as_array().unwrap())
            .zip(fx["selected_values"].as_array().unwrap())
        {
            let q: Vec<usize> = ix
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap() as usize)
                .collect();
            let k = comp.as_u64().unwrap() as usize;
            let r = -v.as_f64().unwrap() / (f[q[0]] * f[q[1]] * f[q[2]] * f[q[3]]);
            let ours = d[k][((q[0] * n + q[1]) * n + q[2]) * n + q[3]];
            assert!((ours - r).abs() < 1e-10, "{file} {k} {q:?}: {ours} vs {r}");
            worst = worst.max((ours - r).abs());
        }
        let w = weights(n);
        for k in 0..3 {
            let mut sum = 0.0;
            for i in 0..n {
                for j in 0..n {
                    for a in 0..n {
                        for b in 0..n {
                            sum -= w(i, j, a, b)
                                * d[k][((i * n + j) * n + a) * n + b]
                                * f[i]
                                * f[j]
                                * f[a]
                                * f[b];
                        }
                    }
                }
            }
            let r = fx["weighted_sum"][k].as_f64().unwrap();
            assert!(
                ((sum - r) / r.abs().max(1.0)).abs() < 1e-10,
                "{file} comp {k}: {sum} vs {r}"
            );
        }
    }
    eprintln!("ERI-derivative worst element deviation vs PySCF: {worst:.2e}");
}

fn displaced(mol: &Molecule, atom: usize, d: usize, h: f64) -> Molecule {
    let mut m = mol.clone();
    m.atoms[atom].position_bohr[d] += h;
    m
}

/// dS/dR and dh/dR against central finite differences (h = 1e−4 bohr) of our
/// own S and h: 1e−7 (common practice).
#[test]
fn one_electron_derivatives_match_finite_differences() {
    for (file, name, harm) in [
        (
            "integrals_h2o_cc-pvdz.json",
            "cc-pVDZ",
            Harmonics::Spherical,
        ),
        (
            "integrals_nh3_6-31g_st.json",
            "6-31G*",
            Harmonics::Cartesian,
        ),
    ] {
        let mol = molecule_from(&fixture(file)["atoms"]);
        let data = BasisSetData::builtin(name).unwrap();
        let b = BasisSet::new(&mol, &data, Some(harm)).unwrap();
        let ds = integrals::overlap_nuclear_derivatives(&b);
        let dh = integrals::core_hamiltonian_nuclear_derivatives(&b);
        let h = 1e-4;
        for atom in 0..mol.len() {
            for d in 0..3 {
                let bp = BasisSet::new(&displaced(&mol, atom, d, h), &data, Some(harm)).unwrap();
                let bm = BasisSet::new(&displaced(&mol, atom, d, -h), &data, Some(harm)).unwrap();
                let fs = (integrals::overlap(&bp) - integrals::overlap(&bm)) / (2.0 * h);
                let fh = (integrals::core_hamiltonian(&bp) - integrals::core_hamiltonian(&bm))
                    / (2.0 * h);
                let es = (&fs - &ds[3 * atom + d]).amax();
                let eh = (&fh - &dh[3 * atom + d]).amax();
                assert!(
                    es < 1e-7 && eh < 1e-7,
                    "{name} atom {atom} dir {d}: S {es:e}, h {eh:e}"
                );
            }
        }
    }
}

/// Lowest `nocc` orbitals of the core Hamiltonian → density 2 C Cᵀ.
fn core_guess_density(b: &BasisSet, nocc: usize) -> DMatrix<f64> {
    let s = integrals::overlap(b);
    let h = integrals::core_hamiltonian(b);
    let es = SymmetricEigen::new(s);
    let x = &es.eigenvectors
        * DMatrix::from_diagonal(&es.eigenvalues.map(|v| 1.0 / v.sqrt()))
        * es.eigenvectors.transpose();
    let hp = x.transpose() * h * &x;
    let eh = SymmetricEigen::new(hp);
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

fn two_electron_energy(b: &BasisSet, d: &DMatrix<f64>) -> (f64, f64) {
    let r = integrals::coulomb_exchange(b, std::slice::from_ref(d), &JkOptions::default()).unwrap();
    (0.5 * d.dot(&r.j[0]), 0.25 * d.dot(&r.k[0]))
}

/// dE₂/dR of E₂ = ½ tr(D J) − ¼ tr(D K) for a fixed AO density against central
/// finite differences (h = 1e−4): 1e−7 (common practice).
#[test]
fn two_electron_gradient_matches_finite_differences() {
    let mol = molecule_from(&fixture("integrals_h2o_6-31g_st.json")["atoms"]);
    for name in ["6-31G*", "cc-pVDZ"] {
        let data = BasisSetData::builtin(name).unwrap();
        let b = BasisSet::new(&mol, &data, None).unwrap();
        let d = core_guess_density(&b, 5);
        let g = integrals::jk_gradient(&b, std::slice::from_ref(&d), 1.0, 0.5).unwrap();
        let h = 1e-4;
        for atom in 0..mol.len() {
            for k in 0..3 {
                let e = |m: &Molecule| {
                    let (j, x) = two_electron_energy(&BasisSet::new(m, &data, None).unwrap(), &d);
                    j - x
                };
                let fd = (e(&displaced(&mol, atom, k, h)) - e(&displaced(&mol, atom, k, -h)))
                    / (2.0 * h);
                assert!(
                    (fd - g[atom][k]).abs() < 1e-7,
                    "{name} atom {atom} dir {k}: {} vs fd {fd}",
                    g[atom][k]
                );
            }
        }
    }
}

/// Two-density (unrestricted-type) gradient: E₂ = ½ c_J tr(D J[D]) −
/// ½ c_K Σ_σ tr(D^σ K[D^σ]), D = D^α + D^β, with two different fixed
/// densities and a hybrid-like c_K, against central finite differences
/// (h = 1e−4) of the same energy built from our own J/K matrices (an exact
/// identity up to the finite-difference error): 1e−7 (common practice).
#[test]
fn two_density_jk_gradient_matches_finite_differences() {
    let mol = molecule_from(&fixture("integrals_h2o_6-31g_st.json")["atoms"]);
    let data = BasisSetData::builtin("6-31G*").unwrap();
    let b = BasisSet::new(&mol, &data, None).unwrap();
    let da = 0.5 * core_guess_density(&b, 5);
    let db = 0.5 * core_guess_density(&b, 4);
    assert!((&da - &db).amax() > 1e-2, "the two densities must differ");
    let (c_j, c_k) = (1.0, 0.7);
    let dens = vec![da, db];
    let g = integrals::jk_gradient(&b, &dens, c_j, c_k).unwrap();
    let energy = |m: &Molecule| {
        let bm = BasisSet::new(m, &data, None).unwrap();
        let r = integrals::coulomb_exchange(&bm, &dens, &JkOptions::default()).unwrap();
        let dt = &dens[0] + &dens[1];
        let ej = 0.5 * c_j * dt.dot(&(&r.j[0] + &r.j[1]));
        let ek = 0.5 * c_k * (dens[0].dot(&r.k[0]) + dens[1].dot(&r.k[1]));
        ej - ek
    };
    let h = 1e-4;
    let mut total = [0.0; 3];
    for atom in 0..mol.len() {
        for k in 0..3 {
            let fd = (energy(&displaced(&mol, atom, k, h)) - energy(&displaced(&mol, atom, k, -h)))
                / (2.0 * h);
            assert!(
                (fd - g[atom][k]).abs() < 1e-7,
                "atom {atom} dir {k}: {} vs fd {fd}",
                g[atom][k]
            );
            total[k] += g[atom][k];
        }
    }
    // translational invariance of the two-electron energy
    for t in total {
        assert!(t.abs() < 1e-8, "gradient sum {t}");
    }
}

// ---------------------------------------------------------------------------
// J/K builds
// ---------------------------------------------------------------------------

/// In-core and direct J/K, and K alone, for several densities (one not
/// symmetric) against the explicit contraction with the full ERI tensor
/// (reference implementation).
#[test]
fn jk_builds_agree_with_explicit_contraction() {
    let mol = molecule_from(&fixture("integrals_nh3_cc-pvdz.json")["atoms"]);
    let b = BasisSet::builtin(&mol, "cc-pVDZ").unwrap();
    let n = b.nbf;
    let d1 = core_guess_density(&b, 5);
    let d2 = DMatrix::from_fn(n, n, |i, j| ((i * 7 + j * 3) as f64 * 0.37).sin() * 0.1);
    let dens = vec![d1, d2];
    let eri = integrals::eri_tensor(&b);
    let jk_in = integrals::coulomb_exchange(&b, &dens, &JkOptions::default()).unwrap();
    assert!(jk_in.in_core);
    let sp = integrals::ShellPairs::new(&b);
    let jk_dir = integrals::coulomb_exchange_direct(
        &sp,
        &dens,
        &JkOptions {
            threshold: 1e-14,
            ..JkOptions::default()
        },
    )
    .unwrap();
    assert!(!jk_dir.in_core);
    // K alone (the response's exchange-type builds), in core and direct.
    let mut in_core = flipswarm::electronic::qc::scf::fock::JkEngine::new(&b, JkOptions::default());
    assert!(in_core.in_core());
    let k_in = in_core.k_only(&dens).unwrap();
    let mut direct = flipswarm::electronic::qc::scf::fock::JkEngine::new(
        &b,
        JkOptions {
            threshold: 1e-14,
            max_in_core_bytes: 0,
            ..JkOptions::default()
        },
    );
    assert!(!direct.in_core());
    let k_dir = direct.k_only(&dens).unwrap();
    for (m, d) in dens.iter().enumerate() {
        let j_ref = DMatrix::from_fn(n, n, |p, q| {
            (0..n)
                .flat_map(|r| (0..n).map(move |s| (r, s)))
                .map(|(r, s)| eri[((p * n + q) * n + r) * n + s] * d[(r, s)])
                .sum::<f64>()
        });
        let k_ref = DMatrix::from_fn(n, n, |p, r| {
            (0..n)
                .flat_map(|q| (0..n).map(move |s| (q, s)))
                .map(|(q, s)| eri[((p * n + q) * n + r) * n + s] * d[(q, s)])
                .sum::<f64>()
        });
        for (what, a, bm) in [
            ("J in-core", &jk_in.j[m], &j_ref),
            ("K in-core", &jk_in.k[m], &k_ref),
            ("J direct", &jk_dir.j[m], &j_ref),
            ("K direct", &jk_dir.k[m], &k_ref),
            ("K alone in-core", &k_in[m], &k_ref),
            ("K alone direct", &k_dir[m], &k_ref),
        ] {
            let e = (a - bm).amax();
            assert!(e < 1e-11, "density {m} {what}: {e:e}");
        }
    }
}

fn rotation(ax: f64, ay: f64, az: f64) -> Matrix3<f64> {
    let rx = Matrix3::new(
        1.0,
        0.0,
        0.0,
        0.0,
        ax.cos(),
        -ax.sin(),
        0.0,
        ax.sin(),
        ax.cos(),
    );
    let ry = Matrix3::new(
        ay.cos(),
        0.0,
        ay.sin(),
        0.0,
        1.0,
        0.0,
        -ay.sin(),
        0.0,
        ay.cos(),
    );
    let rz = Matrix3::new(
        az.cos(),
        -az.sin(),
        0.0,
        az.sin(),
        az.cos(),
        0.0,
        0.0,
        0.0,
        1.0,
    );
    rz * ry * rx
}

/// The Coulomb (and exchange) energy of the same density, carried rigidly
/// with the molecule, does not change under rotation and translation (exact
/// invariance; the density is the core-Hamiltonian density of each
/// orientation, which is the rotated density). 1e−10.
#[test]
fn coulomb_energy_is_rotation_and_translation_invariant() {
    let mol = molecule_from(&fixture("integrals_h2o_cc-pvdz.json")["atoms"]);
    for name in ["6-31G*", "cc-pVDZ"] {
        let b0 = BasisSet::builtin(&mol, name).unwrap();
        let (j0, k0) = two_electron_energy(&b0, &core_guess_density(&b0, 5));
        assert!(j0 > 10.0 && k0 > 1.0);
        for (rot, shift) in [
            (rotation(0.3, -1.1, 2.0), [0.0, 0.0, 0.0]),
            (rotation(0.0, 0.0, 0.0), [1.5, -2.0, 0.7]),
            (rotation(2.5, 0.4, -0.9), [-3.0, 0.2, 1.1]),
        ] {
            let mut m = mol.clone();
            for a in &mut m.atoms {
                let p = rot * nalgebra::Vector3::from(a.position_bohr);
                a.position_bohr = [p[0] + shift[0], p[1] + shift[1], p[2] + shift[2]];
            }
            let b = BasisSet::builtin(&m, name).unwrap();
            let (j, k) = two_electron_energy(&b, &core_guess_density(&b, 5));
            assert!(
                (j - j0).abs() < 1e-10 && (k - k0).abs() < 1e-10,
                "{name}: J {j} vs {j0}, K {k} vs {k0}"
            );
        }
    }
}

// ---------------------------------------------------------------------------
// basis sets: normalisation, choices, user files, errors
// ---------------------------------------------------------------------------

/// Every built-in basis, every element H–Ar, Cartesian and spherical: all
/// functions unit-normalised (common practice), and the function counts per
/// atom that the literature quotes (e.g. 6-31G* C: 15 with 6d; cc-pVDZ C: 14).
#[test]
fn builtin_bases_are_normalised() {
    for name in flipswarm::electronic::qc::basis::builtin_basis_names() {
        let data = BasisSetData::builtin(name).unwrap();
        for z in 1..=18u64 {
            let el = Element::from_atomic_number(z).unwrap();
            let mol = Molecule::from_elements_positions_bohr(&[el], &[[0.1, -0.2, 0.3]]).unwrap();
            for harm in [Harmonics::Cartesian, Harmonics::Spherical] {
                let b = BasisSet::new(&mol, &data, Some(harm)).unwrap();
                let s = integrals::overlap(&b);
                for i in 0..b.nbf {
                    assert!(
                        (s[(i, i)] - 1.0).abs() < 1e-12,
                        "{name} Z={z} {harm:?} function {i}: {}",
                        s[(i, i)]
                    );
                }
            }
        }
    }
    let c = Element::from_symbol("C").unwrap();
    let mol = Molecule::from_elements_positions_bohr(&[c], &[[0.0; 3]]).unwrap();
    // common practice: Pople sets Cartesian (6d), cc-pVDZ and def2 spherical
    for (name, nbf) in [
        ("STO-3G", 5),
        ("3-21G", 9),
        ("6-31G", 9),
        ("6-31G*", 15),
        ("6-31G**", 15),
        ("6-31+G*", 19),
        ("cc-pVDZ", 14),
        ("def2-SVP", 14),
    ] {
        assert_eq!(BasisSet::builtin(&mol, name).unwrap().nbf, nbf, "{name}");
    }
    // override: cc-pVDZ with Cartesian d has 15 functions on carbon
    let data = BasisSetData::builtin("cc-pvdz").unwrap();
    assert_eq!(
        BasisSet::new(&mol, &data, Some(Harmonics::Cartesian))
            .unwrap()
            .nbf,
        15
    );
}

/// f and g shells (in no built-in set for H–Ar, so checked here): spherical
/// functions of one shell are orthonormal (real solid harmonics are orthogonal
/// on the sphere; from memory), Cartesian components are unit-normalised, and
/// the Cartesian shell spans the spherical one (the spherical functions are
/// linear combinations with the documented transformation: their overlap with
/// the Cartesian set, projected, reproduces the identity).
#[test]
fn f_and_g_shells_are_normalised_and_orthonormal() {
    let text = r#"{"name": "fg-test", "elements": {"6": {"electron_shells": [
        {"angular_momentum": [3], "exponents": ["2.1", "0.6"], "coefficients": [["0.4", "0.7"]]},
        {"angular_momentum": [4], "exponents": ["1.3"], "coefficients": [["1.0"]]}]}}}"#;
    let c = Element::from_symbol("C").unwrap();
    let mol = Molecule::from_elements_positions_bohr(&[c], &[[0.3, 0.1, -0.2]]).unwrap();
    let data = BasisSetData::from_json_str(text, "fg-test", Harmonics::Spherical).unwrap();
    let sph = BasisSet::new(&mol, &data, None).unwrap();
    assert_eq!(sph.nbf, 7 + 9);
    let s = integrals::overlap(&sph);
    assert!(
        (&s - DMatrix::identity(16, 16)).amax() < 1e-12,
        "spherical f/g overlap {s}"
    );
    let cartb = BasisSet::new(&mol, &data, Some(Harmonics::Cartesian)).unwrap();
    assert_eq!(cartb.nbf, 10 + 15);
    let sc = integrals::overlap(&cartb);
    for i in 0..cartb.nbf {
        assert!((sc[(i, i)] - 1.0).abs() < 1e-12);
    }
    // spherical ⊂ span(Cartesian): P = Sᵀ_x S_c⁻¹ S_x = 1 on the spherical set
    let sx = integrals::overlap_between(&cartb, &sph);
    let p = sx.transpose() * sc.clone().try_inverse().unwrap() * &sx;
    assert!(
        (&p - DMatrix::identity(16, 16)).amax() < 1e-10,
        "projection {p}"
    );
}

/// A user-supplied basis file in the same JSON schema loads and is normalised.
#[test]
fn user_basis_file() {
    let text = r#"{"name": "my-test-basis", "elements": {"1": {"electron_shells": [
        {"angular_momentum": [0], "exponents": ["1.5", "0.3"], "coefficients": [["0.6", "0.5"]]},
        {"angular_momentum": [0, 1], "exponents": ["0.8"], "coefficients": [["1.0"], ["1.0"]]},
        {"angular_momentum": [2], "exponents": ["1.1"], "coefficients": [["1.0"]]}]}}}"#;
    let path =
        std::env::temp_dir().join(format!("flipswarm-user-basis-{}.json", std::process::id()));
    std::fs::write(&path, text).unwrap();
    let data = BasisSetData::from_file(&path, Harmonics::Spherical).unwrap();
    std::fs::remove_file(&path).ok();
    assert_eq!(data.name, "my-test-basis");
    let h = Element::from_symbol("H").unwrap();
    let mol = Molecule::from_elements_positions_bohr(&[h], &[[0.0; 3]]).unwrap();
    let b = BasisSet::new(&mol, &data, None).unwrap();
    assert_eq!(b.nbf, 1 + 1 + 3 + 5);
    let s = integrals::overlap(&b);
    for i in 0..b.nbf {
        assert!((s[(i, i)] - 1.0).abs() < 1e-12);
    }
    // missing element in a user basis names element and basis
    let he = Element::from_symbol("He").unwrap();
    let mol2 = Molecule::from_elements_positions_bohr(&[he], &[[0.0; 3]]).unwrap();
    let e = BasisSet::new(&mol2, &data, None).unwrap_err();
    assert!(
        e.to_string().contains("He") && e.to_string().contains("my-test-basis"),
        "{e}"
    );
}

/// Bad input gives typed errors with useful messages.
#[test]
fn bad_input_errors() {
    let k = Element::from_symbol("K").unwrap();
    let mol = Molecule::from_elements_positions_bohr(&[k], &[[0.0; 3]]).unwrap();
    match BasisSet::builtin(&mol, "6-31+G*") {
        Err(BasisError::MissingElement { element, basis, z }) => {
            assert_eq!((element.as_str(), basis.as_str(), z), ("K", "6-31+G*", 19));
        }
        other => panic!("{other:?}"),
    }
    let e = BasisSetData::builtin("cc-pVQZ").unwrap_err();
    let msg = e.to_string();
    assert!(matches!(e, BasisError::UnknownBasis { .. }));
    for name in ["STO-3G", "6-31G*", "cc-pVDZ", "def2-SVP"] {
        assert!(msg.contains(name), "{msg}");
    }
    assert!(BasisSetData::builtin("6-31g(d,p)").is_ok());
    assert!(matches!(
        BasisSetData::from_json_str("{not json", "x.json", Harmonics::Cartesian),
        Err(BasisError::Parse { .. })
    ));
    let bad_num = r#"{"elements": {"1": {"electron_shells": [{"angular_momentum": [0], "exponents": ["abc"], "coefficients": [["1.0"]]}]}}}"#;
    assert!(matches!(
        BasisSetData::from_json_str(bad_num, "x.json", Harmonics::Cartesian),
        Err(BasisError::Parse { .. })
    ));
    let too_high = r#"{"elements": {"1": {"electron_shells": [{"angular_momentum": [6], "exponents": ["1.0"], "coefficients": [["1.0"]]}]}}}"#;
    assert!(matches!(
        BasisSetData::from_json_str(too_high, "x.json", Harmonics::Cartesian),
        Err(BasisError::AngularMomentumTooHigh { l: 6, .. })
    ));
    let no_l = r#"{"elements": {"1": {"electron_shells": [{"angular_momentum": [], "exponents": ["1.0"], "coefficients": [["1.0"]]}]}}}"#;
    assert!(matches!(
        BasisSetData::from_json_str(no_l, "x.json", Harmonics::Cartesian),
        Err(BasisError::Parse { .. })
    ));
    let mismatch = r#"{"elements": {"1": {"electron_shells": [{"angular_momentum": [0], "exponents": ["1.0", "2.0"], "coefficients": [["1.0"]]}]}}}"#;
    assert!(matches!(
        BasisSetData::from_json_str(mismatch, "x.json", Harmonics::Cartesian),
        Err(BasisError::Parse { .. })
    ));
    let negative = r#"{"elements": {"1": {"electron_shells": [{"angular_momentum": [0], "exponents": ["-1.0"], "coefficients": [["1.0"]]}]}}}"#;
    assert!(matches!(
        BasisSetData::from_json_str(negative, "x.json", Harmonics::Cartesian),
        Err(BasisError::Parse { .. })
    ));
    let path = std::path::Path::new("/nonexistent/flipswarm/basis.json");
    assert!(matches!(
        BasisSetData::from_file(path, Harmonics::Cartesian),
        Err(BasisError::Io { .. })
    ));
    // density of the wrong size
    let h = Element::from_symbol("H").unwrap();
    let mol =
        Molecule::from_elements_positions_bohr(&[h, h], &[[0.0; 3], [0.0, 0.0, 1.4]]).unwrap();
    let b = BasisSet::builtin(&mol, "STO-3G").unwrap();
    let e = integrals::coulomb_exchange(&b, &[DMatrix::zeros(3, 3)], &JkOptions::default())
        .unwrap_err();
    assert!(
        e.to_string().contains("3x3") && e.to_string().contains("2 functions"),
        "{e}"
    );
}

// Source: the cc-pVDZ definition (Basis Set Exchange data in data/basis/):
// O has 3 s, 2 p and 1 d contractions, H 2 s and 1 p, the outermost s and p
// being single primitives of the contracted sets. The ERI code must see each
// (atom, l) as one general contraction (a single group per (atom, l)), which
// is what computes each primitive quartet once; the integrals themselves are
// checked against the PySCF fixtures above.
#[test]
fn general_contractions_and_their_split_primitives_form_one_group() {
    let mol = molecule_of(&[
        ("O", [0.0, 0.0, 0.0]),
        ("H", [0.0, 1.43, 1.11]),
        ("H", [0.0, -1.43, 1.11]),
    ]);
    let b = BasisSet::builtin(&mol, "cc-pVDZ").unwrap();
    let sp = integrals::ShellPairs::new(&b);
    let groups: Vec<(usize, usize)> = sp.group_info.iter().map(|g| (g.0, g.2)).collect();
    assert_eq!(
        groups,
        vec![(0, 3), (1, 2), (2, 1), (0, 2), (1, 1), (0, 2), (1, 1)]
    );
    let nf: usize = sp.group_ao.iter().map(|g| g.1).sum();
    assert_eq!(nf, b.nbf);
    assert_eq!(b.nbf, 24);
}
