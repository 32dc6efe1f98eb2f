//! Spin-flip response (collinear SF-TDA and MRSF-TDDFT) from a triplet
//! ROHF/ROKS reference.
//!
//! The outside references, named again beside each test:
//! * Szabo & Ostlund, *Modern Quantum Chemistry* (1989), §4 (full CI of H2 in
//!   STO-3G at R = 1.4 bohr: E = −1.1373 Eh, printed to four decimals).
//! * Exact quantum mechanics evaluated independently here: a brute-force
//!   determinant CI written in this file (its own Slater–Condon rules on
//!   bit-string determinants, MO integrals from the n⁴ AO tensor), with
//!   <S²> = |S+ψ|² and one-particle densities evaluated on the determinants.
//!   In the exact-exchange limit (c_x = 1, ROHF reference), SF-TDA must equal
//!   the CI over the Φ+ spin-flip determinants and MRSF the CI over the union
//!   of the T+ and T− spin-flip determinants (J. Chem. Phys. 149, 104101
//!   (2018), from memory, for the construction).
//! * Exact symmetry: atomic multiplets (the ³P and ¹D components of the
//!   carbon atom must be degenerate: the published criterion for spin-flip
//!   methods, J. Chem. Phys. 149, 104101 (2018), from memory), invariance
//!   to rigid motions, to O1/O2 rotations and to the choice T+ / T−.
//! * Spin contamination of collinear SF from a triplet (published
//!   observation, J. Chem. Phys. 118, 4807 (2003), from memory): states of
//!   <S²> ≈ 1 on the same molecule where MRSF is pure.

mod common;

use common::qc::{ethylene, molecule_of};
use flipswarm::chem::Molecule;
use flipswarm::electronic::qc::basis::BasisSet;
use flipswarm::electronic::qc::dft::grid::GridSpec;
use flipswarm::electronic::qc::dft::ks::{kohn_sham, KsOptions};
use flipswarm::electronic::qc::integrals::{self, JkOptions};
use flipswarm::electronic::qc::response::davidson::{jacobi, symmetric_eigen, DavidsonOptions};
use flipswarm::electronic::qc::response::{
    excited_states, ExcitedStates, Method, Mrsf, ResponseError, SpinFlip, StateRequest, StateSpin,
};
use flipswarm::electronic::qc::scf::fock::JkEngine;
use flipswarm::electronic::qc::scf::{
    self, hartree_fock, Electrons, Guess, Reference, ScfOptions, ScfResult,
};
use nalgebra::{DMatrix, DVector};
use std::collections::HashMap;

// ---------------------------------------------------------------- set-up

fn water() -> Molecule {
    molecule_of(&[
        ("O", [0.0, 0.0, 0.2217]),
        ("H", [0.0, 1.4309, -0.8867]),
        ("H", [0.0, -1.4309, -0.8867]),
    ])
}

fn formaldehyde() -> Molecule {
    molecule_of(&[
        ("C", [0.0, 0.0, -1.0]),
        ("O", [0.0, 0.0, 1.28]),
        ("H", [0.0, 1.77, -2.1]),
        ("H", [0.0, -1.77, -2.1]),
    ])
}

fn h2(r: f64) -> Molecule {
    molecule_of(&[("H", [0.0, 0.0, 0.0]), ("H", [0.0, 0.0, r])])
}

fn tight() -> ScfOptions {
    ScfOptions {
        energy_tolerance: 1e-11,
        gradient_tolerance: 1e-8,
        ..ScfOptions::default()
    }
}

fn triplet(basis: &BasisSet) -> Electrons {
    Electrons::from_charge_multiplicity(scf::nuclear_charge(basis), 0, 3).unwrap()
}

fn rohf(basis: &BasisSet, el: Electrons) -> ScfResult {
    // Tighter than for ROKS: the CI comparisons use the orbitals, the
    // response the Fock matrices of the last iteration's density.
    let opts = ScfOptions {
        energy_tolerance: 1e-12,
        gradient_tolerance: 1e-10,
        ..ScfOptions::default()
    };
    hartree_fock(
        basis,
        el,
        Reference::RestrictedOpen,
        &Guess::AtomicSuperposition,
        &opts,
        JkOptions::default(),
    )
    .unwrap()
}

fn roks(basis: &BasisSet, functional: &str) -> ScfResult {
    let opts = KsOptions {
        functional: functional.to_string(),
        grid: GridSpec::level("medium").unwrap(),
        jk: JkOptions::default(),
    };
    kohn_sham(
        basis,
        triplet(basis),
        Reference::RestrictedOpen,
        &Guess::AtomicSuperposition,
        &tight(),
        &opts,
    )
    .unwrap()
}

fn engine(basis: &BasisSet) -> JkEngine {
    JkEngine::new(basis, JkOptions::default())
}

fn dense_opts() -> DavidsonOptions {
    DavidsonOptions {
        dense_below: usize::MAX,
        ..DavidsonOptions::default()
    }
}

fn davidson_opts() -> DavidsonOptions {
    DavidsonOptions {
        dense_below: 0,
        residual_tolerance: 1e-6,
        ..DavidsonOptions::default()
    }
}

fn of_spin(states: &ExcitedStates, spin: StateSpin) -> Vec<f64> {
    states
        .states
        .iter()
        .filter(|s| s.spin == spin)
        .map(|s| s.energy)
        .collect()
}

fn max_diff(a: &[f64], b: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs())
        .fold(0.0, f64::max)
}

// ------------------------------------------- an independent determinant CI
//
// Spin orbitals: α of spatial orbital p is bit p, β is bit n + p; a
// determinant |bits> = a†_{s1} a†_{s2} … |vac> with s1 < s2 < … (ascending).

struct Ci {
    n: usize,
    h: DMatrix<f64>,
    eri: Vec<f64>,
    e_nuc: f64,
}

impl Ci {
    /// MO integrals of orbitals `c` (all of them).
    fn new(basis: &BasisSet, c: &DMatrix<f64>) -> Ci {
        let nbf = basis.nbf;
        let n = c.ncols();
        let h = c.transpose() * integrals::core_hamiltonian(basis) * c;
        let ao = integrals::eri_tensor(basis);
        // Four quarter transformations.
        let mut t = ao;
        let dims = |k: usize| -> [usize; 4] {
            let mut d = [nbf; 4];
            d[..k].fill(n);
            d
        };
        for step in 0..4 {
            let din = dims(step);
            let dout = dims(step + 1);
            let mut out = vec![0.0; dout.iter().product()];
            // transform index `step`
            let stride_in: [usize; 4] = [din[1] * din[2] * din[3], din[2] * din[3], din[3], 1];
            let stride_out: [usize; 4] =
                [dout[1] * dout[2] * dout[3], dout[2] * dout[3], dout[3], 1];
            for i0 in 0..dout[0] {
                for i1 in 0..dout[1] {
                    for i2 in 0..dout[2] {
                        for i3 in 0..dout[3] {
                            let idx = [i0, i1, i2, i3];
                            let mut s = 0.0;
                            for mu in 0..nbf {
                                let mut j = idx;
                                j[step] = mu;
                                let src = j[0] * stride_in[0]
                                    + j[1] * stride_in[1]
                                    + j[2] * stride_in[2]
                                    + j[3];
                                s += c[(mu, idx[step])] * t[src];
                            }
                            out[i0 * stride_out[0]
                                + i1 * stride_out[1]
                                + i2 * stride_out[2]
                                + i3] = s;
                        }
                    }
                }
            }
            t = out;
        }
        Ci {
            n,
            h,
            eri: t,
            e_nuc: integrals::nuclear_repulsion(basis),
        }
    }

    fn g(&self, p: usize, q: usize, r: usize, s: usize) -> f64 {
        let n = self.n;
        self.eri[((p * n + q) * n + r) * n + s]
    }

    /// Physicist <ab|cd> over spin orbitals.
    fn phys(&self, a: usize, b: usize, c: usize, d: usize) -> f64 {
        let n = self.n;
        if (a < n) != (c < n) || (b < n) != (d < n) {
            return 0.0;
        }
        self.g(a % n, c % n, b % n, d % n)
    }

    fn anti(&self, a: usize, b: usize, c: usize, d: usize) -> f64 {
        self.phys(a, b, c, d) - self.phys(a, b, d, c)
    }

    fn h1(&self, a: usize, b: usize) -> f64 {
        let n = self.n;
        if (a < n) != (b < n) {
            0.0
        } else {
            self.h[(a % n, b % n)]
        }
    }

    /// <D1|H|D2> (electronic) by Slater–Condon rules.
    fn element(&self, d1: u128, d2: u128) -> f64 {
        let diff = d1 ^ d2;
        let nd = diff.count_ones();
        let occ2: Vec<usize> = bits(d2);
        match nd {
            0 => {
                let mut e = 0.0;
                for (x, &i) in occ2.iter().enumerate() {
                    e += self.h1(i, i);
                    for &j in &occ2[..x] {
                        e += self.anti(i, j, i, j);
                    }
                }
                e
            }
            2 => {
                let m = bits(d2 & diff)[0];
                let p = bits(d1 & diff)[0];
                let (s, r) = apply(&[(true, p), (false, m)], d2).unwrap();
                assert_eq!(r, d1);
                let mut v = self.h1(p, m);
                for &k in &occ2 {
                    if k != m {
                        v += self.anti(p, k, m, k);
                    }
                }
                s * v
            }
            4 => {
                let mn = bits(d2 & diff);
                let pq = bits(d1 & diff);
                let (m, nn, p, q) = (mn[0], mn[1], pq[0], pq[1]);
                let (s, r) = apply(&[(true, p), (true, q), (false, nn), (false, m)], d2).unwrap();
                assert_eq!(r, d1);
                s * self.anti(p, q, m, nn)
            }
            _ => 0.0,
        }
    }

    fn hamiltonian(&self, dets: &[u128]) -> DMatrix<f64> {
        let k = dets.len();
        DMatrix::from_fn(k, k, |a, b| self.element(dets[a], dets[b]))
    }
}

fn bits(d: u128) -> Vec<usize> {
    (0..128).filter(|&k| (d >> k) & 1 == 1).collect()
}

/// Apply an operator string (leftmost acts last) to |bits>, with the sign.
fn apply(ops: &[(bool, usize)], mut d: u128) -> Option<(f64, u128)> {
    let mut sign = 1.0;
    for &(create, k) in ops.iter().rev() {
        let occ = (d >> k) & 1 == 1;
        if occ == create {
            return None;
        }
        if (d & ((1u128 << k) - 1)).count_ones() % 2 == 1 {
            sign = -sign;
        }
        d ^= 1u128 << k;
    }
    Some((sign, d))
}

/// The reference determinants and spin-flip configurations with their phases
/// (module conventions of `response`): T± = [Π_c a†_cα a†_cβ] a†_O1σ a†_O2σ|vac>,
/// Φ+(i→a) = a†_aβ a_iα T+, Φ−(i→a) = −a†_aα a_iβ T−.
struct Space {
    n: usize,
    nc: usize,
}

impl Space {
    fn reference(&self, beta_open: bool) -> (f64, u128) {
        let n = self.n;
        let mut ops = Vec::new();
        for c in 0..self.nc {
            ops.push((true, c));
            ops.push((true, n + c));
        }
        let off = if beta_open { n } else { 0 };
        ops.push((true, off + self.nc));
        ops.push((true, off + self.nc + 1));
        apply(&ops, 0).unwrap()
    }
    fn rows(&self) -> std::ops::Range<usize> {
        0..self.nc + 2
    }
    fn cols(&self) -> std::ops::Range<usize> {
        self.nc..self.n
    }
    /// Φ+(i→a) (sign, bits); i, a MO indices.
    fn plus(&self, i: usize, a: usize) -> (f64, u128) {
        let (s0, t) = self.reference(false);
        let (s, d) = apply(&[(true, self.n + a), (false, i)], t).unwrap();
        (s0 * s, d)
    }
    fn minus(&self, i: usize, a: usize) -> (f64, u128) {
        let (s0, t) = self.reference(true);
        let (s, d) = apply(&[(true, a), (false, self.n + i)], t).unwrap();
        (-s0 * s, d)
    }
    fn plus_dets(&self) -> Vec<u128> {
        let mut v = Vec::new();
        for a in self.cols() {
            for i in self.rows() {
                v.push(self.plus(i, a).1);
            }
        }
        v
    }
    fn union_dets(&self) -> Vec<u128> {
        let mut v = self.plus_dets();
        for a in self.cols() {
            for i in self.rows() {
                let d = self.minus(i, a).1;
                if !v.contains(&d) {
                    v.push(d);
                }
            }
        }
        v
    }
    /// ψ of a response state on determinants.
    fn expand(&self, x_plus: &DMatrix<f64>, x_minus: &DMatrix<f64>) -> HashMap<u128, f64> {
        let mut psi: HashMap<u128, f64> = HashMap::new();
        for (ci, a) in self.cols().enumerate() {
            for i in self.rows() {
                let (s, d) = self.plus(i, a);
                *psi.entry(d).or_insert(0.0) += s * x_plus[(i, ci)];
                if x_minus[(i, ci)] != 0.0 {
                    let (s, d) = self.minus(i, a);
                    *psi.entry(d).or_insert(0.0) += s * x_minus[(i, ci)];
                }
            }
        }
        psi
    }
}

fn s_squared(n: usize, psi: &HashMap<u128, f64>) -> f64 {
    // Ms = 0: <S²> = |S+ ψ|², S+ = Σ_p a†_pα a_pβ.
    let mut out: HashMap<u128, f64> = HashMap::new();
    for (&d, &c) in psi {
        for p in 0..n {
            if let Some((s, r)) = apply(&[(true, p), (false, n + p)], d) {
                *out.entry(r).or_insert(0.0) += s * c;
            }
        }
    }
    let norm: f64 = psi.values().map(|c| c * c).sum();
    out.values().map(|c| c * c).sum::<f64>() / norm
}

fn energy_and_residual(ci: &Ci, psi: &HashMap<u128, f64>, energy: f64) -> (f64, f64) {
    // residual over the union of the state's support and its H-neighbours is
    // expensive; use the Rayleigh quotient and the residual inside the
    // support (the union space, which holds the state).
    let keys: Vec<u128> = psi.keys().copied().collect();
    let v = DVector::from_iterator(keys.len(), keys.iter().map(|k| psi[k]));
    let h = ci.hamiltonian(&keys);
    let hv = &h * &v;
    let e = v.dot(&hv) / v.dot(&v) + ci.e_nuc;
    let r = (&hv - &v * (energy - ci.e_nuc)).norm();
    (e, r)
}

fn eigenvalues(h: &DMatrix<f64>) -> Vec<f64> {
    let mut e: Vec<f64> = h
        .clone()
        .symmetric_eigen()
        .eigenvalues
        .iter()
        .copied()
        .collect();
    e.sort_by(f64::total_cmp);
    e
}

// ------------------------------------------------------------------ tests

// Source: Szabo & Ostlund, Modern Quantum Chemistry (1989), §4: full CI of
// H2/STO-3G at 1.4 bohr, E = −1.1373 Eh; and an independent two-electron
// full CI (4 determinants in the Löwdin-orthogonalised AO basis, written
// here) along the dissociation curve. With no core and no virtuals the SF
// space of the triplet is the whole Ms = 0 space, so SF and MRSF singlets
// are the full CI.
#[test]
fn h2_minimal_basis_is_full_ci() {
    for (k, r) in [1.4, 0.8, 1.0, 2.0, 3.0, 4.5, 6.0].into_iter().enumerate() {
        let basis = BasisSet::builtin(&h2(r), "STO-3G").unwrap();
        let scf = rohf(&basis, Electrons { alpha: 2, beta: 0 });
        let mut eng = engine(&basis);
        let mut mrsf = Mrsf::new(&basis, &scf, 1.0, &mut eng).unwrap();
        assert_eq!((mrsf.singlet_dimension(), mrsf.triplet_dimension()), (3, 1));
        let m = mrsf.solve(3, 1, &DavidsonOptions::default()).unwrap();
        let mut eng = engine(&basis);
        let sf = SpinFlip::new(&basis, &scf, 1.0, &mut eng)
            .unwrap()
            .solve(4, &DavidsonOptions::default())
            .unwrap();
        // Independent FCI: orthonormal AOs, all four Ms = 0 determinants.
        let s = integrals::overlap(&basis);
        let x = scf::orthogonalizer(&s, 1e-10);
        let ci = Ci::new(&basis, &x);
        let dets: Vec<u128> = (0..2)
            .flat_map(|a| (0..2).map(move |b| (1u128 << a) | (1u128 << (2 + b))))
            .collect();
        let fci: Vec<f64> = eigenvalues(&ci.hamiltonian(&dets))
            .iter()
            .map(|e| e + ci.e_nuc)
            .collect();
        let mut all_m: Vec<f64> = m.states.iter().map(|s| s.energy).collect();
        all_m.sort_by(f64::total_cmp);
        let all_sf: Vec<f64> = sf.states.iter().map(|s| s.energy).collect();
        eprintln!(
            "R = {r:.2}: FCI {fci:.10?}\n          MRSF {all_m:.10?}\n          SF {all_sf:.10?}"
        );
        assert!(max_diff(&all_m, &fci) < 1e-9, "MRSF vs FCI at R = {r}");
        assert!(max_diff(&all_sf, &fci) < 1e-9, "SF vs FCI at R = {r}");
        // The triplet is the reference itself (ω = 0).
        assert!((of_spin(&m, StateSpin::Triplet)[0] - scf.energy).abs() < 1e-9);
        if k == 0 {
            // The one-call front end gives the same states.
            let mut eng = engine(&basis);
            let f = excited_states(
                &basis,
                &scf,
                1.0,
                &mut eng,
                StateRequest {
                    method: Method::SpinFlip,
                    singlets: 2,
                    triplets: 2,
                },
                &DavidsonOptions::default(),
            )
            .unwrap();
            assert!(max_diff(&energies(&f), &all_sf) < 1e-12);
            let mut eng = engine(&basis);
            let f = excited_states(
                &basis,
                &scf,
                1.0,
                &mut eng,
                StateRequest {
                    method: Method::Mrsf,
                    singlets: 3,
                    triplets: 1,
                },
                &DavidsonOptions::default(),
            )
            .unwrap();
            assert!(max_diff(&energies(&f), &all_m) < 1e-12);
            let e0 = m.states[m.ground.unwrap()].energy;
            assert!((e0 - (-1.1373)).abs() < 5e-5, "S0 = {e0}, textbook −1.1373");
        }
    }
}

// Source: exact algebra — the matrix-free product (batched K builds of
// transition densities) against A built from the n⁴ AO integral tensor;
// and the SF-TDA spectrum (c_x = 1, ROHF) against the brute-force CI over
// the Φ+ determinants written in this file. Also from T−: the CI over the
// Φ− determinants and the code fed the mirrored (Ms = −1) reference.
#[test]
fn sf_tda_exact_exchange_limit_is_ci_over_its_space() {
    let basis = BasisSet::builtin(&water(), "6-31G").unwrap();
    let scf = rohf(&basis, triplet(&basis));
    let mut eng = engine(&basis);
    let mut sf = SpinFlip::new(&basis, &scf, 1.0, &mut eng).unwrap();
    let explicit = sf.explicit_matrix(&basis);
    let dense = sf.dense_matrix().unwrap();
    let asym = (&explicit - explicit.transpose()).amax();
    let err = (&dense - &explicit).amax();
    eprintln!(
        "SF dimension {}, |A_matrix-free − A_explicit| = {err:.1e}, asymmetry {asym:.1e}",
        sf.dimension()
    );
    assert!(err < 1e-10 && asym < 1e-10);
    let p = sf.partition();
    let space = Space {
        n: p.n_mo,
        nc: p.n_core,
    };
    let ci = Ci::new(&basis, &scf.orbitals_alpha);
    let e_ci: Vec<f64> = eigenvalues(&ci.hamiltonian(&space.plus_dets()))
        .iter()
        .map(|e| e + ci.e_nuc)
        .collect();
    let res = sf.solve(p.sf_dimension(), &dense_opts()).unwrap();
    let e_sf: Vec<f64> = res.states.iter().map(|s| s.energy).collect();
    let d = max_diff(&e_sf, &e_ci);
    eprintln!(
        "SF vs CI over {} determinants: {d:.1e} Eh; lowest ω (eV) {:?}",
        e_ci.len(),
        res.states[..4]
            .iter()
            .map(|s| s.omega * 27.211386)
            .collect::<Vec<_>>()
    );
    assert!(d < 1e-8);
    // From T−: the CI over Φ− gives the same spectrum; so does the code.
    let minus: Vec<u128> = space
        .cols()
        .flat_map(|a| space.rows().map(move |i| (i, a)))
        .map(|(i, a)| space.minus(i, a).1)
        .collect();
    let e_ci_m: Vec<f64> = eigenvalues(&ci.hamiltonian(&minus))
        .iter()
        .map(|e| e + ci.e_nuc)
        .collect();
    assert!(max_diff(&e_ci_m, &e_ci) < 1e-8);
    let mirror = mirrored(&scf);
    let mut eng = engine(&basis);
    let res_m = SpinFlip::new(&basis, &mirror, 1.0, &mut eng)
        .unwrap()
        .solve(6, &dense_opts())
        .unwrap();
    let e_m: Vec<f64> = res_m.states.iter().map(|s| s.energy).collect();
    assert!(max_diff(&e_m, &e_sf[..6]) < 1e-10);
    // The SF <S²> formula against |S+ψ|² on the determinants.
    for s in &res.states[..8] {
        let psi = space.expand(&s.x_plus, &s.x_minus);
        let s2 = s_squared(p.n_mo, &psi);
        let (e, r) = energy_and_residual(&ci, &psi, s.energy);
        assert!(
            (s2 - s.s_squared).abs() < 1e-10,
            "<S²> {s2} vs {}",
            s.s_squared
        );
        assert!(
            (e - s.energy).abs() < 1e-8 && r < 1e-7,
            "state energy {e} vs {}, residual {r}",
            s.energy
        );
    }
}

/// The Ms = −1 image of a high-spin ROHF/ROKS result (spin labels swapped).
fn mirrored(scf: &ScfResult) -> ScfResult {
    let mut m = scf.clone();
    m.electrons = Electrons {
        alpha: scf.electrons.beta,
        beta: scf.electrons.alpha,
    };
    m.fock_alpha = scf.fock_beta.clone();
    m.fock_beta = scf.fock_alpha.clone();
    m.density_alpha = scf.density_beta.clone();
    m.density_beta = scf.density_alpha.clone();
    m
}

// Source: exact quantum mechanics — the brute-force determinant CI over the
// union of the T+ and T− spin-flip spaces (written in this file) against
// MRSF singlets ∪ triplets with c_x = κ = 1 on a ROHF reference, for water
// (6-31G) and formaldehyde (STO-3G); <S−T+|H − E(T+)|S−T+> = 0 (exact,
// [H, S−] = 0); each state's determinant expansion
// (module conventions) must be an eigenvector of the CI with the reported
// energy and <S²> (|S+ψ|²): 2 for triplets, 2 w_CV for singlets.
#[test]
fn mrsf_exact_exchange_limit_is_ci_over_the_union_space() {
    for (name, mol, bas) in [
        ("water", water(), "6-31G"),
        ("formaldehyde", formaldehyde(), "STO-3G"),
    ] {
        let basis = BasisSet::builtin(&mol, bas).unwrap();
        let scf = rohf(&basis, triplet(&basis));
        let mut eng = engine(&basis);
        let mut mrsf = Mrsf::new(&basis, &scf, 1.0, &mut eng).unwrap();
        let p = mrsf.partition();
        let (ns, nt) = (mrsf.singlet_dimension(), mrsf.triplet_dimension());
        assert_eq!(ns, p.sf_dimension() - 1);
        assert_eq!(nt, p.sf_dimension() - 3);
        let res = mrsf.solve(ns, nt, &dense_opts()).unwrap();
        let space = Space {
            n: p.n_mo,
            nc: p.n_core,
        };
        let ci = Ci::new(&basis, &scf.orbitals_alpha);
        let union = space.union_dets();
        assert_eq!(union.len(), 2 * p.sf_dimension() - 4);
        let e_ci: Vec<f64> = eigenvalues(&ci.hamiltonian(&union))
            .iter()
            .map(|e| e + ci.e_nuc)
            .collect();
        let mut e_m: Vec<f64> = res.states.iter().map(|s| s.energy).collect();
        e_m.sort_by(f64::total_cmp);
        let d = max_diff(&e_m, &e_ci);
        let s = of_spin(&res, StateSpin::Singlet);
        let t = of_spin(&res, StateSpin::Triplet);
        let ev = |e: f64| (e - scf.energy) * 27.211386;
        eprintln!(
            "{name}: union CI {} determinants, |MRSF − CI| = {d:.1e} Eh; singlets (eV vs triplet) {:.3} {:.3} {:.3}, triplets {:.3} {:.3}",
            union.len(), ev(s[0]), ev(s[1]), ev(s[2]), ev(t[0]), ev(t[1])
        );
        assert!(d < 1e-8, "{name}: {d}");
        // <S−T+|H|S−T+> = E(T+) exactly ([H, S−] = 0): the diagonal element
        // of the T0 configuration (the last of the triplet block) is zero.
        let t0 = mrsf.diagonal(StateSpin::Triplet)[nt - 1];
        assert!(t0.abs() < 1e-8, "{name}: <T0|A|T0> = {t0}");
        for st in res.states.iter().take(12) {
            let psi = space.expand(&st.x_plus, &st.x_minus);
            let norm: f64 = psi.values().map(|c| c * c).sum();
            let s2 = s_squared(p.n_mo, &psi);
            let (e, r) = energy_and_residual(&ci, &psi, st.energy);
            assert!((norm - 1.0).abs() < 1e-10, "norm {norm}");
            assert!(
                (e - st.energy).abs() < 1e-8 && r < 1e-7,
                "{name} {:?}: E {e} vs {}, residual {r}",
                st.spin,
                st.energy
            );
            assert!(
                (s2 - st.s_squared).abs() < 1e-9,
                "{name}: <S²> {s2} vs {}",
                st.s_squared
            );
            match st.spin {
                StateSpin::Triplet => assert!((s2 - 2.0).abs() < 1e-9),
                _ => assert!((s2 - 2.0 * st.cv_weight).abs() < 1e-9),
            }
        }
    }
}

// Source: exact linear algebra (M v = λ v for every returned pair). Regression
// test: on this 53-dimensional MRSF singlet block, nalgebra 0.33.3's
// symmetric_eigen paired two eigenvectors with the wrong eigenvalues
// (residual 0.39 Eh); the response solver checks and repairs the pairing.
#[test]
fn eigensolver_pairs_every_vector_with_its_value() {
    let basis = BasisSet::builtin(&water(), "6-31G").unwrap();
    let scf = rohf(&basis, triplet(&basis));
    let mut eng = engine(&basis);
    let mut mrsf = Mrsf::new(&basis, &scf, 1.0, &mut eng).unwrap();
    let m = mrsf.dense_matrix(StateSpin::Singlet).unwrap();
    // "raw" (scf::sorted_eigen, plain nalgebra) is printed for information only.
    for (name, (vals, vecs)) in [
        ("raw", scf::sorted_eigen(&m)),
        ("checked", symmetric_eigen(&m)),
        ("jacobi", jacobi(&m)),
    ] {
        if name == "raw" {
            let worst = (0..m.nrows())
                .map(|k| (&m * vecs.column(k) - vecs.column(k) * vals[k]).norm())
                .fold(0.0, f64::max);
            eprintln!("raw nalgebra: largest residual {worst:.2e}");
            continue;
        }
        let worst = (0..m.nrows())
            .map(|k| (&m * vecs.column(k) - vecs.column(k) * vals[k]).norm())
            .fold(0.0, f64::max);
        let orth =
            (vecs.transpose() * &vecs - DMatrix::<f64>::identity(m.nrows(), m.nrows())).amax();
        eprintln!(
            "{name}: dimension {}, largest residual {worst:.1e}, orthonormality {orth:.1e}",
            m.nrows()
        );
        assert!(worst < 1e-10 && orth < 1e-12);
        assert!(vals.windows(2).all(|w| w[0] <= w[1]));
    }
}

/// <ψ_I|Σ_σ a†_pσ a_qσ|ψ_J> on the determinants (MO indices).
fn tdm_on_determinants(
    n: usize,
    bra: &HashMap<u128, f64>,
    ket: &HashMap<u128, f64>,
) -> DMatrix<f64> {
    let mut g = DMatrix::zeros(n, n);
    for (&d, &c) in ket {
        for p in 0..n {
            for q in 0..n {
                for off in [0, n] {
                    if let Some((s, r)) = apply(&[(true, off + p), (false, off + q)], d) {
                        if let Some(b) = bra.get(&r) {
                            g[(p, q)] += b * s * c;
                        }
                    }
                }
            }
        }
    }
    g
}

// Source: exact quantum mechanics on the determinant expansions (written in
// this file): the spin-summed one-particle transition densities of MRSF
// (singlet–singlet, S0→Sn) and SF states equal <ψ_I|E_pq|ψ_J> evaluated on
// the determinants; the transition dipole and f = (2/3) ΔE |μ|² follow from
// the AO dipole integrals; traces: N for a state, 0 for a transition. All
// same-spin pairs (singlet–singlet including S0→Sn, triplet–triplet).
#[test]
fn transition_densities_match_the_determinant_expansion() {
    let basis = BasisSet::builtin(&water(), "6-31G").unwrap();
    let scf = rohf(&basis, triplet(&basis));
    let n_el = (scf.electrons.alpha + scf.electrons.beta) as f64;
    let s_ao = integrals::overlap(&basis);
    let c = scf.orbitals_alpha.clone();
    let charge: f64 = basis.nuclei.iter().map(|(z, _)| z).sum();
    let mut origin = [0.0; 3];
    for (z, r) in &basis.nuclei {
        for d in 0..3 {
            origin[d] += z * r[d] / charge;
        }
    }
    let dip: Vec<DMatrix<f64>> = integrals::dipole(&basis, origin)
        .iter()
        .map(|m| c.transpose() * m * &c)
        .collect();
    let mut eng = engine(&basis);
    let m = Mrsf::new(&basis, &scf, 1.0, &mut eng)
        .unwrap()
        .solve(4, 2, &dense_opts())
        .unwrap();
    let mut eng = engine(&basis);
    let sf = SpinFlip::new(&basis, &scf, 1.0, &mut eng)
        .unwrap()
        .solve(4, &dense_opts())
        .unwrap();
    let p = m.partition;
    let space = Space {
        n: p.n_mo,
        nc: p.n_core,
    };
    for (name, res) in [("MRSF", &m), ("SF", &sf)] {
        let pairs: Vec<(usize, usize)> = (0..res.states.len())
            .flat_map(|i| (i..res.states.len()).map(move |j| (i, j)))
            .filter(|&(i, j)| res.states[i].spin == res.states[j].spin)
            .collect();
        for (g0, j) in pairs {
            let a = &res.states[g0];
            let b = &res.states[j];
            let brute = tdm_on_determinants(
                p.n_mo,
                &space.expand(&a.x_plus, &a.x_minus),
                &space.expand(&b.x_plus, &b.x_minus),
            );
            let lib = res.transition_density_mo(g0, j).unwrap();
            let err = (&brute - &lib).amax();
            let tr = res.transition_density(g0, j).unwrap().dot(&s_ao);
            let mu_brute: Vec<f64> = dip.iter().map(|d| -brute.dot(d)).collect();
            let mu = res.transition_dipole(g0, j).unwrap();
            let f = res.oscillator_strength(g0, j).unwrap();
            let de = b.energy - a.energy;
            let f_brute = 2.0 / 3.0 * de * mu_brute.iter().map(|x| x * x).sum::<f64>();
            eprintln!("{name} {g0}→{j}: |γ − γ_det| = {err:.1e}, tr(DS) = {tr:.10}, μ = {mu:.5?}, f = {f:.5}");
            assert!(err < 1e-10, "{name} {g0}→{j}");
            let expect_tr = if j == g0 { n_el } else { 0.0 };
            assert!((tr - expect_tr).abs() < 1e-9);
            assert!((0..3).all(|d| (mu[d] - mu_brute[d]).abs() < 1e-10));
            assert!((f - f_brute).abs() < 1e-12);
            if j == g0 {
                let dd = res.difference_density(j).unwrap().dot(&s_ao);
                assert!(dd.abs() < 1e-9, "difference density integrates to {dd}");
            }
        }
        // The listed transitions are the same-spin pairs.
        for t in res.transitions() {
            assert_eq!(res.states[t.from].spin, res.states[t.to].spin);
            assert!(
                (t.oscillator_strength - res.oscillator_strength(t.from, t.to).unwrap()).abs()
                    < 1e-14
            );
        }
    }
}

fn formaldehyde_roks() -> (BasisSet, ScfResult) {
    let basis = BasisSet::builtin(&formaldehyde(), "6-31G").unwrap();
    let scf = roks(&basis, "bhhlyp");
    (basis, scf)
}

// Source: exact linear algebra — Davidson (matrix-free, diagonal
// preconditioner, collapse, locking) against dense diagonalisation of the
// same operator, BH&HLYP ROKS formaldehyde/6-31G, all requested roots to
// 1e-8 Eh; a small subspace limit forces collapses.
#[test]
fn davidson_agrees_with_dense_diagonalisation() {
    let (basis, scf) = formaldehyde_roks();
    let mut eng = engine(&basis);
    let mut mrsf = Mrsf::new(&basis, &scf, 0.5, &mut eng).unwrap();
    let dense = mrsf.solve(4, 3, &dense_opts()).unwrap();
    for max_subspace in [0, 16] {
        let before = mrsf.products();
        let opts = DavidsonOptions {
            max_subspace,
            ..davidson_opts()
        };
        let dav = mrsf.solve(4, 3, &opts).unwrap();
        let d = max_diff(
            &dav.states.iter().map(|s| s.energy).collect::<Vec<_>>(),
            &dense.states.iter().map(|s| s.energy).collect::<Vec<_>>(),
        );
        eprintln!(
            "MRSF (subspace limit {max_subspace}): |Davidson − dense| = {d:.1e} Eh, {} products (dimensions {} and {}), iterations {:?}",
            mrsf.products() - before,
            mrsf.singlet_dimension(),
            mrsf.triplet_dimension(),
            dav.solver.iter().map(|s| s.iterations).collect::<Vec<_>>()
        );
        assert!(d < 1e-8);
        for (a, b) in dav.states.iter().zip(&dense.states) {
            assert_eq!(a.spin, b.spin);
        }
    }
    // A warm start from converged states (as between trajectory steps)
    // reaches the same roots with fewer products.
    let before = mrsf.products();
    let cold = mrsf.solve(4, 3, &davidson_opts()).unwrap();
    let cold_products = mrsf.products() - before;
    let before = mrsf.products();
    let warm = mrsf
        .solve_from(4, 3, &davidson_opts(), Some(&cold))
        .unwrap();
    let warm_products = mrsf.products() - before;
    let d = max_diff(&energies(&warm), &energies(&dense));
    eprintln!("warm start: {warm_products} products (cold {cold_products}), |Δ| = {d:.1e} Eh");
    assert!(d < 1e-8 && warm_products < cold_products);
    let labels: Vec<String> = (0..warm.states.len())
        .map(|i| warm.label(i).unwrap())
        .collect();
    eprintln!("labels {labels:?}");
    assert_eq!(labels.iter().filter(|l| l.starts_with('S')).count(), 4);
    assert!(labels.contains(&"S0".to_string()) && labels.contains(&"T1".to_string()));
    let g = warm.ground.unwrap();
    assert_eq!(warm.oscillator_from_ground(g).unwrap(), None);
    // The integral-direct build (density-screened, non-symmetric transition
    // densities) gives the same states as the in-core store.
    let mut direct = JkEngine::new(
        &basis,
        JkOptions {
            max_in_core_bytes: 0,
            ..JkOptions::default()
        },
    );
    assert!(!direct.in_core());
    let dd = Mrsf::new(&basis, &scf, 0.5, &mut direct)
        .unwrap()
        .solve(4, 3, &davidson_opts())
        .unwrap();
    let d = max_diff(&energies(&dd), &energies(&dense));
    eprintln!("MRSF direct vs in-core: {d:.1e} Eh");
    assert!(d < 1e-8);
    let mut eng = engine(&basis);
    let mut sf = SpinFlip::new(&basis, &scf, 0.5, &mut eng).unwrap();
    let e_dense: Vec<f64> = sf
        .solve(6, &dense_opts())
        .unwrap()
        .states
        .iter()
        .map(|s| s.energy)
        .collect();
    let e_dav: Vec<f64> = sf
        .solve(6, &davidson_opts())
        .unwrap()
        .states
        .iter()
        .map(|s| s.energy)
        .collect();
    let d = max_diff(&e_dav, &e_dense);
    eprintln!("SF: |Davidson − dense| = {d:.1e} Eh");
    assert!(d < 1e-8);
}

// Source: exact spin algebra on the determinant expansion (|S+ψ|², written
// in this file) and the published observation that collinear SF from a
// triplet is spin-contaminated (J. Chem. Phys. 118, 4807 (2003), from
// memory) while MRSF is not: BH&HLYP ROKS formaldehyde/6-31G. Triplets
// <S²> = 2 to 1e-9; singlets <S²> = 2 w_CV, below 1e-6 when the state has
// no CV admixture beyond 5e-7 (module docs: the R-even CV combination is
// 1/3 quintet); SF shows states with <S²> near 1.
#[test]
fn mrsf_is_spin_pure_where_sf_is_contaminated() {
    let (basis, scf) = formaldehyde_roks();
    let mut eng = engine(&basis);
    let m = Mrsf::new(&basis, &scf, 0.5, &mut eng)
        .unwrap()
        .solve(6, 4, &davidson_opts())
        .unwrap();
    let p = m.partition;
    let space = Space {
        n: p.n_mo,
        nc: p.n_core,
    };
    for st in &m.states {
        let s2 = s_squared(p.n_mo, &space.expand(&st.x_plus, &st.x_minus));
        eprintln!(
            "MRSF {:7} ΔE {:+.3} eV  <S²> {s2:.2e} (reported {:.2e}, w_CV {:.1e})  {}",
            st.spin.to_string(),
            st.omega * 27.211386,
            st.s_squared,
            st.cv_weight,
            st.dominant_text()
        );
        assert!((s2 - st.s_squared).abs() < 1e-9);
        match st.spin {
            StateSpin::Triplet => assert!((s2 - 2.0).abs() < 1e-9),
            _ => {
                assert!((s2 - 2.0 * st.cv_weight).abs() < 1e-9);
                if st.cv_weight < 5e-7 {
                    assert!(s2 < 1e-6);
                }
            }
        }
    }
    // With a semilocal part, <T0|A|T0> = ½ Σ_k (V^β_xc − V^α_xc)_kk (module
    // docs), evaluated here independently as F^β − F^α − c_x K[D_open].
    let nc = p.n_core;
    let c = &scf.orbitals_alpha;
    let d_open = c.columns(nc, 2) * c.columns(nc, 2).transpose();
    let k_open = integrals::coulomb_exchange(&basis, &[d_open], &JkOptions::default())
        .unwrap()
        .k
        .remove(0);
    let dv = c.transpose() * (&scf.fock_beta - &scf.fock_alpha - k_open * 0.5) * c;
    let expect = 0.5 * (dv[(nc, nc)] + dv[(nc + 1, nc + 1)]);
    let mut eng = engine(&basis);
    let mut mr = Mrsf::new(&basis, &scf, 0.5, &mut eng).unwrap();
    let nt = mr.triplet_dimension();
    let t0 = mr.diagonal(StateSpin::Triplet)[nt - 1];
    eprintln!(
        "<T0|A|T0> = {:.4} eV (½ Σ ΔV_xc: {:.4} eV)",
        t0 * 27.211386,
        expect * 27.211386
    );
    assert!((t0 - expect).abs() < 1e-10 && t0 > 0.0);
    let mut eng = engine(&basis);
    let sf = SpinFlip::new(&basis, &scf, 0.5, &mut eng)
        .unwrap()
        .solve(8, &davidson_opts())
        .unwrap();
    let mut contaminated = 0;
    for st in &sf.states {
        let s2 = s_squared(p.n_mo, &space.expand(&st.x_plus, &st.x_minus));
        eprintln!(
            "SF  ΔE {:+.3} eV  <S²> {s2:.4}  {}",
            st.omega * 27.211386,
            st.dominant_text()
        );
        assert!((s2 - st.s_squared).abs() < 1e-9);
        if (s2 - 1.0).abs() < 0.3 {
            contaminated += 1;
        }
    }
    assert!(contaminated >= 2, "SF should show <S²> ≈ 1 states");
    // Without the CV configurations in the singlet block, every singlet is
    // pure (<S²> = 0 on the determinants).
    let mut eng = engine(&basis);
    let pure = Mrsf::new(&basis, &scf, 0.5, &mut eng)
        .unwrap()
        .with_singlet_cv(false)
        .solve(6, 0, &davidson_opts())
        .unwrap();
    let with_cv = of_spin(&m, StateSpin::Singlet);
    for (k, st) in pure.states.iter().enumerate() {
        let s2 = s_squared(p.n_mo, &space.expand(&st.x_plus, &st.x_minus));
        eprintln!(
            "MRSF singlet without CV: <S²> {s2:.1e}, shift {:+.2e} Eh",
            st.energy - with_cv[k]
        );
        assert!(s2 < 1e-12 && st.s_squared == 0.0);
    }
}

// Source: exact symmetry of the free atom — the components of the ³P and ¹D
// terms of carbon (1s² 2s² 2p²) are degenerate (the published criterion for
// spin-flip methods, J. Chem. Phys. 149, 104101 (2018), from memory). In the
// exact-exchange limit with a minimal basis (one radial 2p function, so the
// empty 2p orbital has the radial shape of the open ones) the MRSF union
// space holds all three ³P(M_S = 0) and four of the five ¹D components
// exactly: they must agree to 1e-6 Eh, and ³P must sit at the reference
// triplet's energy.
#[test]
fn carbon_atom_multiplets_are_degenerate() {
    let basis = BasisSet::builtin(&molecule_of(&[("C", [0.0, 0.0, 0.0])]), "STO-3G").unwrap();
    let scf = rohf(&basis, triplet(&basis));
    let mut eng = engine(&basis);
    let m = Mrsf::new(&basis, &scf, 1.0, &mut eng)
        .unwrap()
        .solve(6, 4, &dense_opts())
        .unwrap();
    let s = of_spin(&m, StateSpin::Singlet);
    let t = of_spin(&m, StateSpin::Triplet);
    let ev = |e: f64| (e - scf.energy) * 27.211386;
    eprintln!(
        "carbon: triplets (eV) {:?}",
        t.iter().map(|&e| ev(e)).collect::<Vec<_>>()
    );
    eprintln!(
        "carbon: singlets (eV) {:?}",
        s.iter().map(|&e| ev(e)).collect::<Vec<_>>()
    );
    let spread = |v: &[f64]| {
        v.iter().cloned().fold(f64::MIN, f64::max) - v.iter().cloned().fold(f64::MAX, f64::min)
    };
    assert!(spread(&t[..3]) < 1e-6, "³P spread {}", spread(&t[..3]));
    assert!((t[0] - scf.energy).abs() < 1e-6);
    assert!(spread(&s[..4]) < 1e-6, "¹D spread {}", spread(&s[..4]));
    assert!(
        s[4] - s[3] > 1e-3,
        "the fifth singlet is not a ¹D component"
    );
    let mut eng = engine(&basis);
    let sf = SpinFlip::new(&basis, &scf, 1.0, &mut eng)
        .unwrap()
        .solve(8, &dense_opts())
        .unwrap();
    eprintln!(
        "carbon SF (eV, <S²>): {:?}",
        sf.states
            .iter()
            .map(|s| (ev(s.energy), s.s_squared))
            .collect::<Vec<_>>()
    );
    // Plain SF holds only one of the two determinants of the ³P/¹D(xz, yz)
    // components, so it returns spin-mixed halves (<S²> = 1) between them.
    let mixed = sf
        .states
        .iter()
        .filter(|s| (s.s_squared - 1.0).abs() < 1e-6 && s.energy < s_max(&s_first4(&m)))
        .count();
    assert!(mixed >= 2);
}

fn s_first4(m: &ExcitedStates) -> Vec<f64> {
    of_spin(m, StateSpin::Singlet)[..4].to_vec()
}

fn s_max(v: &[f64]) -> f64 {
    v.iter().cloned().fold(f64::MIN, f64::max)
}

fn rotated(mol: &Molecule, angle: f64, shift: [f64; 3]) -> Molecule {
    // Rotation about the axis (1, 2, 3)/√14 by `angle`, then a translation.
    let axis = nalgebra::Unit::new_normalize(nalgebra::Vector3::new(1.0, 2.0, 3.0));
    let r = nalgebra::Rotation3::from_axis_angle(&axis, angle);
    let mut m = mol.clone();
    for a in &mut m.atoms {
        let p = r * nalgebra::Vector3::from(a.position_bohr);
        a.position_bohr = [p[0] + shift[0], p[1] + shift[1], p[2] + shift[2]];
    }
    m
}

fn rotate_open_shells(scf: &ScfResult, theta: f64) -> ScfResult {
    let mut out = scf.clone();
    let nc = scf.electrons.beta.min(scf.electrons.alpha);
    let o1 = scf.orbitals_alpha.column(nc).into_owned();
    let o2 = scf.orbitals_alpha.column(nc + 1).into_owned();
    let (c, s) = (theta.cos(), theta.sin());
    out.orbitals_alpha.set_column(nc, &(&o1 * c + &o2 * s));
    out.orbitals_alpha.set_column(nc + 1, &(&o2 * c - &o1 * s));
    out.orbitals_beta = out.orbitals_alpha.clone();
    out
}

fn energies(res: &ExcitedStates) -> Vec<f64> {
    res.states.iter().map(|s| s.energy).collect()
}

// Source: exact invariances of the theory — the union space and the ROKS
// energy do not depend on how O1 and O2 are chosen inside the open-shell
// space, on where the molecule sits or how it is oriented, nor on building
// from T− (the Ms = −1 image) instead of T+. BH&HLYP ROKS formaldehyde for
// the O1/O2 rotation, translation and T− (1e-8 Eh; the grid moves with the
// atoms); ROHF water for a rigid rotation (the atomic grids are not
// rotation-invariant, so the exact-exchange limit is used).
#[test]
fn energies_are_invariant() {
    let (basis, scf) = formaldehyde_roks();
    let opts = davidson_opts();
    let run = |basis: &BasisSet, scf: &ScfResult, cx: f64| -> (Vec<f64>, Vec<f64>) {
        let mut eng = engine(basis);
        let m = Mrsf::new(basis, scf, cx, &mut eng)
            .unwrap()
            .solve(3, 3, &opts)
            .unwrap();
        let mut eng = engine(basis);
        let s = SpinFlip::new(basis, scf, cx, &mut eng)
            .unwrap()
            .solve(4, &opts)
            .unwrap();
        (energies(&m), energies(&s))
    };
    let (m0, s0) = run(&basis, &scf, 0.5);
    for theta in [0.37, std::f64::consts::FRAC_PI_2] {
        let (m1, s1) = run(&basis, &rotate_open_shells(&scf, theta), 0.5);
        eprintln!(
            "O1/O2 rotation by {theta:.2}: MRSF {:.1e}, SF {:.1e} Eh",
            max_diff(&m0, &m1),
            max_diff(&s0, &s1)
        );
        assert!(max_diff(&m0, &m1) < 1e-8 && max_diff(&s0, &s1) < 1e-8);
    }
    let (mm, sm) = run(&basis, &mirrored(&scf), 0.5);
    eprintln!(
        "from T−: MRSF {:.1e}, SF {:.1e} Eh",
        max_diff(&m0, &mm),
        max_diff(&s0, &sm)
    );
    assert!(max_diff(&m0, &mm) < 1e-10 && max_diff(&s0, &sm) < 1e-10);
    let moved =
        BasisSet::builtin(&rotated(&formaldehyde(), 0.0, [1.3, -0.7, 2.1]), "6-31G").unwrap();
    let (mt, st) = run(&moved, &roks(&moved, "bhhlyp"), 0.5);
    eprintln!(
        "translation: MRSF {:.1e}, SF {:.1e} Eh",
        max_diff(&m0, &mt),
        max_diff(&s0, &st)
    );
    assert!(max_diff(&m0, &mt) < 1e-8 && max_diff(&s0, &st) < 1e-8);
    let basis = BasisSet::builtin(&water(), "6-31G").unwrap();
    let (w0, ws0) = run(&basis, &rohf(&basis, triplet(&basis)), 1.0);
    let moved = BasisSet::builtin(&rotated(&water(), 1.1, [0.4, 2.0, -1.5]), "6-31G").unwrap();
    let (w1, ws1) = run(&moved, &rohf(&moved, triplet(&moved)), 1.0);
    eprintln!(
        "rigid rotation + translation (ROHF): MRSF {:.1e}, SF {:.1e} Eh",
        max_diff(&w0, &w1),
        max_diff(&ws0, &ws1)
    );
    assert!(max_diff(&w0, &w1) < 1e-8 && max_diff(&ws0, &ws1) < 1e-8);
}

// Source: the documented error contract (rule: typed errors with clear
// messages, no panics on bad input).
#[test]
fn bad_input_gives_clear_errors() {
    let basis = BasisSet::builtin(&water(), "STO-3G").unwrap();
    let scf = rohf(&basis, triplet(&basis));
    let mut eng = engine(&basis);
    let mut mrsf = Mrsf::new(&basis, &scf, 1.0, &mut eng).unwrap();
    let (ns, nt) = (mrsf.singlet_dimension(), mrsf.triplet_dimension());
    let e = mrsf
        .solve(ns + 1, 0, &DavidsonOptions::default())
        .unwrap_err();
    eprintln!("{e}");
    assert!(
        matches!(
            e,
            ResponseError::TooManyRoots {
                kind: "singlet",
                ..
            }
        ) && e.to_string().contains(&format!("only {ns}"))
    );
    let e = mrsf
        .solve(1, nt + 1, &DavidsonOptions::default())
        .unwrap_err();
    assert!(matches!(
        e,
        ResponseError::TooManyRoots {
            kind: "triplet",
            ..
        }
    ));
    let bad = DavidsonOptions {
        residual_tolerance: 0.0,
        ..DavidsonOptions::default()
    };
    let e = mrsf.solve(1, 0, &bad).unwrap_err();
    eprintln!("{e}");
    assert!(matches!(e, ResponseError::InvalidOption(_)));
    let res = mrsf.solve(2, 1, &DavidsonOptions::default()).unwrap();
    let e = res.transition_dipole(0, 7).unwrap_err();
    eprintln!("{e}");
    assert!(matches!(
        e,
        ResponseError::StateIndex { index: 7, count: 3 }
    ));
    let mut eng = engine(&basis);
    let mut sf = SpinFlip::new(&basis, &scf, 1.0, &mut eng).unwrap();
    let n = sf.dimension();
    assert!(matches!(
        sf.solve(n + 1, &DavidsonOptions::default()),
        Err(ResponseError::TooManyRoots {
            kind: "spin-flip",
            ..
        })
    ));
    let mut eng = engine(&basis);
    let e = SpinFlip::new(&basis, &scf, 1.5, &mut eng).err().unwrap();
    eprintln!("{e}");
    assert!(matches!(e, ResponseError::InvalidOption(_)));
    // A singlet reference (restricted open shell with N_α = N_β).
    let singlet = rohf(&basis, Electrons { alpha: 5, beta: 5 });
    let mut eng = engine(&basis);
    let e = Mrsf::new(&basis, &singlet, 1.0, &mut eng).err().unwrap();
    eprintln!("{e}");
    assert!(
        matches!(e, ResponseError::NotTriplet { alpha: 5, beta: 5 })
            && e.to_string().contains("multiplicity 1")
    );
    // A quintet.
    let quintet = rohf(&basis, Electrons { alpha: 7, beta: 3 });
    let mut eng = engine(&basis);
    assert!(matches!(
        SpinFlip::new(&basis, &quintet, 1.0, &mut eng),
        Err(ResponseError::NotTriplet { .. })
    ));
    // An odd electron count (the water cation doublet).
    let cation = rohf(&basis, Electrons { alpha: 5, beta: 4 });
    let mut eng = engine(&basis);
    let e = Mrsf::new(&basis, &cation, 1.0, &mut eng).err().unwrap();
    eprintln!("{e}");
    assert!(matches!(e, ResponseError::OddElectrons { electrons: 9 }));
    // A closed-shell RHF reference.
    let rhf = hartree_fock(
        &basis,
        Electrons { alpha: 5, beta: 5 },
        Reference::Restricted,
        &Guess::AtomicSuperposition,
        &tight(),
        JkOptions::default(),
    )
    .unwrap();
    let mut eng = engine(&basis);
    let e = Mrsf::new(&basis, &rhf, 1.0, &mut eng).err().unwrap();
    eprintln!("{e}");
    assert!(matches!(
        e,
        ResponseError::NotRestrictedOpen(Reference::Restricted)
    ));
}

// Sources: the torsion of ethylene, a trade-standard case — the ground state
// rises smoothly to a maximum at 90° (barrier about 2.8 eV, 65 kcal/mol,
// from memory: asserted only to lie within 1.5–4.5 eV); at 90° the
// diradical singlet S0 and the triplet become nearly degenerate (exact
// D2d symmetry argument: they are the ± combinations of the two covalent
// determinants, split by the small exchange integral of the two carbon p
// orbitals) while S1 (ionic) stays far above, so S0 and S1 do not touch
// along the pure twist. BH&HLYP ROKS/6-31G. Plain SF is recognised by its
// contaminated <S²>. The reference-character diagnostic stays quiet along
// the smooth scan and fires when handed a different open-shell pair.
#[test]
fn ethylene_twist_topology() {
    use flipswarm::electronic::qc::response::tracking::ReferenceCharacter;
    let angles = [0.0, 15.0, 30.0, 45.0, 60.0, 75.0, 90.0];
    let mut s0 = Vec::new();
    let mut sf_mixed = 0;
    let mut prev: Option<(BasisSet, ReferenceCharacter)> = None;
    let ev = 27.211386;
    for &a in &angles {
        let basis = BasisSet::builtin(&ethylene(a), "6-31G").unwrap();
        let scf = roks(&basis, "bhhlyp");
        let mut eng = engine(&basis);
        let m = Mrsf::new(&basis, &scf, 0.5, &mut eng)
            .unwrap()
            .solve(3, 2, &davidson_opts())
            .unwrap();
        let s = of_spin(&m, StateSpin::Singlet);
        let t = of_spin(&m, StateSpin::Triplet);
        let mut eng = engine(&basis);
        let sf = SpinFlip::new(&basis, &scf, 0.5, &mut eng)
            .unwrap()
            .solve(4, &davidson_opts())
            .unwrap();
        let ch = ReferenceCharacter::from_scf(&scf).unwrap();
        let sigma = match &prev {
            Some((pb, pc)) => ch.compare(&basis, pc, pb).unwrap().singular_values[1],
            None => 1.0,
        };
        eprintln!(
            "twist {a:4.0}°: S0 {:.6} Eh, S1−S0 {:.3} eV, T1−S0 {:+.3} eV (T(ROKS)−S0 {:+.3}), S0: {}; SF <S²> {:?}; open-shell overlap σ₂ {sigma:.4}",
            s[0], (s[1] - s[0]) * ev, (t[0] - s[0]) * ev, (scf.energy - s[0]) * ev,
            m.states[m.ground.unwrap()].dominant_text(),
            sf.states.iter().map(|x| (x.s_squared * 100.0).round() / 100.0).collect::<Vec<_>>()
        );
        assert!(sigma > 0.9, "smooth scan flagged as a change of character");
        sf_mixed += sf
            .states
            .iter()
            .filter(|x| x.s_squared > 0.3 && x.s_squared < 1.7)
            .count();
        if a == 90.0 {
            assert!(((t[0] - s[0]) * ev).abs() < 0.3, "S0/T1 at 90°");
            assert!(
                (s[1] - s[0]) * ev > 1.0,
                "S0 and S1 touch along the pure twist"
            );
            // The diagnostic fires for a different open-shell pair (the
            // highest core orbital and O1 standing in for a new reference).
            let nc = scf.electrons.beta;
            let other = ReferenceCharacter {
                open_shells: scf.orbitals_alpha.columns(nc - 1, 2).into_owned(),
            };
            let check = other.compare(&basis, &ch, &basis).unwrap();
            assert!(check.changed && check.singular_values[1] < 1e-6);
        }
        s0.push(s[0]);
        prev = Some((basis, ch));
    }
    assert!(
        sf_mixed >= 3,
        "SF states with 0.3 < <S²> < 1.7 along the scan: {sf_mixed}"
    );
    let barrier = (s0[6] - s0[0]) * ev;
    assert!((1.5..4.5).contains(&barrier), "barrier {barrier} eV");
    // Smooth and monotonic: rising, second differences small and regular.
    for w in s0.windows(2) {
        assert!(w[1] > w[0]);
    }
    let d2: Vec<f64> = s0
        .windows(3)
        .map(|w| (w[2] - 2.0 * w[1] + w[0]) * ev)
        .collect();
    eprintln!("S0 barrier {barrier:.3} eV; second differences (eV) {d2:.3?}");
    assert!(d2.iter().all(|x| x.abs() < 0.5));
}

// ------------------------------------------------ overlaps between geometries

/// <D|D'> of two bit-string determinants (ascending creators, α bits 0..n,
/// β bits n..2n) with MO overlap `s` (bra orbitals × ket orbitals).
fn determinant_overlap(n: usize, s: &DMatrix<f64>, d1: u128, d2: u128) -> f64 {
    let occ = |d: u128, off: usize| -> Vec<usize> {
        (0..n).filter(|&p| (d >> (off + p)) & 1 == 1).collect()
    };
    let mut value = 1.0;
    for off in [0, n] {
        let (a, b) = (occ(d1, off), occ(d2, off));
        if a.len() != b.len() {
            return 0.0;
        }
        let m = DMatrix::from_fn(a.len(), b.len(), |i, j| s[(a[i], b[j])]);
        value *= m.determinant();
    }
    value
}

fn moved(mol: &Molecule, atom: usize, shift: [f64; 3]) -> Molecule {
    let mut m = mol.clone();
    for k in 0..3 {
        m.atoms[atom].position_bohr[k] += shift[k];
    }
    m
}

// Source: exact quantum mechanics on the determinant expansions written in
// this file (its own phases for Φ±, bit-string determinants, and the
// Löwdin rule <D|D'> = det S_α det S_β for non-orthogonal orbitals, common
// practice): the string-factorised overlaps of MRSF singlets, MRSF triplets
// and SF states between two geometries of water (BH&HLYP ROKS, 6-31G; one
// atom moved by 0.05 bohr) equal the brute-force sum over every pair of
// determinants to 1e-12; at one geometry the states are orthonormal, and
// singlets and triplets are orthogonal.
#[test]
fn state_overlaps_between_geometries_match_brute_force() {
    use flipswarm::electronic::qc::response::overlap::{state_overlaps, StateVectors};
    let mol1 = water();
    let mol2 = moved(&water(), 1, [0.03, -0.04, 0.02]);
    let run = |mol: &Molecule, method: Method| {
        let basis = BasisSet::builtin(mol, "6-31G").unwrap();
        let scf = roks(&basis, "bhhlyp");
        let request = StateRequest {
            method,
            singlets: 3,
            triplets: 2,
        };
        let x = excited_states(
            &basis,
            &scf,
            0.5,
            &mut engine(&basis),
            request,
            &dense_opts(),
        )
        .unwrap();
        (basis, x)
    };
    for method in [Method::Mrsf, Method::SpinFlip] {
        let (b1, x1) = run(&mol1, method);
        let (b2, x2) = run(&mol2, method);
        let all: Vec<usize> = (0..x1.states.len()).collect();
        let v1 = StateVectors::from_states(&x1, &all).unwrap();
        let v2 = StateVectors::from_states(&x2, &all).unwrap();
        let fast = state_overlaps(&v1, &b1, &v2, &b2).unwrap();
        // Same geometry: orthonormal.
        let same = state_overlaps(&v1, &b1, &v1, &b1).unwrap();
        let eye = DMatrix::<f64>::identity(all.len(), all.len());
        assert!(
            (&same - &eye).amax() < 1e-10,
            "{method:?}: not orthonormal: {same:.3e}"
        );
        // Brute force.
        let n = x1.partition.n_mo;
        let space = Space {
            n,
            nc: x1.partition.n_core,
        };
        let s_mo = x1.orbitals.transpose() * integrals::overlap_between(&b1, &b2) * &x2.orbitals;
        let psi1: Vec<HashMap<u128, f64>> = x1
            .states
            .iter()
            .map(|s| space.expand(&s.x_plus, &s.x_minus))
            .collect();
        let psi2: Vec<HashMap<u128, f64>> = x2
            .states
            .iter()
            .map(|s| space.expand(&s.x_plus, &s.x_minus))
            .collect();
        let mut worst: f64 = 0.0;
        for (i, p1) in psi1.iter().enumerate() {
            for (j, p2) in psi2.iter().enumerate() {
                let mut brute = 0.0;
                for (&d1, &c1) in p1 {
                    for (&d2, &c2) in p2 {
                        brute += c1 * c2 * determinant_overlap(n, &s_mo, d1, d2);
                    }
                }
                worst = worst.max((brute - fast[(i, j)]).abs());
            }
        }
        assert!(
            worst < 1e-12,
            "{method:?}: string overlaps differ from brute force by {worst:.3e}"
        );
        // A 0.05-bohr move keeps each state close to itself.
        for i in 0..all.len() {
            assert!(
                fast[(i, i)].abs() > 0.95,
                "{method:?}: state {i} self-overlap {}",
                fast[(i, i)]
            );
        }
    }
}
