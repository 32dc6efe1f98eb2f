//! Overlaps of spin-flip response states between two geometries: the
//! quantity the dynamics engine turns into time-derivative couplings.
//!
//! # Determinants and strings
//! Every configuration of the SF and MRSF spaces (module docs of
//! [`response`](super)) is a single Slater determinant with N_α = N_β =
//! n_C + 1 electrons, and its α and β occupations each belong to one of only
//! n_mo *strings*:
//!
//! ```text
//!   H_c = (C ∪ O) \ {c}   (c ∈ C, a hole in the core),
//!   P_p = C ∪ {p}          (p ∈ O ∪ V, a particle on the core),
//! ```
//!
//! with H_O1 = P_O2 and H_O2 = P_O1. Φ+(i→a) = a†_{aβ} a_{iα}|T+> has α string
//! H_i (written P_ī for i ∈ O) and β string P_a; Φ−(i→a) = −a†_{aα} a_{iβ}|T−>
//! has α string P_a and β string H_i. So a state is a matrix M over (α
//! string, β string) pairs, M[s, t] = Σ (phase · amplitude) of the
//! determinants with those strings, and with canonical determinants (α
//! creators first, each spin in ascending orbital order)
//!
//! ```text
//!   <D|D'> = det S^MO[α(D), α(D')] · det S^MO[β(D), β(D')],
//!   S^MO = C₁ᵀ S^AO(R₁, R₂) C₂,
//!   <ψ_I(R₁)|ψ_J(R₂)> = Σ M_I ∘ (G M′_J Gᵀ),   G[s, t] = det S^MO[s, t′],
//! ```
//!
//! G is n_mo × n_mo determinants of order n_C + 1 (restricted orbitals: the
//! same G for both spins). The evaluation is exact — no truncation of the
//! configuration expansion and no approximation of the determinants — and
//! costs O(n_mo² n_C³) once per pair of geometries plus O(n_mo³) per pair of
//! states. (Published routes for this method truncate a Leibniz expansion
//! of the determinants, J. Phys. Chem. Lett. 12, 4722 (2021), from memory;
//! the string structure above makes that unnecessary here.) `tests/mrsf.rs`
//! checks the result against a brute-force sum over all determinant pairs.
//!
//! Phases are the raw phases of the eigensolver (largest amplitude
//! positive); the engine aligns them.

use super::{ExcitedStates, ResponseError};
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::integrals;
use nalgebra::DMatrix;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

/// What overlaps need of one geometry's states: the orbitals and each
/// state's determinant amplitudes. Serialisable (it is part of a back end's
/// snapshot).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct StateVectors {
    /// Core orbitals n_C.
    pub n_core: usize,
    /// Orbitals (AO coefficients, nbf × n_mo).
    pub orbitals: DMatrix<f64>,
    /// Per state: x⁺ and x⁻ (n_occ × n_vir each, as
    /// [`ExcitedState`](super::ExcitedState)).
    pub amplitudes: Vec<(DMatrix<f64>, DMatrix<f64>)>,
}

impl StateVectors {
    /// The states `indices` (into [`ExcitedStates::states`]) of a response
    /// calculation.
    pub fn from_states(
        x: &ExcitedStates,
        indices: &[usize],
    ) -> Result<StateVectors, ResponseError> {
        let mut amplitudes = Vec::with_capacity(indices.len());
        for &i in indices {
            let s = x.states.get(i).ok_or(ResponseError::StateIndex {
                index: i,
                count: x.states.len(),
            })?;
            amplitudes.push((s.x_plus.clone(), s.x_minus.clone()));
        }
        Ok(StateVectors {
            n_core: x.partition.n_core,
            orbitals: x.orbitals.clone(),
            amplitudes,
        })
    }

    /// Number of states.
    pub fn len(&self) -> usize {
        self.amplitudes.len()
    }

    /// Whether there are no states.
    pub fn is_empty(&self) -> bool {
        self.amplitudes.is_empty()
    }

    fn n_mo(&self) -> usize {
        self.orbitals.ncols()
    }

    /// The (α string, β string) coefficient matrix of every state.
    fn string_matrices(&self) -> Result<Vec<DMatrix<f64>>, ResponseError> {
        let (nc, nmo) = (self.n_core, self.n_mo());
        let (nocc, nvir) = (nc + 2, nmo.saturating_sub(nc));
        let table = PhaseTable::new(nc, nmo);
        self.amplitudes
            .iter()
            .map(|(xp, xm)| {
                if xp.shape() != (nocc, nvir) || xm.shape() != (nocc, nvir) {
                    return Err(ResponseError::Inconsistent(format!(
                        "amplitudes of shape {:?} for {nocc} occupied and {nvir} virtual orbitals",
                        xp.shape()
                    )));
                }
                let mut m = DMatrix::zeros(nmo, nmo);
                for i in 0..nocc {
                    for a in 0..nvir {
                        let (s, t, sign) = table.plus[i * nvir + a];
                        m[(s, t)] += sign * xp[(i, a)];
                        let x = xm[(i, a)];
                        if x != 0.0 {
                            let (s, t, sign) = table.minus[i * nvir + a];
                            m[(s, t)] += sign * x;
                        }
                    }
                }
                Ok(m)
            })
            .collect()
    }
}

/// The strings and phases of every configuration for given n_C, n_mo.
struct PhaseTable {
    /// Φ+(i→a), row-major over (i, a): (α string, β string, phase).
    plus: Vec<(usize, usize, f64)>,
    /// Φ−(i→a).
    minus: Vec<(usize, usize, f64)>,
}

/// Spin-orbital key: α orbitals sort before β orbitals.
fn key(beta: bool, p: usize, nmo: usize) -> usize {
    if beta {
        nmo + p
    } else {
        p
    }
}

/// Apply a_k to a†_{l1} a†_{l2} … |vac> (creation order as listed): the
/// phase (−1)^position, or `None` when k is empty.
fn annihilate(list: &mut Vec<usize>, k: usize) -> Option<f64> {
    let pos = list.iter().position(|&x| x == k)?;
    list.remove(pos);
    Some(if pos % 2 == 0 { 1.0 } else { -1.0 })
}

/// Sort a creator string into canonical order; the permutation's sign.
fn canonical(list: &mut [usize]) -> f64 {
    let mut inversions = 0usize;
    for i in 0..list.len() {
        for j in i + 1..list.len() {
            if list[i] > list[j] {
                inversions += 1;
            }
        }
    }
    list.sort_unstable();
    if inversions % 2 == 0 {
        1.0
    } else {
        -1.0
    }
}

impl PhaseTable {
    fn new(nc: usize, nmo: usize) -> PhaseTable {
        let nvir = nmo - nc;
        // String index of an occupation list of nc + 1 orbitals.
        let string_of = |occ: &[usize]| -> usize {
            if occ.len() == nc + 1 && occ[..nc].iter().enumerate().all(|(k, &o)| o == k) {
                return occ[nc]; // P_p, p ≥ nc (incl. H_O1 = P_O2, H_O2 = P_O1)
            }
            // H_c: C ∪ O minus one core orbital c.
            (0..nc).find(|&c| !occ.contains(&c)).expect("a core hole")
        };
        let reference = |beta_open: bool| -> Vec<usize> {
            let mut ops = Vec::with_capacity(nc + 2);
            for c in 0..nc {
                ops.push(key(false, c, nmo));
                ops.push(key(true, c, nmo));
            }
            ops.push(key(beta_open, nc, nmo));
            ops.push(key(beta_open, nc + 1, nmo));
            ops
        };
        let split = |list: &[usize]| -> (usize, usize) {
            let alpha: Vec<usize> = list.iter().copied().filter(|&k| k < nmo).collect();
            let beta: Vec<usize> = list
                .iter()
                .copied()
                .filter(|&k| k >= nmo)
                .map(|k| k - nmo)
                .collect();
            (string_of(&alpha), string_of(&beta))
        };
        let mut plus = Vec::with_capacity((nc + 2) * nvir);
        let mut minus = Vec::with_capacity((nc + 2) * nvir);
        for i in 0..nc + 2 {
            for a in nc..nmo {
                // Φ+(i→a) = a†_aβ a_iα T+
                let mut list = reference(false);
                let mut sign = annihilate(&mut list, key(false, i, nmo)).expect("occupied in T+");
                list.insert(0, key(true, a, nmo));
                sign *= canonical(&mut list);
                let (s, t) = split(&list);
                plus.push((s, t, sign));
                // Φ−(i→a) = −a†_aα a_iβ T−
                let mut list = reference(true);
                let mut sign = -annihilate(&mut list, key(true, i, nmo)).expect("occupied in T−");
                list.insert(0, key(false, a, nmo));
                sign *= canonical(&mut list);
                let (s, t) = split(&list);
                minus.push((s, t, sign));
            }
        }
        PhaseTable { plus, minus }
    }
}

/// The occupied orbitals of string `s`.
fn string(s: usize, nc: usize) -> Vec<usize> {
    if s < nc {
        (0..nc + 2).filter(|&k| k != s).collect()
    } else {
        let mut v: Vec<usize> = (0..nc).collect();
        v.push(s);
        v
    }
}

/// G[s, t] = det S^MO[string s, string t].
fn string_overlaps(s_mo: &DMatrix<f64>, nc: usize) -> DMatrix<f64> {
    let n = s_mo.nrows();
    let strings: Vec<Vec<usize>> = (0..n).map(|s| string(s, nc)).collect();
    let rows: Vec<Vec<f64>> = strings
        .par_iter()
        .map(|rs| {
            let mut sub = DMatrix::zeros(nc + 1, nc + 1);
            strings
                .iter()
                .map(|cs| {
                    for (i, &r) in rs.iter().enumerate() {
                        for (j, &c) in cs.iter().enumerate() {
                            sub[(i, j)] = s_mo[(r, c)];
                        }
                    }
                    sub.clone().lu().determinant()
                })
                .collect()
        })
        .collect();
    DMatrix::from_fn(n, n, |s, t| rows[s][t])
}

/// S_IJ = <ψ_I(previous)|ψ_J(current)> for all states of `previous` (at the
/// geometry of `prev_basis`) and `current` (at that of `basis`).
pub fn state_overlaps(
    previous: &StateVectors,
    prev_basis: &BasisSet,
    current: &StateVectors,
    basis: &BasisSet,
) -> Result<DMatrix<f64>, ResponseError> {
    if previous.n_core != current.n_core || previous.n_mo() != current.n_mo() {
        return Err(ResponseError::Inconsistent(format!(
            "the orbital spaces differ between the geometries ({} core / {} orbitals before, {} / {} now)",
            previous.n_core,
            previous.n_mo(),
            current.n_core,
            current.n_mo()
        )));
    }
    if previous.orbitals.nrows() != prev_basis.nbf || current.orbitals.nrows() != basis.nbf {
        return Err(ResponseError::Inconsistent(
            "orbitals do not fit their basis sets".into(),
        ));
    }
    let s_ao = integrals::overlap_between(prev_basis, basis);
    let s_mo = previous.orbitals.transpose() * s_ao * &current.orbitals;
    let g = string_overlaps(&s_mo, current.n_core);
    let bra = previous.string_matrices()?;
    let ket = current.string_matrices()?;
    let transformed: Vec<DMatrix<f64>> = ket.iter().map(|m| &g * m * g.transpose()).collect();
    let s = DMatrix::from_fn(bra.len(), ket.len(), |i, j| bra[i].dot(&transformed[j]));
    if s.iter().any(|x| !x.is_finite()) {
        return Err(ResponseError::NonFinite("state overlaps"));
    }
    Ok(s)
}
