//! Initial conditions: harmonic normal modes and Wigner sampling.
//!
//! [`modes`] turns a Cartesian Hessian into harmonic frequencies and
//! mass-weighted normal modes with translations and rotations projected out;
//! [`wigner`] draws positions and momenta from the (thermal) harmonic Wigner
//! distribution of those modes; [`files`] holds the normal-modes file and
//! the initial-conditions file; [`spectrum`] turns excitation energies and
//! oscillator strengths of an ensemble into an absorption spectrum.

pub mod files;
pub mod modes;
pub mod spectrum;
pub mod wigner;
