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

/// Rows of one trajectory as its thread gathers them: one row-major buffer
/// of 8-byte words, a row's fields side by side, so that recording a step
/// is one sequential run of stores (about 30 ns for 20 atoms and 5 states,
/// `cargo bench --bench engine -- --push`), and the transposition into
/// columns ([`PackedRows::unpack_into`], about 50 ns a row) is done by the
/// writer thread, off the trajectory's critical path.
///
/// A row is `[step, time, kinetic, potential, total, active, iterations,
/// response iterations, q (n_dof), v (n_dof), energies (n_states),
/// amplitudes (re, im per state), <S²> (n_states)]`, floating-point values
/// by their bits, the iteration counts as sign-extended `i32` (−1 = none).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct PackedRows {
    /// Coordinates per row.
    pub n_dof: usize,
    /// States per row.
    pub n_states: usize,
    words: Vec<u64>,
    /// The first row given with widths that do not fit the block, if any
    /// (such rows are not stored; unpacking then fails).
    malformed: Option<String>,
}

impl PackedRows {
    /// Words of the fixed part of a row.
    const HEAD: usize = 8;

    /// Words per row for `n_dof` coordinates and `n_states` states.
    pub fn width_for(n_dof: usize, n_states: usize) -> usize {
        Self::HEAD + 2 * n_dof + 4 * n_states
    }

    /// An empty block with room for `rows` rows.
    pub fn with_capacity(n_dof: usize, n_states: usize, rows: usize) -> Self {
        Self {
            n_dof,
            n_states,
            words: Vec::with_capacity(rows * Self::width_for(n_dof, n_states)),
            malformed: None,
        }
    }

    /// Words per row.
    pub fn width(&self) -> usize {
        Self::width_for(self.n_dof, self.n_states)
    }

    /// Rows held.
    pub fn len(&self) -> usize {
        self.words.len() / self.width()
    }

    /// No rows.
    pub fn is_empty(&self) -> bool {
        self.words.is_empty()
    }

    /// Rows that fit without growing the buffer.
    pub fn capacity(&self) -> usize {
        self.words.capacity() / self.width()
    }

    /// Forget the rows, keep the buffer.
    pub fn clear(&mut self) {
        self.words.clear();
        self.malformed = None;
    }

    /// Append one row given by its parts; <S²> values missing from the
    /// diagnostics are stored as NaN.
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
        let (nd, ns) = (self.n_dof, self.n_states);
        if q.len() != nd || v.len() != nd || energies.len() != ns || amplitudes.len() != ns {
            self.malformed.get_or_insert_with(|| {
                format!(
                    "row of step {step}: {} coordinates, {} velocities, {} energies and {} amplitudes for n_dof = {nd}, n_states = {ns}",
                    q.len(),
                    v.len(),
                    energies.len(),
                    amplitudes.len()
                )
            });
            return;
        }
        let count = |c: Option<u32>| {
            let c = c.map_or(-1, |c| i32::try_from(c).unwrap_or(i32::MAX));
            i64::from(c) as u64
        };
        let w = &mut self.words;
        w.reserve(Self::HEAD + 2 * nd + 4 * ns);
        w.extend_from_slice(&[
            step,
            time.to_bits(),
            kinetic.to_bits(),
            potential.to_bits(),
            (kinetic + potential).to_bits(),
            u64::from(active),
            count(diagnostics.iterations),
            count(diagnostics.response_iterations),
        ]);
        w.extend(q.iter().map(|x| x.to_bits()));
        w.extend(v.iter().map(|x| x.to_bits()));
        w.extend(energies.iter().map(|x| x.to_bits()));
        for a in amplitudes {
            w.extend_from_slice(&[a.re.to_bits(), a.im.to_bits()]);
        }
        let given = diagnostics.spin_squared.as_deref().unwrap_or(&[]);
        let given = &given[..given.len().min(ns)];
        w.extend(given.iter().map(|x| x.to_bits()));
        w.extend(std::iter::repeat_n(f64::NAN.to_bits(), ns - given.len()));
    }

    /// The rows as columns, in `block` (emptied first, its buffers reused).
    pub fn unpack_into(&self, block: &mut RowBlock) -> Result<(), String> {
        if let Some(m) = &self.malformed {
            return Err(m.clone());
        }
        let (nd, ns) = (self.n_dof, self.n_states);
        block.clear();
        (block.n_dof, block.n_states) = (nd, ns);
        let f = f64::from_bits;
        let int = |w: u64| w as i64 as i32;
        for row in self.words.chunks_exact(self.width()) {
            let (head, rest) = row.split_at(Self::HEAD);
            let (q, rest) = rest.split_at(nd);
            let (v, rest) = rest.split_at(nd);
            let (energies, rest) = rest.split_at(ns);
            let (amplitudes, spin) = rest.split_at(2 * ns);
            block.step.push(head[0]);
            block.time.push(f(head[1]));
            block.kinetic.push(f(head[2]));
            block.potential.push(f(head[3]));
            block.total.push(f(head[4]));
            block
                .active
                .push(u32::try_from(head[5]).unwrap_or(u32::MAX));
            block.iterations.push(int(head[6]));
            block.response_iterations.push(int(head[7]));
            block.q.extend(q.iter().map(|&x| f(x)));
            block.v.extend(v.iter().map(|&x| f(x)));
            block.energies.extend(energies.iter().map(|&x| f(x)));
            block.amplitudes.extend(
                amplitudes
                    .chunks_exact(2)
                    .map(|c| Complex64::new(f(c[0]), f(c[1]))),
            );
            block.spin_squared.extend(spin.iter().map(|&x| f(x)));
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A row of `n_dof` coordinates and `n_states` states whose every value
    /// differs, with the given diagnostics.
    fn parts(
        step: u64,
        n_dof: usize,
        n_states: usize,
    ) -> (Vec<f64>, Vec<f64>, Vec<f64>, Vec<Complex64>) {
        let x = step as f64;
        let q = (0..n_dof).map(|k| x + 0.25 * k as f64).collect();
        let v = (0..n_dof).map(|k| -x - 0.5 * k as f64).collect();
        let e = (0..n_states).map(|k| 1e-3 * x - k as f64).collect();
        let a = (0..n_states)
            .map(|k| Complex64::new(0.1 * k as f64, -x))
            .collect();
        (q, v, e, a)
    }

    // Round trip (common practice: a transposition must lose nothing): rows
    // packed and unpacked equal, bit for bit, the same rows put into the
    // columns as stored rows and stored diagnostics — signed zeros, NaN
    // payloads, missing and partial diagnostics and the largest counts
    // included.
    #[test]
    fn packed_rows_unpack_to_the_columns_bit_for_bit() {
        let (nd, ns) = (7, 3);
        let diagnostics = [
            Diagnostics::default(),
            Diagnostics {
                iterations: Some(12),
                response_iterations: Some(u32::MAX),
                spin_squared: Some(vec![0.0, 2.0, -0.0]),
                warnings: vec!["ignored here".into()],
            },
            Diagnostics {
                iterations: None,
                response_iterations: Some(3),
                spin_squared: Some(vec![f64::from_bits(0x7ff8_0000_dead_beef)]),
                warnings: vec![],
            },
        ];
        let mut packed = PackedRows::with_capacity(nd, ns, 2);
        let mut columns = RowBlock::new(nd, ns);
        for step in 0..9u64 {
            let (mut q, v, e, a) = parts(step, nd, ns);
            q[0] = if step % 2 == 0 {
                -0.0
            } else {
                f64::NEG_INFINITY
            };
            let d = &diagnostics[step as usize % 3];
            let kinetic = 0.5 + step as f64;
            packed.push(
                step,
                0.5 * step as f64,
                &q,
                &v,
                &e,
                (step % 3) as u32,
                &a,
                kinetic,
                -2.0,
                d,
            );
            let row = StepRow {
                step,
                time: 0.5 * step as f64,
                q,
                v,
                energies: e,
                active: (step % 3) as u32,
                amplitudes: a,
                kinetic,
                potential: -2.0,
                total: kinetic - 2.0,
            };
            columns.push_row(&row, &RowDiagnostics::from_backend(d, ns));
        }
        assert_eq!(packed.len(), 9);
        assert!(packed.capacity() >= 9);
        let mut out = RowBlock::new(1, 1);
        out.step.push(99); // emptied first
        packed.unpack_into(&mut out).unwrap();
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!((out.n_dof, out.n_states, out.len()), (nd, ns, 9));
        assert_eq!(out.step, columns.step);
        assert_eq!(out.active, columns.active);
        assert_eq!(out.iterations, columns.iterations);
        assert_eq!(out.response_iterations, columns.response_iterations);
        assert_eq!(out.iterations[1], 12);
        assert_eq!(out.iterations[0], -1);
        assert_eq!(out.response_iterations[1], i32::MAX);
        for (got, want) in [
            (&out.time, &columns.time),
            (&out.q, &columns.q),
            (&out.v, &columns.v),
            (&out.energies, &columns.energies),
            (&out.kinetic, &columns.kinetic),
            (&out.potential, &columns.potential),
            (&out.total, &columns.total),
            (&out.spin_squared, &columns.spin_squared),
        ] {
            assert_eq!(bits(got), bits(want));
        }
        assert_eq!(out.amplitudes, columns.amplitudes);
        // The partial <S²> list: one value given, NaN for the other two.
        assert_eq!(out.spin_squared[6].to_bits(), 0x7ff8_0000_dead_beef);
        assert!(out.spin_squared[7].is_nan() && out.spin_squared[8].is_nan());
        assert_eq!(out.spin_squared[5].to_bits(), (-0.0f64).to_bits());
        // Cleared blocks keep their buffer and unpack to nothing.
        packed.clear();
        assert!(packed.is_empty() && packed.capacity() >= 9);
        packed.unpack_into(&mut out).unwrap();
        assert!(out.is_empty());
    }

    // A row whose widths do not fit the block is not stored and makes the
    // block fail to unpack, naming the step and the widths (common practice:
    // never write a row shifted into its neighbours' columns).
    #[test]
    fn packed_rows_refuse_rows_of_the_wrong_width() {
        let (nd, ns) = (4, 2);
        let mut packed = PackedRows::with_capacity(nd, ns, 4);
        let (q, v, e, a) = parts(1, nd, ns);
        let d = Diagnostics::default();
        packed.push(1, 0.0, &q, &v, &e, 0, &a, 0.0, 0.0, &d);
        packed.push(2, 0.0, &q[..3], &v, &e, 0, &a, 0.0, 0.0, &d);
        packed.push(3, 0.0, &q, &v, &e[..1], 0, &a, 0.0, 0.0, &d);
        assert_eq!(packed.len(), 1);
        let err = packed.unpack_into(&mut RowBlock::default()).unwrap_err();
        assert!(
            err.contains("step 2") && err.contains("3 coordinates") && err.contains("n_dof = 4"),
            "{err}"
        );
    }
}
