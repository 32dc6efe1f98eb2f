//! The built-in quantum chemistry: Gaussian basis sets and integrals, SCF and
//! DFT, the spin-flip response, gradients and geometry optimisation.
//!
//! * [`basis`]: basis-set data (built-in files from the basis-set-exchange
//!   package, or a user file in the same JSON schema), shells on a molecule,
//!   Cartesian/spherical choice, normalisation, AO order.
//! * [`boys`]: the Boys function F_n(x) to 1e−14 relative.
//! * [`integrals`]: overlap, kinetic, nuclear attraction, multipoles, mixed
//!   overlaps between geometries, ERIs (Schwarz screening, 8-fold packed
//!   store), J/K builds (in-core or direct, rayon), first nuclear derivatives.
//!
//! * [`scf`], [`dft`]: RHF/UHF/ROHF and RKS/UKS/ROKS (libxc functionals,
//!   molecular grids); [`response`]: SF-TDA and MRSF-TDDFT excited states;
//!   [`gradient`]: analytic SCF gradients and numerical state gradients;
//!   [`optimize`]: BFGS geometry optimisation; [`backend`]: all of it as a
//!   dynamics back end (MRSF singlets, state overlaps between geometries,
//!   gradients and coupling vectors).
//!
//! Everything is in atomic units (bohr, hartree).
//!
//! # Main entry points
//!
//! * [`basis::BasisSetData::builtin`] / [`basis::BasisSetData::from_file`] →
//!   [`basis::BasisSet::new`] (molecule, data, optional [`basis::Harmonics`]
//!   override) or [`basis::BasisSet::builtin`]; errors are [`basis::BasisError`].
//! * One-electron: [`integrals::overlap`], [`integrals::kinetic`],
//!   [`integrals::nuclear_attraction`], [`integrals::core_hamiltonian`],
//!   [`integrals::dipole`], [`integrals::quadrupole`],
//!   [`integrals::overlap_between`] (two geometries / two bases).
//! * Two-electron: [`integrals::ShellPairs`] (pair data + Schwarz factors, once
//!   per geometry), [`integrals::EriStore`] (packed 8-fold store),
//!   [`integrals::coulomb_exchange`] (chooses in-core or direct),
//!   [`integrals::coulomb_exchange_in_core`], [`integrals::coulomb_exchange_direct`],
//!   [`integrals::eri_tensor`] (n⁴, tests only).
//! * Derivatives: `*_bra_derivative` matrices,
//!   [`integrals::overlap_nuclear_derivatives`],
//!   [`integrals::core_hamiltonian_nuclear_derivatives`],
//!   [`integrals::eri_bra_derivative_tensor`] (n⁴, tests only) and
//!   [`integrals::jk_gradient`] (dE₂/dR of a Coulomb/exchange energy).
//!
//! Tested in `tests/integrals.rs` against PySCF fixtures, mpmath Boys values,
//! Szabo & Ostlund's H2 example, finite differences and exact invariances.
//!
//! ```
//! use flipswarm::chem::{Element, Molecule};
//! use flipswarm::electronic::qc::{basis::BasisSet, integrals};
//! let h = Element::from_symbol("H").unwrap();
//! let mol = Molecule::from_elements_positions_bohr(&[h, h], &[[0.0, 0.0, 0.0], [0.0, 0.0, 1.4]]).unwrap();
//! let basis = BasisSet::builtin(&mol, "STO-3G").unwrap();
//! let s = integrals::overlap(&basis);
//! // Szabo & Ostlund, Modern Quantum Chemistry, §3.5.2: S12 = 0.6593.
//! assert!((s[(0, 1)] - 0.6593).abs() < 5e-5);
//! ```

pub mod backend;
pub mod basis;
pub mod boys;
pub mod dft;
pub mod estimate;
pub mod gradient;
pub mod integrals;
pub mod optimize;
pub mod response;
pub mod scf;
