//! Diagnostic for dynamics: the character of the reference triplet (its
//! open-shell pair O1, O2) followed from one geometry to the next.
//!
//! A published limitation of spin-flip methods on a triplet reference is a
//! discontinuity when the two lowest triplets exchange character: the SCF
//! then lands on a different open-shell pair and every response state jumps.
//! We measure the overlap of the two-dimensional open-shell spaces of
//! consecutive steps, σ₁ ≥ σ₂ the singular values of O_prevᵀ S_prev,cur O_cur
//! (S the AO overlap between the two geometries,
//! [`integrals::overlap_between`]); σ₂ is invariant to rotations within each
//! pair (O1/O2 mixing is harmless) and close to 1 for a smooth step. Below
//! [`CHARACTER_THRESHOLD`] the reference is flagged as having changed nature
//! (a warning is logged).

use super::ResponseError;
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::integrals;
use crate::electronic::qc::scf::ScfResult;
use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

/// σ₂ below this flags a change of the reference's character (common
/// practice for overlap-based tracking; small steps give σ₂ > 0.95).
pub const CHARACTER_THRESHOLD: f64 = 0.8;

/// The open-shell orbitals of one reference.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ReferenceCharacter {
    /// AO coefficients of O1, O2 (nbf × 2).
    pub open_shells: DMatrix<f64>,
}

/// Result of comparing two steps.
#[derive(Clone, Copy, Debug, Serialize, Deserialize)]
pub struct CharacterCheck {
    /// Singular values σ₁ ≥ σ₂ of the open-shell overlap.
    pub singular_values: [f64; 2],
    /// σ₂ < [`CHARACTER_THRESHOLD`].
    pub changed: bool,
}

impl ReferenceCharacter {
    /// From a triplet ROKS/ROHF result (Ms = ±1).
    pub fn from_scf(scf: &ScfResult) -> Result<ReferenceCharacter, ResponseError> {
        let (na, nb) = (scf.electrons.alpha, scf.electrons.beta);
        if na.abs_diff(nb) != 2 {
            return Err(ResponseError::NotTriplet {
                alpha: na,
                beta: nb,
            });
        }
        let nc = na.min(nb);
        if scf.orbitals_alpha.ncols() < nc + 2 {
            return Err(ResponseError::Inconsistent(
                "fewer orbitals than occupied".into(),
            ));
        }
        Ok(ReferenceCharacter {
            open_shells: scf.orbitals_alpha.columns(nc, 2).into_owned(),
        })
    }

    /// Compare with the previous step (`previous` in basis `prev_basis`,
    /// `self` in `basis`).
    pub fn compare(
        &self,
        basis: &BasisSet,
        previous: &ReferenceCharacter,
        prev_basis: &BasisSet,
    ) -> Result<CharacterCheck, ResponseError> {
        if previous.open_shells.nrows() != prev_basis.nbf || self.open_shells.nrows() != basis.nbf {
            return Err(ResponseError::Inconsistent(
                "open-shell orbitals do not fit their basis sets".into(),
            ));
        }
        let s = integrals::overlap_between(prev_basis, basis);
        let m = previous.open_shells.transpose() * s * &self.open_shells;
        let sv = m.singular_values();
        let mut v = [sv[0], sv[1]];
        if v[0] < v[1] {
            v.swap(0, 1);
        }
        let changed = v[1] < CHARACTER_THRESHOLD;
        if changed {
            tracing::warn!(
                "the reference triplet changed character (open-shell overlap singular values {:.3}, {:.3})",
                v[0],
                v[1]
            );
        }
        Ok(CharacterCheck {
            singular_values: v,
            changed,
        })
    }
}
