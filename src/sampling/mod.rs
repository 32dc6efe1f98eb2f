//! Initial conditions: harmonic normal modes and Wigner sampling.
//!
//! [`modes`] turns a Cartesian Hessian into harmonic frequencies and
//! mass-weighted normal modes with translations and rotations projected out;
//! [`wigner`] draws positions and momenta from the (thermal) harmonic Wigner
//! distribution of those modes.

pub mod modes;
pub mod wigner;
