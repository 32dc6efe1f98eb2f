//! Starting densities for the SCF.
//!
//! * **Core**: orbitals of the core Hamiltonian h = T + V (poor for most
//!   molecules, kept as a fallback and for tests).
//! * **Superposition of atomic densities** (common practice): for each
//!   element, a spin-restricted Hartree–Fock calculation of the neutral atom in
//!   its own basis functions with fractional occupations — the partly filled
//!   last level is spread evenly over the orbitals degenerate with it (within
//!   10⁻³ Eh), which approximates a spherical atom; the molecular guess is the
//!   block-diagonal sum. The guess ignores the molecule's charge and spin: the
//!   first Fock matrix built from it is diagonalised and occupied with the
//!   requested electrons.
//! * **Previous orbitals** (dynamics, step to step): the occupied orbitals of
//!   the last geometry, with their AO coefficients taken over unchanged (the
//!   basis functions move with the atoms), re-orthonormalised in the new
//!   overlap metric by C (Cᵀ S C)^{−½}. See [`super::Guess::Orbitals`].

use super::{diagonalize_in, orthogonalizer};
use crate::electronic::qc::basis::{BasisSet, Harmonics};
use crate::electronic::qc::integrals::{self, coulomb_exchange_in_core, EriStore, ShellPairs};
use nalgebra::DMatrix;

/// Core-Hamiltonian density of the lowest `n_occ` orbitals (one spin).
pub fn core_density(h: &DMatrix<f64>, x: &DMatrix<f64>, n_occ: usize) -> DMatrix<f64> {
    let (_, c) = diagonalize_in(h, x);
    super::occupied_density(&c, n_occ)
}

/// Fractional aufbau occupations (total `n_elec`, at most 2 per orbital);
/// the last, partly filled level is shared by all orbitals within 10⁻³ Eh.
fn fractional_occupations(eps: &[f64], n_elec: f64) -> Vec<f64> {
    let mut occ = vec![0.0; eps.len()];
    let mut left = n_elec;
    let mut i = 0;
    while left > 1e-12 && i < eps.len() {
        // group of degenerate orbitals starting at i
        let mut j = i + 1;
        while j < eps.len() && (eps[j] - eps[i]).abs() < 1e-3 {
            j += 1;
        }
        let cap = 2.0 * (j - i) as f64;
        let put = left.min(cap);
        for o in &mut occ[i..j] {
            *o = put / (j - i) as f64;
        }
        left -= put;
        i = j;
    }
    occ
}

/// Spin-summed density of a neutral atom alone (fractional-occupation RHF).
fn atomic_density(
    shells: Vec<crate::electronic::qc::basis::Shell>,
    z: f64,
    harmonics: Harmonics,
) -> DMatrix<f64> {
    let center = shells[0].center;
    let basis = BasisSet::from_shells("atom", shells, harmonics, vec![(z, center)]);
    let s = integrals::overlap(&basis);
    let h = integrals::core_hamiltonian(&basis);
    let x = orthogonalizer(&s, 1e-7);
    let sp = ShellPairs::new(&basis);
    let store = EriStore::new(&sp, 1e-12);
    let n_elec = z;
    let mut d = {
        let (eps, c) = diagonalize_in(&h, &x);
        density_from_occupations(&c, &fractional_occupations(&eps, n_elec))
    };
    let mut diis = super::diis::Diis::new(6);
    for _ in 0..40 {
        // Closed-shell-like fractional Fock: F = h + J[D] − ½ K[D].
        let Ok(r) = coulomb_exchange_in_core(&store, std::slice::from_ref(&d), true) else {
            break;
        };
        let f = &h + &r.j[0] - &r.k[0] * 0.5;
        let err = x.transpose() * (&f * &d * &s - &s * &d * &f) * &x;
        let small = err.amax() < 1e-6;
        let f = diis.extrapolate(vec![f], vec![err]).remove(0);
        let (eps, c) = diagonalize_in(&f, &x);
        d = density_from_occupations(&c, &fractional_occupations(&eps, n_elec));
        if small {
            break;
        }
    }
    d
}

fn density_from_occupations(c: &DMatrix<f64>, occ: &[f64]) -> DMatrix<f64> {
    let n = c.nrows();
    let mut d = DMatrix::zeros(n, n);
    for (k, &o) in occ.iter().enumerate() {
        if o > 0.0 {
            let col = c.column(k);
            d += col * col.transpose() * o;
        }
    }
    d
}

/// Superposition of atomic densities (spin-summed), block diagonal by atom.
/// Atoms of the same element and basis are computed once.
pub fn atomic_superposition(basis: &BasisSet) -> DMatrix<f64> {
    let n = basis.nbf;
    let mut d = DMatrix::zeros(n, n);
    type ShellKey = Vec<(usize, Vec<f64>, Vec<f64>)>;
    let mut cache: Vec<(f64, ShellKey, DMatrix<f64>)> = Vec::new();
    for (ia, &(z, center)) in basis.nuclei.iter().enumerate() {
        let idx: Vec<usize> = (0..basis.shells.len())
            .filter(|&k| basis.shells[k].atom == ia)
            .collect();
        if idx.is_empty() {
            continue;
        }
        let key: Vec<(usize, Vec<f64>, Vec<f64>)> = idx
            .iter()
            .map(|&k| {
                let s = &basis.shells[k];
                (s.l, s.exponents.clone(), s.coefficients.clone())
            })
            .collect();
        let block = match cache.iter().find(|(zz, kk, _)| *zz == z && *kk == key) {
            Some((_, _, b)) => b.clone(),
            None => {
                let shells: Vec<_> = idx
                    .iter()
                    .map(|&k| {
                        let mut s = basis.shells[k].clone();
                        s.center = center;
                        s.atom = 0;
                        s
                    })
                    .collect();
                let b = atomic_density(shells, z, basis.harmonics);
                cache.push((z, key, b.clone()));
                b
            }
        };
        let first = basis.offsets[idx[0]];
        let m = block.nrows();
        d.view_mut((first, first), (m, m)).copy_from(&block);
    }
    d
}

/// Occupied orbitals of another geometry re-orthonormalised in the metric `s`:
/// C (Cᵀ S C)^{−½}. Returns None if they have become linearly dependent.
pub fn reorthonormalize(c_occ: &DMatrix<f64>, s: &DMatrix<f64>) -> Option<DMatrix<f64>> {
    let m = c_occ.transpose() * s * c_occ;
    let e = m.symmetric_eigen();
    if e.eigenvalues.iter().any(|&v| v < 1e-8) {
        return None;
    }
    let inv_sqrt = &e.eigenvectors
        * DMatrix::from_diagonal(&e.eigenvalues.map(|v| 1.0 / v.sqrt()))
        * e.eigenvectors.transpose();
    Some(c_occ * inv_sqrt)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fractional_occupation_spreads_over_a_degenerate_level() {
        // Carbon-like: 1s² 2s² 2p² → the three p orbitals get 2/3 each.
        let eps = [-11.0, -0.7, -0.4, -0.4, -0.4, 0.5];
        let occ = fractional_occupations(&eps, 6.0);
        assert_eq!(&occ[..2], &[2.0, 2.0]);
        for o in &occ[2..5] {
            assert!((o - 2.0 / 3.0).abs() < 1e-15);
        }
        assert_eq!(occ[5], 0.0);
    }
}
