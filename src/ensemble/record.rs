//! What is written for every trajectory: its header, one row per recorded
//! step, its hop attempts and its final status. Plain data, atomic units.

use num_complex::Complex64;
use serde::{Deserialize, Serialize};

pub use crate::dynamics::{Hop, Status};

/// Facts about a part file, stored as attributes of its root group.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PartMeta {
    /// The effective run configuration (TOML text after overrides).
    pub config_toml: String,
    /// flipswarm version that wrote the file.
    pub program_version: String,
    /// Creation time, RFC 3339 UTC.
    pub created: String,
    /// Number of electronic states.
    pub n_states: usize,
    /// Number of nuclear coordinates.
    pub n_dof: usize,
    /// Masses of the coordinates (electron masses).
    pub masses: Vec<f64>,
    /// Which slice of the ensemble this part holds: (k, n) with 0 ≤ k < n.
    pub slice: (usize, usize),
    /// Ensemble indices of the trajectories of this part, ascending.
    pub trajectories: Vec<usize>,
    /// Time step (a.u.), for readers.
    pub timestep_au: f64,
}

/// Where a trajectory started.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TrajectoryHeader {
    /// Index in the ensemble.
    pub index: usize,
    /// Initial coordinates.
    pub q0: Vec<f64>,
    /// Initial velocities.
    pub v0: Vec<f64>,
    /// Initial active state.
    pub initial_state: usize,
    /// Ensemble seed (the per-trajectory streams derive from it and `index`).
    pub seed: u64,
}

/// One recorded step.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct StepRow {
    /// Step number (0 = initial point).
    pub step: u64,
    /// Time (a.u.).
    pub time: f64,
    /// Coordinates.
    pub q: Vec<f64>,
    /// Velocities.
    pub v: Vec<f64>,
    /// Adiabatic energies (hartree).
    pub energies: Vec<f64>,
    /// Active state.
    pub active: u32,
    /// Electronic amplitudes.
    pub amplitudes: Vec<Complex64>,
    /// Nuclear kinetic energy (hartree).
    pub kinetic: f64,
    /// Potential energy of the active state (hartree).
    pub potential: f64,
    /// Total energy (hartree).
    pub total: f64,
}
