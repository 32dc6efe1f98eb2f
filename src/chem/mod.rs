//! Chemistry basics: elements, molecular geometries and XYZ files.
//!
//! * [`elements`]: H to Kr with AME2020 isotope masses ([`Element`]).
//! * [`geometry`]: [`Atom`] and [`Molecule`], positions in bohr and masses in
//!   electron masses (atomic units, see [`crate::units`]).
//! * [`xyz`]: strict XYZ / extended-XYZ reading and writing with errors that
//!   name the source, line and problem.

pub mod elements;
pub mod geometry;
pub mod xyz;

pub use elements::{Element, ElementData, ElementError, MAX_ATOMIC_NUMBER};
pub use geometry::{Atom, GeometryError, Molecule};
pub use xyz::{FrameProperties, PropValue, XyzError, XyzErrorKind, XyzFrame, XyzWriteError};
