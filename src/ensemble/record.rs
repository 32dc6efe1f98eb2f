//! What is written for every trajectory: its header, one row per recorded
//! step, its hop attempts and its final status. Plain data, atomic units.

use num_complex::Complex64;
use serde::{Deserialize, Serialize};

pub use crate::dynamics::{Hop, Status};
pub use crate::electronic::Diagnostics;

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

/// Back-end diagnostics of one recorded step, as stored: solver iterations
/// (−1 = the back end has no such solver or did not say) and <S²> per state
/// (NaN = not available).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RowDiagnostics {
    /// Iterations of the back end's first iterative solver (SCF); −1 = none.
    pub iterations: i32,
    /// Iterations of its excited-state eigensolver; −1 = none.
    pub response_iterations: i32,
    /// <S²> of each state; NaN = not available.
    pub spin_squared: Vec<f64>,
}

impl RowDiagnostics {
    /// "Nothing reported" for `n_states` states.
    pub fn none(n_states: usize) -> Self {
        Self {
            iterations: -1,
            response_iterations: -1,
            spin_squared: vec![f64::NAN; n_states],
        }
    }

    /// The stored form of a back end's [`Diagnostics`]: counts beyond
    /// `i32::MAX` are clamped, <S²> is cut or padded (NaN) to `n_states`.
    pub fn from_backend(d: &Diagnostics, n_states: usize) -> Self {
        let count = |c: Option<u32>| c.map_or(-1, |c| i32::try_from(c).unwrap_or(i32::MAX));
        let mut spin_squared = vec![f64::NAN; n_states];
        if let Some(s) = &d.spin_squared {
            for (dst, src) in spin_squared.iter_mut().zip(s) {
                *dst = *src;
            }
        }
        Self {
            iterations: count(d.iterations),
            response_iterations: count(d.response_iterations),
            spin_squared,
        }
    }

    /// The values as bit patterns (for exact comparisons: NaN ≠ NaN).
    pub fn bits(&self) -> Vec<u64> {
        let mut v = vec![
            self.iterations as u32 as u64,
            self.response_iterations as u32 as u64,
        ];
        v.extend(self.spin_squared.iter().map(|x| x.to_bits()));
        v
    }
}

/// A non-fatal warning of the back end at a step (every step's warnings are
/// kept, whatever `record_every` is).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct WarningRow {
    /// Step whose back-end call warned.
    pub step: u64,
    /// The warning.
    pub text: String,
}

/// Rows of one trajectory in columns, as the writer stores them: appending
/// a step costs no allocation once the buffers have grown.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct RowBlock {
    /// Coordinates per row.
    pub n_dof: usize,
    /// States per row.
    pub n_states: usize,
    /// Step numbers.
    pub step: Vec<u64>,
    /// Times.
    pub time: Vec<f64>,
    /// Coordinates, row-major (rows × n_dof).
    pub q: Vec<f64>,
    /// Velocities, row-major.
    pub v: Vec<f64>,
    /// Energies, row-major (rows × n_states).
    pub energies: Vec<f64>,
    /// Active states.
    pub active: Vec<u32>,
    /// Amplitudes, row-major.
    pub amplitudes: Vec<Complex64>,
    /// Kinetic energies.
    pub kinetic: Vec<f64>,
    /// Potential energies.
    pub potential: Vec<f64>,
    /// Total energies.
    pub total: Vec<f64>,
    /// Solver iterations (−1 = none).
    pub iterations: Vec<i32>,
    /// Response-solver iterations (−1 = none).
    pub response_iterations: Vec<i32>,
    /// <S²>, row-major (rows × n_states), NaN = not available.
    pub spin_squared: Vec<f64>,
}

impl RowBlock {
    /// An empty block for rows of `n_dof` coordinates and `n_states` states.
    pub fn new(n_dof: usize, n_states: usize) -> Self {
        Self {
            n_dof,
            n_states,
            ..Self::default()
        }
    }

    /// An empty block with room for `rows` rows.
    pub fn with_capacity(n_dof: usize, n_states: usize, rows: usize) -> Self {
        Self {
            n_dof,
            n_states,
            step: Vec::with_capacity(rows),
            time: Vec::with_capacity(rows),
            q: Vec::with_capacity(rows * n_dof),
            v: Vec::with_capacity(rows * n_dof),
            energies: Vec::with_capacity(rows * n_states),
            active: Vec::with_capacity(rows),
            amplitudes: Vec::with_capacity(rows * n_states),
            kinetic: Vec::with_capacity(rows),
            potential: Vec::with_capacity(rows),
            total: Vec::with_capacity(rows),
            iterations: Vec::with_capacity(rows),
            response_iterations: Vec::with_capacity(rows),
            spin_squared: Vec::with_capacity(rows * n_states),
        }
    }

    /// Rows held.
    pub fn len(&self) -> usize {
        self.step.len()
    }

    /// No rows.
    pub fn is_empty(&self) -> bool {
        self.step.is_empty()
    }

    /// Forget the rows, keep the buffers.
    pub fn clear(&mut self) {
        let (n_dof, n_states) = (self.n_dof, self.n_states);
        for v in [
            &mut self.time,
            &mut self.q,
            &mut self.v,
            &mut self.energies,
            &mut self.kinetic,
            &mut self.potential,
            &mut self.total,
            &mut self.spin_squared,
        ] {
            v.clear();
        }
        self.step.clear();
        self.active.clear();
        self.amplitudes.clear();
        self.iterations.clear();
        self.response_iterations.clear();
        (self.n_dof, self.n_states) = (n_dof, n_states);
    }

    /// Append one row given by its parts (the widths are checked by the writer).
    #[allow(clippy::too_many_arguments)]
    pub fn push(
        &mut self,
        step: u64,
        time: f64,
        q: &[f64],
        v: &[f64],
        energies: &[f64],
        active: u32,
        amplitudes: &[Complex64],
        kinetic: f64,
        potential: f64,
        diagnostics: &Diagnostics,
    ) {
        self.step.push(step);
        self.time.push(time);
        self.q.extend_from_slice(q);
        self.v.extend_from_slice(v);
        self.energies.extend_from_slice(energies);
        self.active.push(active);
        self.amplitudes.extend_from_slice(amplitudes);
        self.kinetic.push(kinetic);
        self.potential.push(potential);
        self.total.push(kinetic + potential);
        let count = |c: Option<u32>| c.map_or(-1, |c| i32::try_from(c).unwrap_or(i32::MAX));
        self.iterations.push(count(diagnostics.iterations));
        self.response_iterations
            .push(count(diagnostics.response_iterations));
        let start = self.spin_squared.len();
        self.spin_squared.resize(start + self.n_states, f64::NAN);
        if let Some(s) = &diagnostics.spin_squared {
            for (dst, src) in self.spin_squared[start..].iter_mut().zip(s) {
                *dst = *src;
            }
        }
    }

    /// Append a stored row and its diagnostics.
    pub fn push_row(&mut self, r: &StepRow, d: &RowDiagnostics) {
        self.step.push(r.step);
        self.time.push(r.time);
        self.q.extend_from_slice(&r.q);
        self.v.extend_from_slice(&r.v);
        self.energies.extend_from_slice(&r.energies);
        self.active.push(r.active);
        self.amplitudes.extend_from_slice(&r.amplitudes);
        self.kinetic.push(r.kinetic);
        self.potential.push(r.potential);
        self.total.push(r.total);
        self.iterations.push(d.iterations);
        self.response_iterations.push(d.response_iterations);
        self.spin_squared.extend_from_slice(&d.spin_squared);
    }

    /// The rows back as [`StepRow`]s and [`RowDiagnostics`].
    pub fn to_rows(&self) -> (Vec<StepRow>, Vec<RowDiagnostics>) {
        let (nd, ns) = (self.n_dof, self.n_states);
        let rows = (0..self.len())
            .map(|k| StepRow {
                step: self.step[k],
                time: self.time[k],
                q: self.q[k * nd..(k + 1) * nd].to_vec(),
                v: self.v[k * nd..(k + 1) * nd].to_vec(),
                energies: self.energies[k * ns..(k + 1) * ns].to_vec(),
                active: self.active[k],
                amplitudes: self.amplitudes[k * ns..(k + 1) * ns].to_vec(),
                kinetic: self.kinetic[k],
                potential: self.potential[k],
                total: self.total[k],
            })
            .collect();
        let diags = (0..self.len())
            .map(|k| RowDiagnostics {
                iterations: self.iterations[k],
                response_iterations: self.response_iterations[k],
                spin_squared: self.spin_squared[k * ns..(k + 1) * ns].to_vec(),
            })
            .collect();
        (rows, diags)
    }
}
