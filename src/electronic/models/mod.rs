//! Analytic model Hamiltonians used as back ends: Tully's one-dimensional
//! two-state models, linear vibronic coupling (LVC) models, and one-state
//! harmonic and Morse potentials.
//!
//! Every model is given in a *diabatic* representation: a real symmetric
//! matrix W(q) and its derivatives ∂W/∂q_k. [`DiabaticBackend`] turns any such
//! model into a back end: adiabatic energies are the eigenvalues of W, and with
//! eigenvectors u_i,
//!
//! * gradients (Hellmann–Feynman): ∂E_i/∂q_k = u_iᵀ (∂W/∂q_k) u_i,
//! * coupling vectors: d_ij,k = u_iᵀ (∂W/∂q_k) u_j / (E_j − E_i),
//! * overlaps between geometries: S = U(previous)ᵀ U(current).

mod diabatic;
pub mod lvc;
pub mod oscillators;
pub mod tully;

pub use diabatic::{DiabaticBackend, DiabaticModel};
pub use lvc::Lvc;
pub use oscillators::{Harmonic, Morse};
pub use tully::{Tully, TullyModel};
