//! The back-end contract: the one small interface between the dynamics engine
//! and electronic structure.
//!
//! The engine hands a back end a nuclear configuration (atomic units) and a typed
//! [`Request`]; the back end answers with [`Results`]: adiabatic energies in
//! ascending order, the gradients asked for, the overlap matrix between the
//! states of the previous distinct geometry and the current one, and optionally
//! nonadiabatic coupling vectors. A back end caches: a second call at the same
//! geometry (bitwise equal coordinates) only computes what was not yet computed,
//! and the overlaps keep referring to the previous *distinct* geometry.
//!
//! The opaque [`Snapshot`] carries whatever the back end needs to continue
//! exactly where it stopped (eigenvectors of a model, orbitals of a molecule);
//! restoring it after a restart must make the continued trajectory bit-for-bit
//! the one that never stopped.

pub mod models;
pub mod qc;

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

/// What the engine needs from one call. Energies of all tracked states are
/// always returned.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Request {
    /// States (0 = lowest) whose energy gradient is needed.
    pub gradients: Vec<usize>,
    /// The overlap matrix with the states of the previous distinct geometry.
    pub overlaps: bool,
    /// Nonadiabatic coupling vectors between every pair of tracked states.
    pub couplings: bool,
    /// Transition dipoles from the lowest state to every state.
    pub transition_dipoles: bool,
}

impl Request {
    /// Energies only.
    pub fn energies() -> Self {
        Self::default()
    }
    /// Energies and the gradient of one state.
    pub fn gradient_of(state: usize) -> Self {
        Self {
            gradients: vec![state],
            ..Self::default()
        }
    }
}

/// Nonadiabatic coupling vectors d_ij = <ψ_i|∂ψ_j/∂q> (1/bohr), antisymmetric
/// in i, j. Stored as one vector (length = degrees of freedom) per pair i < j.
#[derive(Clone, Debug, PartialEq)]
pub struct Couplings {
    n_states: usize,
    vectors: Vec<Vec<f64>>,
}

impl Couplings {
    /// All-zero couplings for `n_states` states and `n_dof` coordinates.
    pub fn zeros(n_states: usize, n_dof: usize) -> Self {
        let pairs = n_states * n_states.saturating_sub(1) / 2;
        Self {
            n_states,
            vectors: vec![vec![0.0; n_dof]; pairs],
        }
    }
    fn index(&self, i: usize, j: usize) -> usize {
        debug_assert!(i < j && j < self.n_states);
        // Pairs ordered (0,1), (0,2), ..., (1,2), ...
        i * (2 * self.n_states - i - 1) / 2 + (j - i - 1)
    }
    /// Number of states the couplings connect.
    pub fn n_states(&self) -> usize {
        self.n_states
    }
    /// The vector for i < j, mutable (back ends fill it).
    pub fn upper_mut(&mut self, i: usize, j: usize) -> &mut [f64] {
        let k = self.index(i, j);
        &mut self.vectors[k]
    }
    /// d_ij with the sign of the requested order (d_ji = −d_ij); zero for i = j.
    pub fn get(&self, i: usize, j: usize) -> Vec<f64> {
        use std::cmp::Ordering::*;
        match i.cmp(&j) {
            Less => self.vectors[self.index(i, j)].clone(),
            Greater => self.vectors[self.index(j, i)].iter().map(|x| -x).collect(),
            Equal => vec![0.0; self.vectors.first().map_or(0, Vec::len)],
        }
    }
}

/// Back-end diagnostics of one call (recorded, never interpreted by the engine).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Diagnostics {
    /// Iterations of an iterative solver (SCF), when there is one.
    pub iterations: Option<u32>,
    /// Iterations of a second iterative solver (the excited-state eigensolver).
    pub response_iterations: Option<u32>,
    /// Spin expectation values <S²> per state, when meaningful.
    pub spin_squared: Option<Vec<f64>>,
    /// Non-fatal warnings.
    pub warnings: Vec<String>,
}

/// Everything a back end returns for one geometry (atomic units).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Results {
    /// Adiabatic energies, hartree, ascending.
    pub energies: Vec<f64>,
    /// (state, dE/dq in hartree/bohr) for every state requested.
    pub gradients: Vec<(usize, Vec<f64>)>,
    /// S_ij = <ψ_i(previous geometry)|ψ_j(this geometry)>, with the back end's
    /// raw (arbitrary) phases; `None` on the first call or when not requested.
    pub overlaps: Option<DMatrix<f64>>,
    /// Nonadiabatic coupling vectors, raw phases as for `overlaps`.
    pub couplings: Option<Couplings>,
    /// ⟨ψ_0|μ|ψ_n⟩ (e·bohr) for every state n (n = 0: the permanent dipole),
    /// with the back end's raw phases; when requested.
    pub transition_dipoles: Option<Vec<[f64; 3]>>,
    /// Solver information.
    pub diagnostics: Diagnostics,
}

impl Results {
    /// The gradient of `state`, if it was computed.
    pub fn gradient(&self, state: usize) -> Option<&[f64]> {
        self.gradients
            .iter()
            .find(|(s, _)| *s == state)
            .map(|(_, g)| g.as_slice())
    }
}

/// What a back end is, for the engine and for the record.
#[derive(Clone, Debug, PartialEq)]
pub struct BackendInfo {
    /// Short description for logs and files.
    pub name: String,
    /// Number of tracked electronic states.
    pub n_states: usize,
    /// Masses of the degrees of freedom (electron masses), one per coordinate.
    pub masses: Vec<f64>,
}

/// An opaque, serialisable record of a back end's electronic state.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Snapshot {
    /// Which back end wrote it (checked on restore).
    pub backend: String,
    /// The last geometry computed (atomic units).
    pub geometry: Vec<f64>,
    /// Floating-point payload (eigenvectors, orbitals, …), layout private to the back end.
    pub reals: Vec<f64>,
}

/// Typed back-end failures. "Set-up is wrong" errors are reported before any
/// work; the others end one trajectory cleanly.
#[derive(Debug, thiserror::Error, Clone, PartialEq)]
pub enum BackendError {
    /// The geometry has the wrong number of coordinates.
    #[error("geometry has {got} coordinates, the back end expects {expected}")]
    Dimension { expected: usize, got: usize },
    /// A coordinate is NaN or infinite.
    #[error("geometry contains a non-finite coordinate at index {index}")]
    NonFinite { index: usize },
    /// A gradient was requested for a state that is not tracked.
    #[error("state {state} requested, the back end tracks {n_states} states")]
    NoSuchState { state: usize, n_states: usize },
    /// The snapshot belongs to another back end or is malformed.
    #[error("snapshot cannot be restored: {0}")]
    Snapshot(String),
    /// The back end cannot compute what was requested.
    #[error("not available: {0}")]
    Unsupported(String),
    /// The electronic-structure calculation itself failed (SCF, singular overlap, …).
    #[error("calculation failed: {0}")]
    Failed(String),
}

/// The back-end contract (design §3). One instance per trajectory.
pub trait Backend: Send {
    /// Name, number of states and masses of the coordinates.
    fn info(&self) -> BackendInfo;
    /// Compute what `request` asks for at geometry `q` (atomic units).
    fn compute(&mut self, q: &[f64], request: &Request) -> Result<&Results, BackendError>;
    /// The electronic state needed to continue exactly.
    fn snapshot(&self) -> Snapshot;
    /// Continue from a snapshot taken by the same kind of back end.
    fn restore(&mut self, snapshot: &Snapshot) -> Result<(), BackendError>;
}

/// Check the common preconditions of a compute call.
pub fn check_geometry(q: &[f64], expected: usize) -> Result<(), BackendError> {
    if q.len() != expected {
        return Err(BackendError::Dimension {
            expected,
            got: q.len(),
        });
    }
    if let Some(index) = q.iter().position(|x| !x.is_finite()) {
        return Err(BackendError::NonFinite { index });
    }
    Ok(())
}
