//! Nuclear gradients dE/dR of the built-in quantum chemistry.
//!
//! * [`scf`]: analytic gradients of converged RHF/UHF/ROHF and RKS/UKS/ROKS
//!   determinants ([`scf::scf_gradient`]), including the exchange–correlation
//!   term with the derivative of the Becke grid weights ([`xc`]).
//! * [`numerical`]: central finite differences of any energy function,
//!   parallel over displacements ([`numerical::central_differences`]), and a
//!   ready SCF energy function that starts every displaced SCF from the
//!   orbitals of the reference geometry ([`numerical::ScfEnergy`]), for the
//!   SCF energy or any MRSF-TDDFT state ([`numerical::Target`]); several
//!   states from one set of displaced calculations with
//!   [`numerical::ScfEnergy::numerical_state_gradients`]
//!   ([`numerical::central_differences_many`]).
//! * [`mrsf`]: analytic gradients of MRSF-TDDFT states by the Z-vector
//!   method ([`mrsf::mrsf_state_gradients`]; ROHF and ROKS references).
//!
//! Gradients are returned per atom, `[dE/dx, dE/dy, dE/dz]` in Eh/bohr, in
//! the atom order of the basis (forces are their negatives).
//!
//! Tested in `tests/gradients.rs` against central differences of our own SCF
//! energies, against PySCF analytic gradients (fixtures made by
//! `scripts/reference/scf_gradients.py`) and against exact invariances.

pub mod mrsf;
pub mod numerical;
pub mod scf;
pub mod xc;

use crate::electronic::qc::basis::{BasisError, BasisSet};
use crate::electronic::qc::dft::ks::{KsError, KsRunError};
use crate::electronic::qc::integrals::TwoElectronError;
use crate::electronic::qc::scf::ScfError;

/// Errors of gradient evaluations.
#[derive(Debug, thiserror::Error)]
pub enum GradientError {
    /// The SCF at a (displaced) geometry failed.
    #[error("SCF: {0}")]
    Scf(#[from] ScfError),
    /// Kohn–Sham set-up (functional, grid, basis functions on the grid).
    #[error("Kohn-Sham set-up: {0}")]
    Ks(#[from] KsError),
    /// Two-electron derivative integrals.
    #[error("two-electron derivatives: {0}")]
    TwoElectron(#[from] TwoElectronError),
    /// Placing the basis at a displaced geometry.
    #[error("basis: {0}")]
    Basis(#[from] BasisError),
    /// Exchange–correlation evaluation.
    #[error("exchange-correlation gradient: {0}")]
    Xc(String),
    /// Inputs that do not fit together (shapes, atom counts).
    #[error("gradient input: {0}")]
    Input(String),
    /// The energy function of a numerical gradient failed.
    #[error("energy at displacement {displacement} (atom {atom}, {axis}{sign}): {message}")]
    Displacement {
        /// Index of the displaced coordinate (3·atom + axis).
        displacement: usize,
        /// Atom index.
        atom: usize,
        /// "x", "y" or "z".
        axis: &'static str,
        /// "+" or "−".
        sign: &'static str,
        /// The underlying error.
        message: String,
    },
    /// A state whose gradient was asked for was not computed.
    #[error("state {requested} was not computed (available: {available})")]
    StateNotComputed {
        /// The requested label.
        requested: String,
        /// Labels of the computed states.
        available: String,
    },
    /// The excited-state response failed.
    #[error("excited states: {0}")]
    Response(String),
    /// The reference is not a triplet ROHF/ROKS determinant.
    #[error("not a triplet ROHF/ROKS reference: {0}")]
    NotTripletReference(String),
    /// The Z-vector (coupled-perturbed ROKS) equations did not converge.
    #[error("Z-vector equations not converged after {iterations} iterations (residual norms {residuals:?}, tolerance {tolerance:e})")]
    ZVectorNotConverged {
        /// Iterations done.
        iterations: usize,
        /// Residual norm per state at the end.
        residuals: Vec<f64>,
        /// The requested tolerance.
        tolerance: f64,
    },
}

impl From<KsRunError> for GradientError {
    fn from(e: KsRunError) -> Self {
        match e {
            KsRunError::Setup(s) => GradientError::Ks(s),
            KsRunError::Scf(s) => GradientError::Scf(s),
        }
    }
}

/// dE_nuc/dR of the nuclear repulsion Σ_{A<B} Z_A Z_B / R_AB, per atom:
/// ∂/∂R_A = −Σ_B Z_A Z_B (R_A − R_B) / R_AB³.
pub fn nuclear_repulsion_gradient(basis: &BasisSet) -> Vec<[f64; 3]> {
    let nu = &basis.nuclei;
    let mut g = vec![[0.0; 3]; nu.len()];
    for a in 0..nu.len() {
        for b in 0..nu.len() {
            if a == b {
                continue;
            }
            let d = [
                nu[a].1[0] - nu[b].1[0],
                nu[a].1[1] - nu[b].1[1],
                nu[a].1[2] - nu[b].1[2],
            ];
            let r2 = d[0] * d[0] + d[1] * d[1] + d[2] * d[2];
            let f = nu[a].0 * nu[b].0 / (r2 * r2.sqrt());
            for k in 0..3 {
                g[a][k] -= f * d[k];
            }
        }
    }
    g
}

/// Largest absolute component of a gradient.
pub fn max_component(g: &[[f64; 3]]) -> f64 {
    g.iter().flatten().fold(0.0, |m, v| m.max(v.abs()))
}

/// Root mean square of the components of a gradient.
pub fn rms(g: &[[f64; 3]]) -> f64 {
    let n = 3 * g.len();
    if n == 0 {
        return 0.0;
    }
    (g.iter().flatten().map(|v| v * v).sum::<f64>() / n as f64).sqrt()
}
