//! Analytic nuclear gradients of converged SCF determinants.
//!
//! For a determinant whose energy is stationary with respect to all orbital
//! rotations that the reference allows, the orbital response drops out and
//! only the orthonormality constraint CᵀSC = 1 remains (J. Chem. Phys. 51,
//! 4286 (1969) for the Hartree–Fock case; common practice):
//!
//! dE/dR = tr(D h^R) + E₂^R[D^α, D^β] + E_xc^R − tr(W S^R) + dE_nuc/dR,
//!
//! with D = D^α + D^β, h^R the full derivative of the core Hamiltonian
//! (basis centres and the nuclear-attraction operator,
//! [`integrals::core_hamiltonian_nuclear_derivatives`]), E₂^R the derivative
//! of the Coulomb/exact-exchange energy at fixed densities
//! ([`integrals::jk_gradient`]), E_xc^R the exchange–correlation term of
//! [`super::xc`], and W the energy-weighted density.
//!
//! # The energy-weighted density, all three references
//! Write E(C) with C the occupied orbitals and n^σ_i their occupations. Then
//! ∂E/∂C_μi = 2 (F_i C_i)_μ with F_i = n^α_i F^α + n^β_i F^β. A change S^R of
//! the overlap keeps the orbitals orthonormal with δC = −½ C S^R_MO (plus
//! rotations, which cost nothing at a stationary point), so
//! dE ⊃ −Σ_ij S^R_ij G_ji over occupied i, j, where G_ji = C_jᵀ F_i C_i;
//! couplings to virtual orbitals are absent because the occupied–virtual
//! stationarity blocks vanish.
//! * RHF/UHF: F_i = F^σ for each spin's own orbitals, so
//!   W = Σ_σ D^σ F^σ D^σ.
//! * ROHF/ROKS (core C doubly, open O singly occupied): G over core i is
//!   F^α + F^β, over open i it is F^α. The core–core block of W is then
//!   (F^α + F^β)_CC, the core–open and open–open blocks are F^α, and the
//!   open–core block C_Oᵀ(F^α + F^β)C_C equals C_OᵀF^αC_C because the ROHF
//!   stationarity condition makes the C–O block of F^β vanish (see
//!   [`crate::electronic::qc::scf`]). The same matrix is
//!   W = D^α F^α D^α + D^β F^β D^β:
//!   the first term gives F^α over all occupied pairs, the second F^β over
//!   the core pairs. So one formula serves all three references, and the
//!   gradient is exact at convergence (its error is linear in the residual
//!   orbital gradient, hence the tight SCF thresholds of the tests).
//!
//! For Kohn–Sham, F^σ includes V^σ_xc (as stored in
//! [`ScfResult::fock_alpha`]), and the exact exchange is scaled by the
//! functional's fraction c_x.

use super::{nuclear_repulsion_gradient, xc, GradientError};
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::dft::grid::{GridSpec, MolecularGrid};
use crate::electronic::qc::dft::xc::{Functional, Spin};
use crate::electronic::qc::integrals;
use crate::electronic::qc::scf::{Reference, ScfResult};
use nalgebra::DMatrix;

/// The potential the SCF was run with.
#[derive(Clone, Debug, PartialEq)]
pub enum Potential {
    /// Hartree–Fock (exact exchange 1).
    HartreeFock,
    /// Kohn–Sham with this functional (preset or libxc names, as
    /// [`Functional::preset_or_libxc`]) on this grid (the same specification
    /// as the SCF: the grid is rebuilt here from it).
    KohnSham {
        /// Functional name.
        functional: String,
        /// Grid specification.
        grid: GridSpec,
    },
}

/// Contributions to an SCF gradient (each per atom, Eh/bohr), for reports
/// and tests.
#[derive(Clone, Debug)]
pub struct GradientTerms {
    /// tr(D h^R).
    pub one_electron: Vec<[f64; 3]>,
    /// Coulomb and exact exchange at fixed densities.
    pub two_electron: Vec<[f64; 3]>,
    /// Exchange–correlation (basis functions and grid weights).
    pub xc: Vec<[f64; 3]>,
    /// Of it, the grid-weight (Becke partition) derivative.
    pub grid_weights: Vec<[f64; 3]>,
    /// −tr(W S^R).
    pub overlap: Vec<[f64; 3]>,
    /// Nuclear repulsion.
    pub nuclear: Vec<[f64; 3]>,
    /// The sum.
    pub total: Vec<[f64; 3]>,
}

/// Energy-weighted density W = D^α F^α D^α + D^β F^β D^β (symmetrised),
/// valid for RHF/UHF/ROHF and their Kohn–Sham variants (module docs).
pub fn energy_weighted_density(result: &ScfResult) -> DMatrix<f64> {
    let (da, db) = (&result.density_alpha, &result.density_beta);
    let mut w = da * &result.fock_alpha * da + db * &result.fock_beta * db;
    let t = w.transpose();
    w += t;
    w *= 0.5;
    w
}

fn contract(d: &DMatrix<f64>, m: &[DMatrix<f64>], natoms: usize) -> Vec<[f64; 3]> {
    (0..natoms)
        .map(|a| std::array::from_fn(|k| d.dot(&m[3 * a + k])))
        .collect()
}

fn add(acc: &mut [[f64; 3]], x: &[[f64; 3]]) {
    for (a, b) in acc.iter_mut().zip(x) {
        for k in 0..3 {
            a[k] += b[k];
        }
    }
}

/// Analytic gradient of a converged SCF (`result` from [`crate::electronic::qc::scf::run`]
/// at the geometry of `basis`), per atom in Eh/bohr.
pub fn scf_gradient(
    basis: &BasisSet,
    result: &ScfResult,
    potential: &Potential,
) -> Result<Vec<[f64; 3]>, GradientError> {
    Ok(scf_gradient_terms(basis, result, potential)?.total)
}

/// [`scf_gradient`] with its contributions.
pub fn scf_gradient_terms(
    basis: &BasisSet,
    result: &ScfResult,
    potential: &Potential,
) -> Result<GradientTerms, GradientError> {
    let n = basis.nbf;
    let natoms = basis.natoms();
    for (name, m) in [
        ("α density", &result.density_alpha),
        ("β density", &result.density_beta),
        ("α Fock matrix", &result.fock_alpha),
        ("β Fock matrix", &result.fock_beta),
    ] {
        if m.shape() != (n, n) {
            return Err(GradientError::Input(format!(
                "the SCF {name} has shape {:?}, the basis has {n} functions",
                m.shape()
            )));
        }
    }
    let restricted = result.reference == Reference::Restricted;
    let (da, db) = (&result.density_alpha, &result.density_beta);
    let dt = da + db;

    let dh = integrals::core_hamiltonian_nuclear_derivatives(basis);
    let one_electron = contract(&dt, &dh, natoms);
    drop(dh);
    let ds = integrals::overlap_nuclear_derivatives(basis);
    let w = energy_weighted_density(result);
    let overlap: Vec<[f64; 3]> = contract(&w, &ds, natoms)
        .into_iter()
        .map(|g| g.map(|v| -v))
        .collect();
    drop(ds);

    let (cx, functional, grid) = match potential {
        Potential::HartreeFock => (1.0, None, None),
        Potential::KohnSham { functional, grid } => {
            let spin = if restricted {
                Spin::Unpolarized
            } else {
                Spin::Polarized
            };
            let f = Functional::preset_or_libxc(functional, spin)
                .map_err(|e| GradientError::Ks(e.into()))?;
            let cx = f.exact_exchange();
            let g = if f.is_hf_only() {
                None
            } else {
                Some(
                    MolecularGrid::build(&basis.nuclei, grid)
                        .map_err(|e| GradientError::Ks(e.into()))?,
                )
            };
            (cx, Some(f), g)
        }
    };
    let two_electron = if restricted {
        integrals::jk_gradient(basis, std::slice::from_ref(&dt), 1.0, 0.5 * cx)?
    } else {
        integrals::jk_gradient(basis, &[da.clone(), db.clone()], 1.0, cx)?
    };
    let (xc_total, grid_weights) = match (functional, grid) {
        (Some(f), Some(g)) => {
            let r = xc::xc_gradient(basis, &g, &f, da, db, restricted)?;
            (r.total, r.grid_weights)
        }
        _ => (vec![[0.0; 3]; natoms], vec![[0.0; 3]; natoms]),
    };
    let nuclear = nuclear_repulsion_gradient(basis);
    let mut total = vec![[0.0; 3]; natoms];
    for part in [&one_electron, &two_electron, &xc_total, &overlap, &nuclear] {
        add(&mut total, part);
    }
    Ok(GradientTerms {
        one_electron,
        two_electron,
        xc: xc_total,
        grid_weights,
        overlap,
        nuclear,
        total,
    })
}
