//! HDF5 part files: the trajectories one process writes, in a layout of our
//! own that explains itself to anyone holding h5py.
//!
//! # File layout (`format` = "flipswarm-ensemble", `format_version` = 1)
//!
//! All quantities are in atomic units (bohr, hartree, electron masses, a.u.
//! of time = ħ/E_h). Every dataset carries two string attributes, `units` and
//! `description`; the root group and the `/trajectories` group carry a
//! `description` too. Strings are variable-length UTF-8 (h5py returns `str`).
//!
//! ```text
//! /                                  root group, attributes:
//!   format           str   "flipswarm-ensemble"
//!   format_version   u64   1
//!   program_version  str   flipswarm version that created the file
//!   created          str   creation time, RFC 3339 UTC
//!   config_toml      str   the full effective run configuration (TOML)
//!   n_states         u64   electronic states
//!   n_dof            u64   nuclear coordinates
//!   timestep_au      f64   nuclear time step (a.u. of time)
//!   slice_index      u64   k of the slice (k, n) of the ensemble held here
//!   slice_count      u64   n of that slice
//!   units_convention str   one sentence on the units
//!   writer_state     str   "open" while a writer has the file, "closed" after
//!                          a clean close; "open" with no live writer means
//!                          the writer was killed (see "Killed writers")
//!   description      str   what the file is
//! /masses               f64 (n_dof)          electron masses
//! /trajectory_indices   u64 (n_traj)         ensemble indices assigned to this part
//! /trajectories/        group; one subgroup per trajectory that has begun
//!   NNNNNN/             ensemble index, zero-padded to at least 6 digits; attributes:
//!     index          u64   ensemble index
//!     seed           u64   ensemble seed
//!     initial_state  u64   initial active state (0-based)
//!     status         str   "pending" | "running" | "finished" | "failed" | "stopped"
//!     end_reason     str   "time_limit" | "exit_low" | "exit_high" | "observer" | ""
//!     failure_step   i64   step at which the trajectory failed, −1 unless failed
//!     failure_reason str   why it failed, "" unless failed
//!     steps_written  u64   rows in the per-step datasets below
//!     hops_written   u64   rows in the hops/ datasets
//!     initial_positions   f64 (n_dof)
//!     initial_velocities  f64 (n_dof)
//!     time             f64 (n)              a.u. of time
//!     step             u64 (n)              step number, 0 = initial point
//!     positions        f64 (n, n_dof)       bohr (or the model's coordinates)
//!     velocities       f64 (n, n_dof)
//!     energies         f64 (n, n_states)    adiabatic energies, ascending
//!     active_state     u32 (n)
//!     amplitudes       complex128 (n, n_states)  compound {r, i} (h5py: complex)
//!     kinetic_energy   f64 (n)
//!     potential_energy f64 (n)              of the active state
//!     total_energy     f64 (n)
//!     solver_iterations   i32 (n)           back end's SCF iterations, −1 = none/not reported
//!     response_iterations i32 (n)           excited-state solver iterations, −1 = none
//!     spin_squared     f64 (n, n_states)    <S²> per state, NaN = not available
//!     warnings_written u64 attribute        rows in warnings/
//!     warnings/        non-fatal back-end warnings of every step (not only recorded ones)
//!       step           u64 (w)   step whose back-end call warned
//!       text           str (w)   the warning (variable-length UTF-8)
//!     hops/            one row per hop attempt (accepted or frustrated)
//!       step           u64 (h)   step after which the attempt happened
//!       time           f64 (h)
//!       from_state     u32 (h)
//!       to_state       u32 (h)
//!       accepted       u8  (h)   1 = hop, 0 = frustrated
//!       energy_gap     f64 (h)   E_to − E_from
//!       kinetic_before f64 (h)
//!       kinetic_after  f64 (h)
//! ```
//!
//! Files written before the diagnostics existed lack `solver_iterations`,
//! `response_iterations`, `spin_squared` and `warnings/`; readers fill −1,
//! NaN and no warnings.
//!
//! The per-step and hop datasets are chunked and extendible along their first
//! axis (chunks of up to 256 rows, fewer for very wide rows so a chunk stays
//! under 256 KiB; 64 rows for the hop and warning tables). Every dataset but
//! `warnings/text` (variable-length strings cannot be filtered) has the Fletcher-32 checksum filter, so a
//! damaged data block is reported instead of read; the file is written with
//! the HDF5 1.8 object format (checksummed metadata), readable by HDF5 ≥ 1.8.
//!
//! A writer builds one empty trajectory group (`create_trajectory`, with all
//! its datasets and attributes) in an in-memory HDF5 file the first time it
//! begins a trajectory, and copies it (H5Ocopy) for every new trajectory,
//! then writes the header (index, seed, initial state, initial positions and
//! velocities) into the copy: about half the writer's work for a trajectory
//! of a few thousand rows went into creating two dozen datasets and fifty
//! attributes one by one. The copy is the layout above, object for object.
//!
//! # Statuses
//! [`Status::Running`] is stored as "running", [`Status::Finished`] as
//! "finished" plus `end_reason`, [`Status::Failed`] as "failed" plus
//! `failure_step` and `failure_reason`. "stopped" (written by
//! [`PartWriter::mark_stopped`]: interrupted, resumable) and "pending" (a group
//! written by another tool before any step) read back as `Status::Running`;
//! [`TrajectorySummary::phase`] and [`TrajectoryData::phase`] keep the
//! distinction.
//!
//! # Killed writers
//! A writer sets `writer_state` = "open" when it creates or reopens a file and
//! "closed" in [`PartWriter::close`]. A writer that is dropped without `close`
//! (a panic, an error path, a killed process) leaves "open": the data flushed
//! so far is readable, [`PartReader::writer_state`] says "open", and [`merge`]
//! refuses the file until it has been resumed (or rerun) and closed.
//!
//! # Threads, processes and locks
//! A [`PartWriter`] is meant to be owned by a single writer thread (it is
//! `Send`, so it can be moved there); one writer per file. Writers hold the
//! HDF5 file lock (`flock`) while the file is open, so a second writer — in
//! any process — is refused. Readers take no lock: a file can be inspected
//! while it is written, at the risk of an error if it is caught mid-update.
//! A child process started while a writer has a file open inherits the lock
//! (HDF5 does not mark its descriptors close-on-exec) and holds it until it
//! exits.

use std::collections::BTreeMap;
use std::fmt;
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::time::{SystemTime, UNIX_EPOCH};

use hdf5::types::VarLenUnicode;
use hdf5::{Dataset, File, Group, H5Type, Location};
use num_complex::Complex64;

use super::record::{
    Hop, PartMeta, RowBlock, RowDiagnostics, Status, StepRow, TrajectoryHeader, WarningRow,
};
use crate::dynamics::EndReason;

/// Value of the root attribute `format`.
pub const FORMAT: &str = "flipswarm-ensemble";
/// Value of the root attribute `format_version` this module writes and reads.
pub const FORMAT_VERSION: u64 = 1;
/// Value of the root attribute `units_convention`.
pub const UNITS_CONVENTION: &str = "Atomic units throughout: lengths in bohr (or the model's own coordinates), \
energies in hartree, masses in electron masses, time in atomic units of time (hbar/E_h), velocities in bohr per atomic unit of time.";

const ROOT_DESCRIPTION: &str = "One part of a flipswarm surface-hopping ensemble: the trajectories written by one process. \
Per-trajectory data live in /trajectories/<zero-padded ensemble index>; every dataset has `units` and `description` attributes.";
const TRAJECTORIES_DESCRIPTION: &str = "One group per trajectory that has begun, named by its ensemble index zero-padded to 6 digits. \
Group attributes: index, seed, initial_state (0-based), status (pending | running | finished | failed | stopped; \
stopped = interrupted and resumable), end_reason (time_limit | exit_low | exit_high | observer, empty unless finished), \
failure_step (-1 unless failed), failure_reason (empty unless failed), steps_written and hops_written (rows in the datasets).";
const MODEL_COORDS: &str = "bohr (model coordinates: see description)";
const MODEL_VELOCITIES: &str = "bohr per a.u. of time (model coordinates: see description)";

/// Rows per chunk of the extendible datasets (at most).
const CHUNK_ROWS: usize = 256;
/// Rows per chunk of the hop datasets (hops are rare).
const HOP_CHUNK_ROWS: usize = 64;
/// Upper bound of a chunk's size in bytes.
const CHUNK_BYTES: usize = 256 * 1024;

/// Trajectories whose datasets a writer keeps open at most.
const MAX_OPEN_TRAJECTORIES: usize = 256;

/// Marks the descriptors this process holds on `path` close-on-exec. HDF5
/// opens files without `O_CLOEXEC` and a writer locks its file with
/// flock(2): a program started by this process (a library user's, or a
/// test's) would otherwise inherit the descriptor and keep the file locked
/// until it exits. Best effort: without /proc nothing happens.
pub fn close_on_exec(path: &Path) {
    let Ok(target) = std::fs::canonicalize(path) else {
        return;
    };
    let Ok(entries) = std::fs::read_dir("/proc/self/fd") else {
        return;
    };
    for entry in entries.flatten() {
        let Ok(fd) = entry.file_name().to_string_lossy().parse::<i32>() else {
            continue;
        };
        if std::fs::read_link(entry.path()).is_ok_and(|p| p == target) {
            // SAFETY: F_GETFD/F_SETFD on a descriptor number only change its
            // close-on-exec flag; an fd closed meanwhile makes them fail harmlessly.
            unsafe {
                let flags = libc::fcntl(fd, libc::F_GETFD);
                if flags >= 0 {
                    libc::fcntl(fd, libc::F_SETFD, flags | libc::FD_CLOEXEC);
                }
            }
        }
    }
}

/// Names of the writer states.
const OPEN: &str = "open";
const CLOSED: &str = "closed";

/// Errors of part files. Every message names the file and, where it applies,
/// the group or dataset and what is wrong.
#[derive(Debug, thiserror::Error)]
pub enum EnsembleError {
    /// The HDF5 library reported an error.
    #[error("{file}: {object}: {what}: {source}")]
    Hdf5 {
        file: PathBuf,
        object: String,
        what: String,
        source: hdf5::Error,
    },
    /// The file is readable HDF5 but does not hold what the layout requires.
    #[error("{file}: {object}: {what}")]
    Layout {
        file: PathBuf,
        object: String,
        what: String,
    },
    /// A caller passed data that does not fit the file.
    #[error("{file}: {object}: {what}")]
    Input {
        file: PathBuf,
        object: String,
        what: String,
    },
    /// Refused to overwrite an existing file.
    #[error("{file}: already exists; refusing to overwrite it")]
    Exists { file: PathBuf },
    /// A part whose writer never closed it (killed, or still running).
    #[error("{file}: writer_state is \"open\": the file was not closed cleanly (its writer was killed or is still running); resume that slice before merging")]
    NotClosed { file: PathBuf },
    /// Two parts that cannot belong to the same ensemble.
    #[error("{first} and {second} are parts of different ensembles: {what} differs")]
    Mismatch {
        first: PathBuf,
        second: PathBuf,
        what: String,
    },
    /// The same trajectory in two parts.
    #[error("trajectory {index} is in both {first} and {second}")]
    Duplicate {
        index: usize,
        first: PathBuf,
        second: PathBuf,
    },
    /// The merged file does not hold what was put in.
    #[error("{file}: verification after merging failed: {what}")]
    Verify { file: PathBuf, what: String },
    /// An operating-system error outside HDF5.
    #[error("{file}: {what}: {source}")]
    Io {
        file: PathBuf,
        what: String,
        source: std::io::Error,
    },
}

/// Where a trajectory stands, with the distinctions [`Status`] does not make.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Phase {
    /// Group written, no step yet ("pending").
    Pending,
    /// Being integrated, or its writer died ("running").
    Running,
    /// Interrupted on request; resumable ("stopped").
    Stopped,
    /// Ended normally ("finished").
    Finished,
    /// Ended by an error ("failed").
    Failed,
}

impl Phase {
    /// The string stored in the `status` attribute.
    pub fn as_str(self) -> &'static str {
        match self {
            Phase::Pending => "pending",
            Phase::Running => "running",
            Phase::Stopped => "stopped",
            Phase::Finished => "finished",
            Phase::Failed => "failed",
        }
    }

    fn parse(s: &str) -> Option<Self> {
        [
            Phase::Pending,
            Phase::Running,
            Phase::Stopped,
            Phase::Finished,
            Phase::Failed,
        ]
        .into_iter()
        .find(|p| p.as_str() == s)
    }
}

impl fmt::Display for Phase {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// State of the writer as recorded in the file.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum WriterState {
    /// A writer has the file, or had it and never closed it.
    Open,
    /// Closed cleanly.
    Closed,
}

impl WriterState {
    /// The string stored in `writer_state`.
    pub fn as_str(self) -> &'static str {
        match self {
            WriterState::Open => OPEN,
            WriterState::Closed => CLOSED,
        }
    }
}

/// A trajectory at a glance (reads only the one-dimensional datasets).
#[derive(Clone, Debug, PartialEq)]
pub struct TrajectorySummary {
    /// Ensemble index.
    pub index: usize,
    /// Status ("stopped" and "pending" read as `Running`).
    pub status: Status,
    /// The stored status word.
    pub phase: Phase,
    /// Rows written.
    pub steps: u64,
    /// Hop attempts written.
    pub hops: u64,
    /// Time of the last row (a.u.), if any.
    pub last_time: Option<f64>,
    /// Active state of the last row, if any.
    pub active_state: Option<u32>,
    /// max |E_tot − E_tot(first row)| over the rows (hartree); 0 without rows.
    pub max_energy_drift: f64,
    /// The failure reason of a failed trajectory.
    pub failure_reason: Option<String>,
    /// Back-end warnings written.
    pub warnings: u64,
    /// The most solver iterations of any row, if the back end reported any.
    pub max_solver_iterations: Option<i32>,
}

/// Everything stored for one trajectory.
#[derive(Clone, Debug, PartialEq)]
pub struct TrajectoryData {
    /// Where it started.
    pub header: TrajectoryHeader,
    /// One row per recorded step.
    pub rows: Vec<StepRow>,
    /// Hop attempts.
    pub hops: Vec<Hop>,
    /// Back-end diagnostics, one per row.
    pub diagnostics: Vec<RowDiagnostics>,
    /// Back-end warnings (every step, not only recorded ones).
    pub warnings: Vec<WarningRow>,
    /// Status ("stopped" and "pending" read as `Running`).
    pub status: Status,
    /// The stored status word.
    pub phase: Phase,
}

impl TrajectoryData {
    /// Its course: what [`PartReader::read_course`] reads of it.
    pub fn course(&self) -> TrajectoryCourse {
        TrajectoryCourse {
            index: self.header.index,
            initial_state: self.header.initial_state,
            status: self.status.clone(),
            step: self.rows.iter().map(|r| r.step).collect(),
            active: self.rows.iter().map(|r| r.active).collect(),
            amplitudes: self
                .rows
                .iter()
                .flat_map(|r| r.amplitudes.iter().copied())
                .collect(),
            total: self.rows.iter().map(|r| r.total).collect(),
            hops: self.hops.clone(),
        }
    }
}

/// What a run's summary needs of a trajectory, without its coordinates,
/// velocities and diagnostics (the bulk of the file).
#[derive(Clone, Debug, PartialEq)]
pub struct TrajectoryCourse {
    /// Index in the ensemble.
    pub index: usize,
    /// The state it started on.
    pub initial_state: usize,
    /// Status ("stopped" and "pending" read as `Running`).
    pub status: Status,
    /// Step number of each row.
    pub step: Vec<u64>,
    /// Active state of each row.
    pub active: Vec<u32>,
    /// Amplitudes, row-major (rows × states).
    pub amplitudes: Vec<Complex64>,
    /// Total energy of each row (hartree).
    pub total: Vec<f64>,
    /// Hop attempts.
    pub hops: Vec<Hop>,
}

/// Rows, hop attempts and warnings of a trajectory in its file.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Counts {
    /// Per-step rows.
    pub rows: u64,
    /// Hop attempts.
    pub hops: u64,
    /// Warnings.
    pub warnings: u64,
}

/// What [`merge`] wrote.
#[derive(Clone, Debug, PartialEq)]
pub struct MergeReport {
    /// The merged file.
    pub output: PathBuf,
    /// Parts read.
    pub parts: usize,
    /// Trajectory groups copied.
    pub trajectories: usize,
    /// Rows copied, all trajectories.
    pub rows: u64,
    /// Hop attempts copied, all trajectories.
    pub hops: u64,
}

// ---------------------------------------------------------------------------
// Dataset catalogue
// ---------------------------------------------------------------------------

/// Width of a dataset's rows.
#[derive(Clone, Copy)]
enum Width {
    One,
    Dof,
    States,
}

/// One dataset of the layout.
struct Spec {
    name: &'static str,
    width: Width,
    units: &'static str,
    description: &'static str,
}

const TIME: Spec = Spec {
    name: "time",
    width: Width::One,
    units: "a.u. of time",
    description: "Time of each recorded step.",
};
const STEP: Spec = Spec {
    name: "step",
    width: Width::One,
    units: "1",
    description: "Step number of each row; 0 is the initial point.",
};
const POSITIONS: Spec = Spec {
    name: "positions",
    width: Width::Dof,
    units: MODEL_COORDS,
    description: "Nuclear coordinates, one row per recorded step, one column per coordinate. Cartesian coordinates in bohr for molecules; for model Hamiltonians the model's own coordinates as defined in config_toml.",
};
const VELOCITIES: Spec = Spec {
    name: "velocities",
    width: Width::Dof,
    units: MODEL_VELOCITIES,
    description: "Nuclear velocities, one row per recorded step, one column per coordinate (time derivative of positions).",
};
const ENERGIES: Spec = Spec {
    name: "energies",
    width: Width::States,
    units: "hartree",
    description: "Adiabatic electronic energies of all tracked states in ascending order, one row per recorded step.",
};
const ACTIVE: Spec = Spec {
    name: "active_state",
    width: Width::One,
    units: "1",
    description:
        "Active (driving) electronic state of each row, 0-based index into the columns of energies.",
};
const AMPLITUDES: Spec = Spec {
    name: "amplitudes",
    width: Width::States,
    units: "1",
    description: "Electronic amplitudes in the adiabatic basis (complex: compound of real part r and imaginary part i); populations are |amplitude|^2.",
};
const KINETIC: Spec = Spec {
    name: "kinetic_energy",
    width: Width::One,
    units: "hartree",
    description: "Nuclear kinetic energy of each row.",
};
const POTENTIAL: Spec = Spec {
    name: "potential_energy",
    width: Width::One,
    units: "hartree",
    description: "Potential energy of the active state of each row.",
};
const TOTAL: Spec = Spec {
    name: "total_energy",
    width: Width::One,
    units: "hartree",
    description: "Total energy (kinetic plus active-state potential) of each row.",
};

const SOLVER_ITERATIONS: Spec = Spec {
    name: "solver_iterations",
    width: Width::One,
    units: "1",
    description: "Iterations of the back end's first iterative solver (SCF) at each row's step; -1 means none (the back end has no such solver or did not report it).",
};
const RESPONSE_ITERATIONS: Spec = Spec {
    name: "response_iterations",
    width: Width::One,
    units: "1",
    description:
        "Iterations of the back end's excited-state eigensolver at each row's step; -1 means none.",
};
const SPIN_SQUARED: Spec = Spec {
    name: "spin_squared",
    width: Width::States,
    units: "hbar^2",
    description: "Spin expectation value <S^2> of each state (columns as in energies) at each row's step; NaN means not available from the back end.",
};

/// The per-step datasets, in the order they are written.
const ROW_SPECS: [&Spec; 13] = [
    &TIME,
    &STEP,
    &POSITIONS,
    &VELOCITIES,
    &ENERGIES,
    &ACTIVE,
    &AMPLITUDES,
    &KINETIC,
    &POTENTIAL,
    &TOTAL,
    &SOLVER_ITERATIONS,
    &RESPONSE_ITERATIONS,
    &SPIN_SQUARED,
];

const WARN_STEP: Spec = Spec {
    name: "step",
    width: Width::One,
    units: "1",
    description: "Step whose back-end call issued the warning.",
};
const WARN_TEXT: Spec = Spec {
    name: "text",
    width: Width::One,
    units: "text",
    description: "The back end's warning (variable-length UTF-8).",
};
/// Rows per chunk of the warning table.
const WARN_CHUNK_ROWS: usize = 64;

const HOP_STEP: Spec = Spec {
    name: "step",
    width: Width::One,
    units: "1",
    description: "Step after which the hop attempt happened.",
};
const HOP_TIME: Spec = Spec {
    name: "time",
    width: Width::One,
    units: "a.u. of time",
    description: "Time of the hop attempt.",
};
const HOP_FROM: Spec = Spec {
    name: "from_state",
    width: Width::One,
    units: "1",
    description: "Active state before the attempt (0-based).",
};
const HOP_TO: Spec = Spec {
    name: "to_state",
    width: Width::One,
    units: "1",
    description: "Target state of the attempt (0-based).",
};
const HOP_ACCEPTED: Spec = Spec {
    name: "accepted",
    width: Width::One,
    units: "1",
    description: "1 if the hop happened, 0 if it was frustrated (not enough kinetic energy).",
};
const HOP_GAP: Spec = Spec {
    name: "energy_gap",
    width: Width::One,
    units: "hartree",
    description: "E(to_state) - E(from_state) at the attempt.",
};
const HOP_KIN_BEFORE: Spec = Spec {
    name: "kinetic_before",
    width: Width::One,
    units: "hartree",
    description: "Nuclear kinetic energy before the attempt.",
};
const HOP_KIN_AFTER: Spec = Spec {
    name: "kinetic_after",
    width: Width::One,
    units: "hartree",
    description: "Nuclear kinetic energy after the hop, or after the frustrated-hop treatment.",
};

/// The hop datasets (inside `hops/`), in the order they are written.
const HOP_SPECS: [&Spec; 8] = [
    &HOP_STEP,
    &HOP_TIME,
    &HOP_FROM,
    &HOP_TO,
    &HOP_ACCEPTED,
    &HOP_GAP,
    &HOP_KIN_BEFORE,
    &HOP_KIN_AFTER,
];

// ---------------------------------------------------------------------------
// Error context
// ---------------------------------------------------------------------------

/// Which file an operation is about; builds errors that name it.
#[derive(Clone, Copy)]
struct Ctx<'a>(&'a Path);

impl<'a> Ctx<'a> {
    fn h5(self, object: &str, what: &str) -> impl FnOnce(hdf5::Error) -> EnsembleError + 'a {
        let (object, what) = (object.to_string(), what.to_string());
        move |source| EnsembleError::Hdf5 {
            file: self.0.to_path_buf(),
            object,
            what,
            source,
        }
    }

    fn layout(self, object: &str, what: impl Into<String>) -> EnsembleError {
        EnsembleError::Layout {
            file: self.0.to_path_buf(),
            object: object.to_string(),
            what: what.into(),
        }
    }

    fn input(self, object: &str, what: impl Into<String>) -> EnsembleError {
        EnsembleError::Input {
            file: self.0.to_path_buf(),
            object: object.to_string(),
            what: what.into(),
        }
    }
}

/// The group name of trajectory `index`.
fn group_name(index: usize) -> String {
    format!("{index:06}")
}

/// The full path of trajectory `index`'s group, for messages.
fn group_path(index: usize) -> String {
    format!("/trajectories/{}", group_name(index))
}

// ---------------------------------------------------------------------------
// Attributes
// ---------------------------------------------------------------------------

fn vlen(cx: Ctx, object: &str, name: &str, value: &str) -> Result<VarLenUnicode, EnsembleError> {
    VarLenUnicode::from_str(value)
        .map_err(|e| cx.input(object, format!("attribute `{name}`: cannot be stored: {e}")))
}

/// Writes (creating or overwriting) a scalar attribute.
fn put_attr<T: H5Type>(
    cx: Ctx,
    loc: &Location,
    object: &str,
    name: &str,
    value: &T,
) -> Result<(), EnsembleError> {
    let what = format!("writing attribute `{name}`");
    // Opening the attribute (an error when it is absent) costs one lookup;
    // listing the object's attributes would cost one per attribute.
    if let Ok(attr) = loc.attr(name) {
        if attr.dtype().map_err(cx.h5(object, &what))?.is::<T>() {
            return attr.write_scalar(value).map_err(cx.h5(object, &what));
        }
        drop(attr);
        loc.delete_attr(name).map_err(cx.h5(object, &what))?;
    }
    loc.new_attr::<T>()
        .shape(())
        .create(name)
        .map_err(cx.h5(object, &what))?
        .write_scalar(value)
        .map_err(cx.h5(object, &what))
}

fn put_str(
    cx: Ctx,
    loc: &Location,
    object: &str,
    name: &str,
    value: &str,
) -> Result<(), EnsembleError> {
    put_attr(cx, loc, object, name, &vlen(cx, object, name, value)?)
}

fn get_attr<T: H5Type>(
    cx: Ctx,
    loc: &Location,
    object: &str,
    name: &str,
) -> Result<T, EnsembleError> {
    let what = format!("reading attribute `{name}`");
    let attr = loc
        .attr(name)
        .map_err(|_| cx.layout(object, format!("attribute `{name}` is missing")))?;
    attr.read_scalar::<T>().map_err(cx.h5(object, &what))
}

fn get_str(cx: Ctx, loc: &Location, object: &str, name: &str) -> Result<String, EnsembleError> {
    Ok(get_attr::<VarLenUnicode>(cx, loc, object, name)?
        .as_str()
        .to_string())
}

/// An optional count attribute (absent in files that predate it: 0).
fn get_opt_usize(
    cx: Ctx,
    loc: &Location,
    object: &str,
    name: &str,
) -> Result<usize, EnsembleError> {
    if loc
        .attr_names()
        .map_err(cx.h5(object, "listing attributes"))?
        .iter()
        .any(|n| n == name)
    {
        get_usize(cx, loc, object, name)
    } else {
        Ok(0)
    }
}

fn get_usize(cx: Ctx, loc: &Location, object: &str, name: &str) -> Result<usize, EnsembleError> {
    let v = get_attr::<u64>(cx, loc, object, name)?;
    usize::try_from(v).map_err(|_| {
        cx.layout(
            object,
            format!("attribute `{name}` = {v} does not fit this machine"),
        )
    })
}

// ---------------------------------------------------------------------------
// Datasets
// ---------------------------------------------------------------------------

fn row_width(spec: &Spec, n_dof: usize, n_states: usize) -> usize {
    match spec.width {
        Width::One => 1,
        Width::Dof => n_dof,
        Width::States => n_states,
    }
}

/// Rows per chunk for rows of `width` elements of `elem` bytes.
fn chunk_rows(width: usize, elem: usize) -> usize {
    (CHUNK_BYTES / (width.max(1) * elem.max(1))).clamp(1, CHUNK_ROWS)
}

fn label(cx: Ctx, ds: &Dataset, object: &str, spec: &Spec) -> Result<(), EnsembleError> {
    put_str(cx, ds, object, "units", spec.units)?;
    put_str(cx, ds, object, "description", spec.description)
}

/// Creates an extendible dataset with zero rows.
fn create_series<T: H5Type>(
    cx: Ctx,
    group: &Group,
    parent: &str,
    spec: &Spec,
    width: usize,
    max_rows: usize,
) -> Result<Dataset, EnsembleError> {
    let object = format!("{parent}/{}", spec.name);
    let rows = chunk_rows(width, std::mem::size_of::<T>()).min(max_rows);
    // HDF5 cannot checksum variable-length data (the strings live on its heap).
    let varlen = matches!(
        T::type_descriptor(),
        hdf5::types::TypeDescriptor::VarLenUnicode | hdf5::types::TypeDescriptor::VarLenAscii
    );
    // No fill values for fixed-size data: every row is written before it is
    // counted (`steps_written`), so zero-filling new chunks first is wasted
    // work (HDF5 requires them for variable-length data).
    let builder = if varlen {
        group.new_dataset::<T>()
    } else {
        group
            .new_dataset::<T>()
            .fill_time(hdf5::plist::dataset_create::FillTime::Never)
            .fletcher32()
    };
    let made = if matches!(spec.width, Width::One) {
        builder.chunk(rows).shape(0..).create(spec.name)
    } else {
        builder
            .chunk((rows, width))
            .shape((0.., width))
            .create(spec.name)
    };
    let ds = made.map_err(cx.h5(&object, "creating dataset"))?;
    label(cx, &ds, &object, spec)?;
    Ok(ds)
}

/// Creates a fixed one-dimensional dataset holding `data` (at least one element).
fn create_fixed<T: H5Type>(
    cx: Ctx,
    group: &Group,
    parent: &str,
    spec: &Spec,
    data: &[T],
) -> Result<(), EnsembleError> {
    let object = format!("{parent}/{}", spec.name);
    let ds = group
        .new_dataset::<T>()
        .fletcher32()
        .chunk(data.len().max(1))
        .shape(data.len())
        .create(spec.name)
        .map_err(cx.h5(&object, "creating dataset"))?;
    ds.write_raw(data).map_err(cx.h5(&object, "writing"))?;
    label(cx, &ds, &object, spec)
}

fn open_ds(cx: Ctx, group: &Group, parent: &str, name: &str) -> Result<Dataset, EnsembleError> {
    group
        .dataset(name)
        .map_err(|_| cx.layout(&format!("{parent}/{name}"), "dataset is missing"))
}

/// Appends `data` (rows of `width` elements, row-major) at row `start`.
fn append_rows<T: H5Type>(
    cx: Ctx,
    ds: &Dataset,
    object: &str,
    start: usize,
    width: usize,
    data: &[T],
) -> Result<(), EnsembleError> {
    let n = data.len() / width.max(1);
    if n == 0 {
        return Ok(());
    }
    let end = start + n;
    if width == 1 && ds.ndim() == 1 {
        ds.resize(end).map_err(cx.h5(object, "extending"))?;
        return ds
            .write_slice(data, start..end)
            .map_err(cx.h5(object, "writing rows"));
    }
    ds.resize((end, width))
        .map_err(cx.h5(object, "extending"))?;
    // One block write for all rows (the bindings take 2-D blocks as ndarray views).
    let block = ndarray::ArrayView2::from_shape((n, width), &data[..n * width])
        .map_err(|e| cx.layout(object, format!("row block of {n}×{width}: {e}")))?;
    ds.write_slice(&block, (start..end, ..))
        .map_err(cx.h5(object, "writing rows"))
}

/// Number of rows of a dataset.
fn n_rows(ds: &Dataset) -> u64 {
    ds.shape().first().copied().unwrap_or(0) as u64
}

/// Reads a whole dataset, checking its shape is (rows) or (rows, width).
fn read_rows<T: H5Type>(
    cx: Ctx,
    ds: &Dataset,
    object: &str,
    rows: usize,
    width: Option<usize>,
) -> Result<Vec<T>, EnsembleError> {
    read_rows_from(cx, ds, object, rows, width, false)
}

/// With `prefix`, a dataset longer than `rows` is accepted and its first
/// `rows` rows are returned (files of killed writers, see
/// [`PartReader::read_prefix`]).
fn read_rows_from<T: H5Type>(
    cx: Ctx,
    ds: &Dataset,
    object: &str,
    rows: usize,
    width: Option<usize>,
    prefix: bool,
) -> Result<Vec<T>, EnsembleError> {
    let shape = ds.shape();
    if prefix {
        let w = width.unwrap_or(1);
        let ok = match width {
            None => shape.len() == 1 && shape[0] >= rows,
            Some(w) => shape.len() == 2 && shape[0] >= rows && shape[1] == w,
        };
        if !ok {
            return Err(cx.layout(
                object,
                format!("has shape {shape:?}, expected at least {rows} rows of width {w}"),
            ));
        }
        if !ds
            .dtype()
            .map_err(cx.h5(object, "reading the type"))?
            .is::<T>()
        {
            return Err(cx.layout(
                object,
                format!(
                    "has an unexpected element type (expected {})",
                    std::any::type_name::<T>()
                ),
            ));
        }
        let mut all = ds.read_raw::<T>().map_err(cx.h5(object, "reading"))?;
        all.truncate(rows * w);
        return Ok(all);
    }
    let expected: Vec<usize> = match width {
        None => vec![rows],
        Some(w) => vec![rows, w],
    };
    if shape != expected {
        return Err(cx.layout(
            object,
            format!("has shape {shape:?}, expected {expected:?}"),
        ));
    }
    if !ds
        .dtype()
        .map_err(cx.h5(object, "reading the type"))?
        .is::<T>()
    {
        return Err(cx.layout(
            object,
            format!(
                "has an unexpected element type (expected {})",
                std::any::type_name::<T>()
            ),
        ));
    }
    ds.read_raw::<T>().map_err(cx.h5(object, "reading"))
}

// ---------------------------------------------------------------------------
// Status
// ---------------------------------------------------------------------------

fn end_reason_str(r: EndReason) -> &'static str {
    match r {
        EndReason::TimeLimit => "time_limit",
        EndReason::ExitLow => "exit_low",
        EndReason::ExitHigh => "exit_high",
        EndReason::Observer => "observer",
    }
}

fn parse_end_reason(s: &str) -> Option<EndReason> {
    [
        EndReason::TimeLimit,
        EndReason::ExitLow,
        EndReason::ExitHigh,
        EndReason::Observer,
    ]
    .into_iter()
    .find(|r| end_reason_str(*r) == s)
}

/// The attribute values of a status: (status word, end_reason, failure_step, failure_reason).
fn status_attrs(status: &Status) -> (Phase, &'static str, i64, &str) {
    match status {
        Status::Running => (Phase::Running, "", -1, ""),
        Status::Finished(r) => (Phase::Finished, end_reason_str(*r), -1, ""),
        Status::Failed { step, reason } => (
            Phase::Failed,
            "",
            i64::try_from(*step).unwrap_or(i64::MAX),
            reason.as_str(),
        ),
    }
}

fn write_status(
    cx: Ctx,
    g: &Group,
    object: &str,
    status: &Status,
    phase: Phase,
) -> Result<(), EnsembleError> {
    let (_, end, step, reason) = status_attrs(status);
    put_str(cx, g, object, "status", phase.as_str())?;
    put_str(cx, g, object, "end_reason", end)?;
    put_attr(cx, g, object, "failure_step", &step)?;
    put_str(cx, g, object, "failure_reason", reason)
}

fn read_status(cx: Ctx, g: &Group, object: &str) -> Result<(Status, Phase), EnsembleError> {
    let word = get_str(cx, g, object, "status")?;
    let phase = Phase::parse(&word).ok_or_else(|| cx.layout(object, format!("attribute `status` = {word:?} is not one of pending, running, finished, failed, stopped")))?;
    let status = match phase {
        Phase::Pending | Phase::Running | Phase::Stopped => Status::Running,
        Phase::Finished => {
            let r = get_str(cx, g, object, "end_reason")?;
            Status::Finished(parse_end_reason(&r).ok_or_else(|| {
                cx.layout(
                    object,
                    format!("attribute `end_reason` = {r:?} is not a known end reason"),
                )
            })?)
        }
        Phase::Failed => {
            let step = get_attr::<i64>(cx, g, object, "failure_step")?;
            let step = u64::try_from(step).map_err(|_| {
                cx.layout(
                    object,
                    format!("attribute `failure_step` = {step} on a failed trajectory"),
                )
            })?;
            Status::Failed {
                step,
                reason: get_str(cx, g, object, "failure_reason")?,
            }
        }
    };
    Ok((status, phase))
}

// ---------------------------------------------------------------------------
// Meta
// ---------------------------------------------------------------------------

fn check_meta(cx: Ctx, meta: &PartMeta) -> Result<(), EnsembleError> {
    let bad = |what: String| Err(cx.input("/", what));
    if meta.n_states == 0 || meta.n_dof == 0 {
        return bad(format!(
            "n_states = {} and n_dof = {} must both be at least 1",
            meta.n_states, meta.n_dof
        ));
    }
    if meta.masses.len() != meta.n_dof {
        return bad(format!(
            "{} masses for n_dof = {}",
            meta.masses.len(),
            meta.n_dof
        ));
    }
    if meta.slice.0 >= meta.slice.1 {
        return bad(format!(
            "slice ({}, {}) needs k < n",
            meta.slice.0, meta.slice.1
        ));
    }
    if meta.trajectories.windows(2).any(|w| w[0] >= w[1]) {
        return bad("trajectory indices must be strictly ascending".into());
    }
    Ok(())
}

fn write_meta(cx: Ctx, file: &File, meta: &PartMeta) -> Result<(), EnsembleError> {
    let u = |v: usize| v as u64;
    put_str(cx, file, "/", "format", FORMAT)?;
    put_attr(cx, file, "/", "format_version", &FORMAT_VERSION)?;
    put_str(cx, file, "/", "program_version", &meta.program_version)?;
    put_str(cx, file, "/", "created", &meta.created)?;
    put_str(cx, file, "/", "config_toml", &meta.config_toml)?;
    put_attr(cx, file, "/", "n_states", &u(meta.n_states))?;
    put_attr(cx, file, "/", "n_dof", &u(meta.n_dof))?;
    put_attr(cx, file, "/", "timestep_au", &meta.timestep_au)?;
    put_attr(cx, file, "/", "slice_index", &u(meta.slice.0))?;
    put_attr(cx, file, "/", "slice_count", &u(meta.slice.1))?;
    put_str(cx, file, "/", "units_convention", UNITS_CONVENTION)?;
    put_str(cx, file, "/", "description", ROOT_DESCRIPTION)?;
    put_str(cx, file, "/", "writer_state", OPEN)?;
    let masses = Spec { name: "masses", width: Width::Dof, units: "electron masses", description: "Mass of each nuclear coordinate (one value per coordinate, so an atom's mass appears three times)." };
    create_fixed(cx, file, "", &masses, &meta.masses)?;
    let indices: Vec<u64> = meta.trajectories.iter().map(|&i| i as u64).collect();
    let spec = Spec { name: "trajectory_indices", width: Width::One, units: "1", description: "Ensemble indices of the trajectories assigned to this part, ascending; groups in /trajectories exist for those that have begun." };
    let object = "/trajectory_indices";
    let ds = file
        .new_dataset::<u64>()
        .fletcher32()
        .chunk(CHUNK_ROWS)
        .shape(0..)
        .create(spec.name)
        .map_err(cx.h5(object, "creating dataset"))?;
    append_rows(cx, &ds, object, 0, 1, &indices)?;
    label(cx, &ds, object, &spec)?;
    let traj = file
        .create_group("trajectories")
        .map_err(cx.h5("/trajectories", "creating group"))?;
    put_str(
        cx,
        &traj,
        "/trajectories",
        "description",
        TRAJECTORIES_DESCRIPTION,
    )
}

fn check_format(cx: Ctx, file: &File) -> Result<(), EnsembleError> {
    let format = get_attr::<VarLenUnicode>(cx, file, "/", "format").map_err(|_| cx.layout("/", format!("not a part file: the root attribute `format` = {FORMAT:?} is missing or unreadable")))?;
    if format.as_str() != FORMAT {
        return Err(cx.layout(
            "/",
            format!(
                "attribute `format` = {:?}, expected {FORMAT:?}",
                format.as_str()
            ),
        ));
    }
    let version = get_attr::<u64>(cx, file, "/", "format_version")?;
    if version != FORMAT_VERSION {
        return Err(cx.layout("/", format!("format_version {version} is not supported (this program reads version {FORMAT_VERSION})")));
    }
    Ok(())
}

fn read_meta(cx: Ctx, file: &File) -> Result<PartMeta, EnsembleError> {
    check_format(cx, file)?;
    let n_dof = get_usize(cx, file, "/", "n_dof")?;
    let n_states = get_usize(cx, file, "/", "n_states")?;
    let masses = read_rows::<f64>(
        cx,
        &open_ds(cx, file, "", "masses")?,
        "/masses",
        n_dof,
        None,
    )?;
    let ids_ds = open_ds(cx, file, "", "trajectory_indices")?;
    let ids = read_rows::<u64>(
        cx,
        &ids_ds,
        "/trajectory_indices",
        n_rows(&ids_ds) as usize,
        None,
    )?;
    let trajectories = ids
        .iter()
        .map(|&i| {
            usize::try_from(i).map_err(|_| {
                cx.layout(
                    "/trajectory_indices",
                    format!("index {i} does not fit this machine"),
                )
            })
        })
        .collect::<Result<Vec<_>, _>>()?;
    let meta = PartMeta {
        config_toml: get_str(cx, file, "/", "config_toml")?,
        program_version: get_str(cx, file, "/", "program_version")?,
        created: get_str(cx, file, "/", "created")?,
        n_states,
        n_dof,
        masses,
        slice: (
            get_usize(cx, file, "/", "slice_index")?,
            get_usize(cx, file, "/", "slice_count")?,
        ),
        trajectories,
        timestep_au: get_attr::<f64>(cx, file, "/", "timestep_au")?,
    };
    check_meta(cx, &meta).map_err(|e| match e {
        EnsembleError::Input { file, object, what } => EnsembleError::Layout { file, object, what },
        other => other,
    })?;
    Ok(meta)
}

/// Ensemble indices of the groups under `/trajectories`, ascending.
fn list_groups(cx: Ctx, file: &File) -> Result<Vec<usize>, EnsembleError> {
    let traj = file
        .group("trajectories")
        .map_err(|_| cx.layout("/trajectories", "group is missing"))?;
    let names = traj
        .member_names()
        .map_err(cx.h5("/trajectories", "listing members"))?;
    let mut out = names
        .iter()
        .map(|n| {
            n.parse::<usize>().map_err(|_| {
                cx.layout(
                    "/trajectories",
                    format!("member {n:?} is not a zero-padded trajectory index"),
                )
            })
        })
        .collect::<Result<Vec<_>, _>>()?;
    out.sort_unstable();
    Ok(out)
}

/// Current time, RFC 3339 UTC with seconds.
pub fn now_rfc3339() -> String {
    let secs = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0);
    let (days, rem) = ((secs / 86_400) as i64, secs % 86_400);
    // Civil date from days since 1970-01-01 (proleptic Gregorian calendar).
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        rem / 60 % 60,
        rem % 60
    )
}

// ---------------------------------------------------------------------------
// Writer
// ---------------------------------------------------------------------------

/// Writes one part file. Owned by a single writer thread; see the module docs.
#[derive(Debug)]
pub struct PartWriter {
    path: PathBuf,
    file: File,
    meta: PartMeta,
    fault: FaultInjector,
    /// The per-step datasets of the trajectories being written, kept open
    /// so that their chunk caches hold the last, partly filled chunk (no
    /// read-back and re-checksum of it at the next append).
    open: std::collections::HashMap<usize, Vec<Dataset>>,
    /// An empty trajectory group, built once in an in-memory file and
    /// copied for every new trajectory (one H5Ocopy instead of two dozen
    /// dataset and fifty attribute creations).
    /// (None: not built yet; Some(None): not copyable, see
    /// `compact_attributes`.)
    template: Option<Option<(File, Group)>>,
    /// What the file holds of each trajectory written to in this session
    /// (rows, hop attempts, warnings), so that an append does not open
    /// three datasets to count them; forgotten whenever anything but a
    /// successful append changes a trajectory.
    counts: std::collections::HashMap<usize, Counts>,
}

impl PartWriter {
    /// Creates a new part file; refuses to overwrite an existing one.
    pub fn create(path: &Path, meta: &PartMeta) -> Result<Self, EnsembleError> {
        let cx = Ctx(path);
        check_meta(cx, meta)?;
        if path.exists() {
            return Err(EnsembleError::Exists {
                file: path.to_path_buf(),
            });
        }
        let file = File::with_options()
            .with_fapl(|p| p.libver_v18())
            .create_excl(path)
            .map_err(|e| {
                if path.exists() {
                    EnsembleError::Exists {
                        file: path.to_path_buf(),
                    }
                } else {
                    cx.h5("/", "creating the file")(e)
                }
            })?;
        close_on_exec(path);
        write_meta(cx, &file, meta)?;
        let writer = PartWriter {
            path: path.to_path_buf(),
            file,
            meta: meta.clone(),
            fault: FaultInjector::from_env(),
            open: Default::default(),
            template: None,
            counts: Default::default(),
        };
        writer.file.flush().map_err(cx.h5("/", "flushing"))?;
        Ok(writer)
    }

    /// Reopens a part file for writing (to resume it), whatever its
    /// `writer_state`, and sets `writer_state` = "open".
    pub fn open_existing(path: &Path) -> Result<(Self, PartMeta), EnsembleError> {
        let cx = Ctx(path);
        if !path.exists() {
            return Err(cx.input("/", "no such file"));
        }
        let file = File::open_rw(path)
            .map_err(cx.h5("/", "opening for writing (is another process writing it?)"))?;
        close_on_exec(path);
        let meta = read_meta(cx, &file)?;
        list_groups(cx, &file)?;
        put_str(cx, &file, "/", "writer_state", OPEN)?;
        file.flush().map_err(cx.h5("/", "flushing"))?;
        Ok((
            PartWriter {
                path: path.to_path_buf(),
                file,
                meta: meta.clone(),
                fault: FaultInjector::from_env(),
                open: Default::default(),
                template: None,
                counts: Default::default(),
            },
            meta,
        ))
    }

    /// The file's metadata.
    pub fn meta(&self) -> &PartMeta {
        &self.meta
    }

    /// The file's path.
    pub fn path(&self) -> &Path {
        &self.path
    }

    fn cx(&self) -> Ctx<'_> {
        Ctx(&self.path)
    }

    fn group(&self, index: usize) -> Result<Group, EnsembleError> {
        self.file
            .group(&format!("trajectories/{}", group_name(index)))
            .map_err(|_| {
                self.cx().input(
                    &group_path(index),
                    "no such trajectory in this file (begin it first)",
                )
            })
    }

    /// Starts (or restarts, on resume) trajectory `header.index`: creates its
    /// group if absent and sets its status to "running". An existing group
    /// must have the same header, bit for bit.
    pub fn begin(&mut self, header: &TrajectoryHeader) -> Result<(), EnsembleError> {
        let cx = Ctx(&self.path);
        let object = group_path(header.index);
        if self.meta.trajectories.binary_search(&header.index).is_err() {
            return Err(cx.input(
                &object,
                "this trajectory is not assigned to this part (see /trajectory_indices)",
            ));
        }
        for (name, v) in [
            ("initial positions", &header.q0),
            ("initial velocities", &header.v0),
        ] {
            if v.len() != self.meta.n_dof {
                return Err(cx.input(
                    &object,
                    format!("{} {name} for n_dof = {}", v.len(), self.meta.n_dof),
                ));
            }
        }
        if header.initial_state >= self.meta.n_states {
            return Err(cx.input(
                &object,
                format!(
                    "initial state {} for n_states = {}",
                    header.initial_state, self.meta.n_states
                ),
            ));
        }
        let traj = self
            .file
            .group("trajectories")
            .map_err(cx.h5("/trajectories", "opening"))?;
        let g = if traj.link_exists(&group_name(header.index)) {
            let g = self.group(header.index)?;
            let stored = read_header(cx, &g, &object, header.index, self.meta.n_dof)?;
            if &stored != header {
                return Err(cx.input(
                    &object,
                    "exists with a different header (seed, initial state or initial conditions)",
                ));
            }
            g
        } else {
            let g = copy_template(cx, &mut self.template, &self.meta, &traj, header)?;
            self.counts.insert(header.index, Counts::default());
            g
        };
        write_status(cx, &g, &object, &Status::Running, Phase::Running)
    }

    /// Appends rows and hop attempts to trajectory `index` (diagnostics
    /// "none", no warnings). All rows are checked before anything is written.
    pub fn append(
        &mut self,
        index: usize,
        rows: &[StepRow],
        hops: &[Hop],
    ) -> Result<(), EnsembleError> {
        self.append_all(index, rows, &[], hops, &[])
    }

    /// Appends rows with their diagnostics (empty: "none" for every row),
    /// hop attempts and warnings. Everything is checked before anything is written.
    pub fn append_all(
        &mut self,
        index: usize,
        rows: &[StepRow],
        diagnostics: &[RowDiagnostics],
        hops: &[Hop],
        warnings: &[WarningRow],
    ) -> Result<(), EnsembleError> {
        let cx = self.cx();
        let object = group_path(index);
        let (n_dof, n_states) = (self.meta.n_dof, self.meta.n_states);
        check_rows(cx, &object, rows, n_dof, n_states)?;
        if !diagnostics.is_empty() && diagnostics.len() != rows.len() {
            return Err(cx.input(
                &object,
                format!("{} diagnostics for {} rows", diagnostics.len(), rows.len()),
            ));
        }
        if let Some(k) = diagnostics
            .iter()
            .position(|d| d.spin_squared.len() != n_states)
        {
            return Err(cx.input(
                &object,
                format!(
                    "diagnostics {k} of the batch: {} <S^2> values for n_states = {n_states}",
                    diagnostics[k].spin_squared.len()
                ),
            ));
        }
        let mut block = RowBlock::new(n_dof, n_states);
        let none = RowDiagnostics::none(n_states);
        for (k, r) in rows.iter().enumerate() {
            block.push_row(r, diagnostics.get(k).unwrap_or(&none));
        }
        self.append_block(index, &block, hops, warnings)
    }

    /// Appends a block of rows (columns, see [`RowBlock`]), hop attempts and
    /// warnings. Everything is checked before anything is written; the
    /// counts attributes are written last.
    pub fn append_block(
        &mut self,
        index: usize,
        block: &RowBlock,
        hops: &[Hop],
        warnings: &[WarningRow],
    ) -> Result<(), EnsembleError> {
        let cx = Ctx(&self.path);
        let object = group_path(index);
        let (n_dof, n_states) = (self.meta.n_dof, self.meta.n_states);
        check_block(cx, &object, block, n_dof, n_states)?;
        let hop_cols = hop_columns(cx, &object, hops, n_states)?;
        let g = self.group(index)?;
        let c = match self.counts.remove(&index) {
            Some(c) => c,
            None => self.all_counts(index)?,
        };
        if !block.is_empty() {
            if !self.open.contains_key(&index) {
                if self.open.len() >= MAX_OPEN_TRAJECTORIES {
                    self.open.clear();
                }
                self.open.insert(index, open_row_sets(cx, &g, &object)?);
            }
            let sets = &self.open[&index];
            write_block(cx, sets, &object, c.rows as usize, block, &mut self.fault)?;
            put_attr(
                cx,
                &g,
                &object,
                "steps_written",
                &(c.rows + block.len() as u64),
            )?;
        }
        if !hops.is_empty() {
            self.fault.charge(cx, &format!("{object}/hops"))?;
            write_hop_columns(cx, &g, &object, c.hops as usize, &hop_cols)?;
            put_attr(
                cx,
                &g,
                &object,
                "hops_written",
                &(c.hops + hops.len() as u64),
            )?;
        }
        if !warnings.is_empty() {
            write_warnings(
                cx,
                &g,
                &object,
                c.warnings as usize,
                warnings,
                &mut self.fault,
            )?;
            put_attr(
                cx,
                &g,
                &object,
                "warnings_written",
                &(c.warnings + warnings.len() as u64),
            )?;
        }
        // Only a complete append is remembered (an error above leaves the
        // count to be read from the file again).
        self.counts.insert(
            index,
            Counts {
                rows: c.rows + block.len() as u64,
                hops: c.hops + hops.len() as u64,
                warnings: c.warnings + warnings.len() as u64,
            },
        );
        Ok(())
    }

    /// Discards everything written after the first `rows` rows and `hops`
    /// hop attempts of trajectory `index` (back to a checkpoint); warnings are kept.
    pub fn truncate(&mut self, index: usize, rows: u64, hops: u64) -> Result<(), EnsembleError> {
        let warnings = self.all_counts(index)?.warnings;
        self.truncate_all(
            index,
            Counts {
                rows,
                hops,
                warnings,
            },
        )
    }

    /// Discards everything beyond `keep` (rows, hop attempts, warnings) of trajectory `index`.
    pub fn truncate_all(&mut self, index: usize, keep: Counts) -> Result<(), EnsembleError> {
        self.open.remove(&index);
        self.counts.remove(&index);
        let cx = self.cx();
        let object = group_path(index);
        let g = self.group(index)?;
        let (n_dof, n_states) = (self.meta.n_dof, self.meta.n_states);
        let present = |s: &&&Spec| g.link_exists(s.name);
        truncate_group(
            cx,
            &g,
            &object,
            ROW_SPECS
                .iter()
                .filter(present)
                .map(|s| (s.name, row_width(s, n_dof, n_states), s.width)),
            keep.rows,
        )?;
        let hg = g
            .group("hops")
            .map_err(|_| cx.layout(&format!("{object}/hops"), "group is missing"))?;
        truncate_group(
            cx,
            &hg,
            &format!("{object}/hops"),
            HOP_SPECS.iter().map(|s| (s.name, 1, s.width)),
            keep.hops,
        )?;
        if g.link_exists("warnings") {
            let wg = g
                .group("warnings")
                .map_err(cx.h5(&format!("{object}/warnings"), "opening group"))?;
            truncate_group(
                cx,
                &wg,
                &format!("{object}/warnings"),
                [&WARN_STEP, &WARN_TEXT]
                    .into_iter()
                    .map(|s| (s.name, 1, s.width)),
                keep.warnings,
            )?;
            put_attr(cx, &g, &object, "warnings_written", &keep.warnings)?;
        }
        put_attr(cx, &g, &object, "steps_written", &keep.rows)?;
        put_attr(cx, &g, &object, "hops_written", &keep.hops)
    }

    /// Records the status of trajectory `index`.
    pub fn set_status(&mut self, index: usize, status: &Status) -> Result<(), EnsembleError> {
        if !matches!(status, Status::Running) {
            self.open.remove(&index);
            self.counts.remove(&index);
        }
        let g = self.group(index)?;
        write_status(
            self.cx(),
            &g,
            &group_path(index),
            status,
            status_attrs(status).0,
        )
    }

    /// Marks trajectory `index` "stopped": interrupted, resumable. Reads
    /// back as `Status::Running` with [`Phase::Stopped`].
    pub fn mark_stopped(&mut self, index: usize) -> Result<(), EnsembleError> {
        self.open.remove(&index);
        self.counts.remove(&index);
        let g = self.group(index)?;
        write_status(
            self.cx(),
            &g,
            &group_path(index),
            &Status::Running,
            Phase::Stopped,
        )
    }

    /// Rows and hop attempts written for trajectory `index` (the lengths of
    /// `time` and `hops/step`).
    pub fn counts(&self, index: usize) -> Result<(u64, u64), EnsembleError> {
        let cx = self.cx();
        let object = group_path(index);
        let g = self.group(index)?;
        let rows = n_rows(&open_ds(cx, &g, &object, TIME.name)?);
        let hg = g
            .group("hops")
            .map_err(|_| cx.layout(&format!("{object}/hops"), "group is missing"))?;
        let hops = n_rows(&open_ds(cx, &hg, &format!("{object}/hops"), HOP_STEP.name)?);
        Ok((rows, hops))
    }

    /// Rows, hop attempts and warnings written for trajectory `index` (the
    /// lengths of `time`, `hops/step` and `warnings/step`).
    pub fn all_counts(&self, index: usize) -> Result<Counts, EnsembleError> {
        if let Some(c) = self.counts.get(&index) {
            return Ok(*c);
        }
        let (rows, hops) = self.counts(index)?;
        let cx = self.cx();
        let object = group_path(index);
        let g = self.group(index)?;
        let warnings = if g.link_exists("warnings") {
            let wg = g
                .group("warnings")
                .map_err(cx.h5(&format!("{object}/warnings"), "opening group"))?;
            n_rows(&open_ds(
                cx,
                &wg,
                &format!("{object}/warnings"),
                WARN_STEP.name,
            )?)
        } else {
            0
        };
        Ok(Counts {
            rows,
            hops,
            warnings,
        })
    }

    /// Writes everything to disk (H5Fflush): after it returns, the file is
    /// consistent and readable even if the process dies.
    pub fn flush(&mut self) -> Result<(), EnsembleError> {
        self.file.flush().map_err(self.cx().h5("/", "flushing"))
    }

    /// Makes what [`PartWriter::flush`] wrote durable (fsync of the file),
    /// so that checkpoints written afterwards never claim rows a power cut
    /// could lose.
    pub fn sync(&mut self) -> Result<(), EnsembleError> {
        let f = std::fs::File::open(&self.path).map_err(|source| EnsembleError::Io {
            file: self.path.clone(),
            what: "opening to sync".into(),
            source,
        })?;
        f.sync_data().map_err(|source| EnsembleError::Io {
            file: self.path.clone(),
            what: "syncing to disk".into(),
            source,
        })
    }

    /// Sets `writer_state` = "closed", flushes and closes the file.
    pub fn close(mut self) -> Result<(), EnsembleError> {
        self.open.clear();
        let cx = Ctx(&self.path);
        put_str(cx, &self.file, "/", "writer_state", CLOSED)?;
        self.file.flush().map_err(cx.h5("/", "flushing"))?;
        self.file.close().map_err(cx.h5("/", "closing"))
    }
}

fn create_trajectory(
    cx: Ctx,
    traj: &Group,
    h: &TrajectoryHeader,
    n_dof: usize,
    n_states: usize,
) -> Result<Group, EnsembleError> {
    let object = group_path(h.index);
    let g = traj
        .create_group(&group_name(h.index))
        .map_err(cx.h5(&object, "creating group"))?;
    put_attr(cx, &g, &object, "index", &(h.index as u64))?;
    put_attr(cx, &g, &object, "seed", &h.seed)?;
    put_attr(cx, &g, &object, "initial_state", &(h.initial_state as u64))?;
    put_attr(cx, &g, &object, "steps_written", &0u64)?;
    put_attr(cx, &g, &object, "hops_written", &0u64)?;
    put_attr(cx, &g, &object, "warnings_written", &0u64)?;
    let q0 = Spec { name: "initial_positions", width: Width::Dof, units: MODEL_COORDS, description: "Initial nuclear coordinates (the sampled initial condition). Cartesian coordinates in bohr for molecules; for model Hamiltonians the model's own coordinates as defined in config_toml." };
    let v0 = Spec {
        name: "initial_velocities",
        width: Width::Dof,
        units: MODEL_VELOCITIES,
        description: "Initial nuclear velocities (the sampled initial condition).",
    };
    create_fixed(cx, &g, &object, &q0, &h.q0)?;
    create_fixed(cx, &g, &object, &v0, &h.v0)?;
    for spec in ROW_SPECS {
        let w = row_width(spec, n_dof, n_states);
        match spec.name {
            "step" => create_series::<u64>(cx, &g, &object, spec, w, CHUNK_ROWS)?,
            "active_state" => create_series::<u32>(cx, &g, &object, spec, w, CHUNK_ROWS)?,
            "solver_iterations" | "response_iterations" => {
                create_series::<i32>(cx, &g, &object, spec, w, CHUNK_ROWS)?
            }
            "amplitudes" => create_series::<Complex64>(cx, &g, &object, spec, w, CHUNK_ROWS)?,
            _ => create_series::<f64>(cx, &g, &object, spec, w, CHUNK_ROWS)?,
        };
    }
    let hobject = format!("{object}/hops");
    let hg = g
        .create_group("hops")
        .map_err(cx.h5(&hobject, "creating group"))?;
    put_str(cx, &hg, &hobject, "description", "Hop attempts of this trajectory, one row per attempt (accepted or frustrated), as parallel one-dimensional datasets.")?;
    for spec in HOP_SPECS {
        match spec.name {
            "step" => create_series::<u64>(cx, &hg, &hobject, spec, 1, HOP_CHUNK_ROWS)?,
            "from_state" | "to_state" => {
                create_series::<u32>(cx, &hg, &hobject, spec, 1, HOP_CHUNK_ROWS)?
            }
            "accepted" => create_series::<u8>(cx, &hg, &hobject, spec, 1, HOP_CHUNK_ROWS)?,
            _ => create_series::<f64>(cx, &hg, &hobject, spec, 1, HOP_CHUNK_ROWS)?,
        };
    }
    let wobject = format!("{object}/warnings");
    let wg = g
        .create_group("warnings")
        .map_err(cx.h5(&wobject, "creating group"))?;
    put_str(cx, &wg, &wobject, "description", "Non-fatal warnings of the back end, one row per warning, from every step (not only the recorded ones).")?;
    create_series::<u64>(cx, &wg, &wobject, &WARN_STEP, 1, WARN_CHUNK_ROWS)?;
    create_series::<VarLenUnicode>(cx, &wg, &wobject, &WARN_TEXT, 1, WARN_CHUNK_ROWS)?;
    Ok(g)
}

/// HDF5 keeps up to 8 attributes per object in its header ("compact"
/// storage, the default phase change of the 1.8 format) and more in a
/// separate B-tree ("dense"). HDF5 1.10.8's H5Ocopy crashes (a null
/// conversion function in `H5T__conv_vlen`) copying dense variable-length
/// string attributes from one file to another — seen with ten attributes on
/// the trajectory group — so a template with any object beyond 8 is not
/// copied: every trajectory is then created one object at a time.
fn compact_attributes(g: &Group) -> bool {
    const MAX_COMPACT: usize = 8;
    let few = |loc: &Location| loc.attr_names().is_ok_and(|n| n.len() <= MAX_COMPACT);
    few(g)
        && g.datasets().is_ok_and(|d| d.iter().all(|d| few(d)))
        && g.groups()
            .is_ok_and(|sub| sub.iter().all(compact_attributes))
}

/// A new trajectory group: a copy of the template group (built at the
/// first call) with this trajectory's header written into it.
fn copy_template(
    cx: Ctx,
    template: &mut Option<Option<(File, Group)>>,
    meta: &PartMeta,
    traj: &Group,
    header: &TrajectoryHeader,
) -> Result<Group, EnsembleError> {
    let object = group_path(header.index);
    if template.is_none() {
        static SERIAL: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
        let name = format!(
            "flipswarm-template-{}-{}.h5",
            std::process::id(),
            SERIAL.fetch_add(1, std::sync::atomic::Ordering::Relaxed)
        );
        let f = File::with_options()
            .with_fapl(|p| p.core_filebacked(false).libver_v18())
            .create(&name)
            .map_err(cx.h5(&object, "creating the in-memory template"))?;
        let blank = TrajectoryHeader {
            index: 0,
            q0: vec![0.0; meta.n_dof],
            v0: vec![0.0; meta.n_dof],
            initial_state: 0,
            seed: 0,
        };
        let t = create_trajectory(cx, &f, &blank, meta.n_dof, meta.n_states)?;
        *template = Some(compact_attributes(&t).then_some((f, t)));
    }
    let Some(Some((_, t))) = template.as_ref() else {
        return create_trajectory(cx, traj, header, meta.n_dof, meta.n_states);
    };
    t.copy_to(traj, &group_name(header.index))
        .map_err(cx.h5(&object, "creating group"))?;
    let g = traj
        .group(&group_name(header.index))
        .map_err(cx.h5(&object, "opening group"))?;
    put_attr(cx, &g, &object, "index", &(header.index as u64))?;
    put_attr(cx, &g, &object, "seed", &header.seed)?;
    put_attr(
        cx,
        &g,
        &object,
        "initial_state",
        &(header.initial_state as u64),
    )?;
    for (name, data) in [
        ("initial_positions", &header.q0),
        ("initial_velocities", &header.v0),
    ] {
        open_ds(cx, &g, &object, name)?
            .write_raw(data)
            .map_err(cx.h5(&format!("{object}/{name}"), "writing"))?;
    }
    Ok(g)
}

fn check_rows(
    cx: Ctx,
    object: &str,
    rows: &[StepRow],
    n_dof: usize,
    n_states: usize,
) -> Result<(), EnsembleError> {
    for (k, r) in rows.iter().enumerate() {
        let lens = [
            ("coordinates", r.q.len(), n_dof),
            ("velocities", r.v.len(), n_dof),
            ("energies", r.energies.len(), n_states),
            ("amplitudes", r.amplitudes.len(), n_states),
        ];
        if let Some((what, got, want)) = lens.into_iter().find(|(_, got, want)| got != want) {
            return Err(cx.input(
                object,
                format!(
                    "row {k} of the batch (step {}): {got} {what}, expected {want}",
                    r.step
                ),
            ));
        }
        if r.active as usize >= n_states {
            return Err(cx.input(
                object,
                format!(
                    "row {k} of the batch (step {}): active state {} for n_states = {n_states}",
                    r.step, r.active
                ),
            ));
        }
    }
    Ok(())
}

/// Counts dataset writes and fails the Nth one on request (a test hook for
/// a full disk: `FLIPSWARM_INJECT_WRITE_FAILURE=N` makes the Nth dataset
/// write of a writer fail as if the disk were full).
#[derive(Debug, Default)]
struct FaultInjector {
    remaining: Option<u64>,
}

/// The environment variable read by the part writer's fault injector.
pub const INJECT_WRITE_FAILURE: &str = "FLIPSWARM_INJECT_WRITE_FAILURE";

impl FaultInjector {
    fn from_env() -> Self {
        Self {
            remaining: std::env::var(INJECT_WRITE_FAILURE)
                .ok()
                .and_then(|v| v.trim().parse().ok()),
        }
    }

    fn charge(&mut self, cx: Ctx, object: &str) -> Result<(), EnsembleError> {
        match &mut self.remaining {
            Some(0) => Err(EnsembleError::Io {
                file: cx.0.to_path_buf(),
                what: format!(
                    "{object}: writing rows (failure injected by {INJECT_WRITE_FAILURE})"
                ),
                source: std::io::Error::from_raw_os_error(libc::ENOSPC),
            }),
            Some(n) => {
                *n -= 1;
                Ok(())
            }
            None => Ok(()),
        }
    }
}

/// The per-step datasets of a trajectory, opened (in [`ROW_SPECS`] order).
fn open_row_sets(cx: Ctx, g: &Group, object: &str) -> Result<Vec<Dataset>, EnsembleError> {
    ROW_SPECS
        .iter()
        .map(|spec| open_ds(cx, g, object, spec.name))
        .collect()
}

fn write_block(
    cx: Ctx,
    sets: &[Dataset],
    object: &str,
    start: usize,
    b: &RowBlock,
    fault: &mut FaultInjector,
) -> Result<(), EnsembleError> {
    let (n_dof, n_states) = (b.n_dof, b.n_states);
    let mut k = 0;
    let mut put = |spec: &Spec,
                   _w: usize,
                   write: &dyn Fn(&Dataset, &str) -> Result<(), EnsembleError>|
     -> Result<(), EnsembleError> {
        let o = format!("{object}/{}", spec.name);
        fault.charge(cx, &o)?;
        debug_assert_eq!(ROW_SPECS[k].name, spec.name);
        k += 1;
        write(&sets[k - 1], &o)
    };
    put(&TIME, 1, &|ds, o| append_rows(cx, ds, o, start, 1, &b.time))?;
    put(&STEP, 1, &|ds, o| append_rows(cx, ds, o, start, 1, &b.step))?;
    put(&POSITIONS, n_dof, &|ds, o| {
        append_rows(cx, ds, o, start, n_dof, &b.q)
    })?;
    put(&VELOCITIES, n_dof, &|ds, o| {
        append_rows(cx, ds, o, start, n_dof, &b.v)
    })?;
    put(&ENERGIES, n_states, &|ds, o| {
        append_rows(cx, ds, o, start, n_states, &b.energies)
    })?;
    put(&ACTIVE, 1, &|ds, o| {
        append_rows(cx, ds, o, start, 1, &b.active)
    })?;
    put(&AMPLITUDES, n_states, &|ds, o| {
        append_rows(cx, ds, o, start, n_states, &b.amplitudes)
    })?;
    put(&KINETIC, 1, &|ds, o| {
        append_rows(cx, ds, o, start, 1, &b.kinetic)
    })?;
    put(&POTENTIAL, 1, &|ds, o| {
        append_rows(cx, ds, o, start, 1, &b.potential)
    })?;
    put(&TOTAL, 1, &|ds, o| {
        append_rows(cx, ds, o, start, 1, &b.total)
    })?;
    put(&SOLVER_ITERATIONS, 1, &|ds, o| {
        append_rows(cx, ds, o, start, 1, &b.iterations)
    })?;
    put(&RESPONSE_ITERATIONS, 1, &|ds, o| {
        append_rows(cx, ds, o, start, 1, &b.response_iterations)
    })?;
    put(&SPIN_SQUARED, n_states, &|ds, o| {
        append_rows(cx, ds, o, start, n_states, &b.spin_squared)
    })
}

fn check_block(
    cx: Ctx,
    object: &str,
    b: &RowBlock,
    n_dof: usize,
    n_states: usize,
) -> Result<(), EnsembleError> {
    let n = b.len();
    if b.n_dof != n_dof || b.n_states != n_states {
        return Err(cx.input(object, format!("row block of {} coordinates and {} states for n_dof = {n_dof}, n_states = {n_states}", b.n_dof, b.n_states)));
    }
    let lens = [
        ("times", b.time.len(), n),
        ("coordinates", b.q.len(), n * n_dof),
        ("velocities", b.v.len(), n * n_dof),
        ("energies", b.energies.len(), n * n_states),
        ("active states", b.active.len(), n),
        ("amplitudes", b.amplitudes.len(), n * n_states),
        ("kinetic energies", b.kinetic.len(), n),
        ("potential energies", b.potential.len(), n),
        ("total energies", b.total.len(), n),
        ("solver iterations", b.iterations.len(), n),
        ("response iterations", b.response_iterations.len(), n),
        ("<S^2> values", b.spin_squared.len(), n * n_states),
    ];
    if let Some((what, got, want)) = lens.into_iter().find(|(_, got, want)| got != want) {
        return Err(cx.input(
            object,
            format!("row block of {n} rows: {got} {what}, expected {want}"),
        ));
    }
    if let Some(k) = b.active.iter().position(|&a| a as usize >= n_states) {
        return Err(cx.input(
            object,
            format!(
                "row {k} of the batch (step {}): active state {} for n_states = {n_states}",
                b.step[k], b.active[k]
            ),
        ));
    }
    Ok(())
}

fn write_warnings(
    cx: Ctx,
    g: &Group,
    object: &str,
    start: usize,
    warnings: &[WarningRow],
    fault: &mut FaultInjector,
) -> Result<(), EnsembleError> {
    let wobject = format!("{object}/warnings");
    let wg = g
        .group("warnings")
        .map_err(|_| cx.layout(&wobject, "group is missing"))?;
    let steps: Vec<u64> = warnings.iter().map(|w| w.step).collect();
    let texts = warnings
        .iter()
        .map(|w| vlen(cx, &wobject, "text", &w.text))
        .collect::<Result<Vec<_>, _>>()?;
    fault.charge(cx, &format!("{wobject}/step"))?;
    append_rows(
        cx,
        &open_ds(cx, &wg, &wobject, "step")?,
        &format!("{wobject}/step"),
        start,
        1,
        &steps,
    )?;
    fault.charge(cx, &format!("{wobject}/text"))?;
    append_rows(
        cx,
        &open_ds(cx, &wg, &wobject, "text")?,
        &format!("{wobject}/text"),
        start,
        1,
        &texts,
    )
}

/// Hop attempts as columns, checked.
struct HopColumns {
    step: Vec<u64>,
    time: Vec<f64>,
    from: Vec<u32>,
    to: Vec<u32>,
    accepted: Vec<u8>,
    gap: Vec<f64>,
    before: Vec<f64>,
    after: Vec<f64>,
}

fn hop_columns(
    cx: Ctx,
    object: &str,
    hops: &[Hop],
    n_states: usize,
) -> Result<HopColumns, EnsembleError> {
    let state = |k: usize, s: usize| -> Result<u32, EnsembleError> {
        if s >= n_states {
            return Err(cx.input(
                object,
                format!("hop {k} of the batch: state {s} for n_states = {n_states}"),
            ));
        }
        u32::try_from(s).map_err(|_| {
            cx.input(
                object,
                format!("hop {k} of the batch: state {s} does not fit u32"),
            )
        })
    };
    let mut c = HopColumns {
        step: vec![],
        time: vec![],
        from: vec![],
        to: vec![],
        accepted: vec![],
        gap: vec![],
        before: vec![],
        after: vec![],
    };
    for (k, h) in hops.iter().enumerate() {
        c.step.push(h.step);
        c.time.push(h.time);
        c.from.push(state(k, h.from)?);
        c.to.push(state(k, h.to)?);
        c.accepted.push(u8::from(h.accepted));
        c.gap.push(h.gap);
        c.before.push(h.kinetic_before);
        c.after.push(h.kinetic_after);
    }
    Ok(c)
}

fn write_hop_columns(
    cx: Ctx,
    g: &Group,
    object: &str,
    start: usize,
    c: &HopColumns,
) -> Result<(), EnsembleError> {
    let hobject = format!("{object}/hops");
    let hg = g
        .group("hops")
        .map_err(|_| cx.layout(&hobject, "group is missing"))?;
    let ds = |name: &str| open_ds(cx, &hg, &hobject, name);
    let o = |name: &str| format!("{hobject}/{name}");
    append_rows(cx, &ds("step")?, &o("step"), start, 1, &c.step)?;
    append_rows(cx, &ds("time")?, &o("time"), start, 1, &c.time)?;
    append_rows(cx, &ds("from_state")?, &o("from_state"), start, 1, &c.from)?;
    append_rows(cx, &ds("to_state")?, &o("to_state"), start, 1, &c.to)?;
    append_rows(cx, &ds("accepted")?, &o("accepted"), start, 1, &c.accepted)?;
    append_rows(cx, &ds("energy_gap")?, &o("energy_gap"), start, 1, &c.gap)?;
    append_rows(
        cx,
        &ds("kinetic_before")?,
        &o("kinetic_before"),
        start,
        1,
        &c.before,
    )?;
    append_rows(
        cx,
        &ds("kinetic_after")?,
        &o("kinetic_after"),
        start,
        1,
        &c.after,
    )
}

/// Shrinks every listed dataset of `g` to `rows` rows; refuses to grow.
fn truncate_group<'a>(
    cx: Ctx,
    g: &Group,
    object: &str,
    specs: impl Iterator<Item = (&'a str, usize, Width)>,
    rows: u64,
) -> Result<(), EnsembleError> {
    let specs: Vec<_> = specs.collect();
    let mut sets = Vec::with_capacity(specs.len());
    for (name, w, width) in specs {
        let ds = open_ds(cx, g, object, name)?;
        let have = n_rows(&ds);
        if rows > have {
            return Err(cx.input(
                &format!("{object}/{name}"),
                format!("cannot truncate to {rows} rows: only {have} written"),
            ));
        }
        sets.push((name, ds, w, width));
    }
    let n = rows as usize;
    for (name, ds, w, width) in sets {
        let o = format!("{object}/{name}");
        let r = if matches!(width, Width::One) {
            ds.resize(n)
        } else {
            ds.resize((n, w))
        };
        r.map_err(cx.h5(&o, "truncating"))?;
    }
    Ok(())
}

fn read_header(
    cx: Ctx,
    g: &Group,
    object: &str,
    index: usize,
    n_dof: usize,
) -> Result<TrajectoryHeader, EnsembleError> {
    let stored = get_usize(cx, g, object, "index")?;
    if stored != index {
        return Err(cx.layout(
            object,
            format!("attribute `index` = {stored} does not match the group name"),
        ));
    }
    Ok(TrajectoryHeader {
        index,
        q0: read_rows::<f64>(
            cx,
            &open_ds(cx, g, object, "initial_positions")?,
            &format!("{object}/initial_positions"),
            n_dof,
            None,
        )?,
        v0: read_rows::<f64>(
            cx,
            &open_ds(cx, g, object, "initial_velocities")?,
            &format!("{object}/initial_velocities"),
            n_dof,
            None,
        )?,
        initial_state: get_usize(cx, g, object, "initial_state")?,
        seed: get_attr::<u64>(cx, g, object, "seed")?,
    })
}

// ---------------------------------------------------------------------------
// Reader
// ---------------------------------------------------------------------------

/// Reads a part file (read-only).
#[derive(Debug)]
pub struct PartReader {
    path: PathBuf,
    file: File,
    meta: PartMeta,
    state: WriterState,
    indices: Vec<usize>,
}

impl PartReader {
    /// Opens a part file read-only and checks its root layout.
    pub fn open(path: &Path) -> Result<Self, EnsembleError> {
        let cx = Ctx(path);
        if !path.exists() {
            return Err(cx.input("/", "no such file"));
        }
        // Readers take no file lock: a file can be inspected while its writer runs.
        let file = File::with_options()
            .with_fapl(|p| p.file_locking(false))
            .open(path)
            .map_err(cx.h5("/", "opening (is it an HDF5 file, complete and undamaged?)"))?;
        let meta = read_meta(cx, &file)?;
        let word = get_str(cx, &file, "/", "writer_state")?;
        let state = match word.as_str() {
            OPEN => WriterState::Open,
            CLOSED => WriterState::Closed,
            other => {
                return Err(cx.layout(
                    "/",
                    format!(
                        "attribute `writer_state` = {other:?}, expected \"open\" or \"closed\""
                    ),
                ))
            }
        };
        let indices = list_groups(cx, &file)?;
        Ok(PartReader {
            path: path.to_path_buf(),
            file,
            meta,
            state,
            indices,
        })
    }

    /// The file's metadata.
    pub fn meta(&self) -> &PartMeta {
        &self.meta
    }

    /// The file's path.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// "open" (a writer has it or was killed) or "closed" (closed cleanly).
    pub fn writer_state(&self) -> WriterState {
        self.state
    }

    /// Ensemble indices of the trajectories present (groups), ascending.
    pub fn trajectory_indices(&self) -> Vec<usize> {
        self.indices.clone()
    }

    fn group(&self, index: usize) -> Result<Group, EnsembleError> {
        let cx = Ctx(&self.path);
        if self.indices.binary_search(&index).is_err() {
            return Err(cx.input(&group_path(index), "no such trajectory in this file"));
        }
        self.file
            .group(&format!("trajectories/{}", group_name(index)))
            .map_err(cx.h5(&group_path(index), "opening group"))
    }

    /// Rows and hop attempts, checked against `steps_written`/`hops_written`.
    fn counts(&self, g: &Group, object: &str) -> Result<(usize, usize), EnsembleError> {
        let cx = Ctx(&self.path);
        let rows = get_usize(cx, g, object, "steps_written")?;
        let hops = get_usize(cx, g, object, "hops_written")?;
        Ok((rows, hops))
    }

    /// Status, length, last point and energy drift of trajectory `index`.
    pub fn summary(&self, index: usize) -> Result<TrajectorySummary, EnsembleError> {
        let cx = Ctx(&self.path);
        let object = group_path(index);
        let g = self.group(index)?;
        let (status, phase) = read_status(cx, &g, &object)?;
        let (rows, hops) = self.counts(&g, &object)?;
        let time = read_rows::<f64>(
            cx,
            &open_ds(cx, &g, &object, TIME.name)?,
            &format!("{object}/time"),
            rows,
            None,
        )?;
        let active = read_rows::<u32>(
            cx,
            &open_ds(cx, &g, &object, ACTIVE.name)?,
            &format!("{object}/active_state"),
            rows,
            None,
        )?;
        let total = read_rows::<f64>(
            cx,
            &open_ds(cx, &g, &object, TOTAL.name)?,
            &format!("{object}/total_energy"),
            rows,
            None,
        )?;
        let e0 = total.first().copied().unwrap_or(0.0);
        let max_energy_drift = total.iter().map(|e| (e - e0).abs()).fold(0.0, f64::max);
        let failure_reason = match &status {
            Status::Failed { reason, .. } => Some(reason.clone()),
            _ => None,
        };
        let warnings = get_opt_usize(cx, &g, &object, "warnings_written")? as u64;
        let max_solver_iterations = if g.link_exists(SOLVER_ITERATIONS.name) {
            let it = read_rows::<i32>(
                cx,
                &open_ds(cx, &g, &object, SOLVER_ITERATIONS.name)?,
                &format!("{object}/{}", SOLVER_ITERATIONS.name),
                rows,
                None,
            )?;
            it.into_iter().filter(|&i| i >= 0).max()
        } else {
            None
        };
        Ok(TrajectorySummary {
            index,
            status,
            phase,
            steps: rows as u64,
            hops: hops as u64,
            last_time: time.last().copied(),
            active_state: active.last().copied(),
            max_energy_drift,
            failure_reason,
            warnings,
            max_solver_iterations,
        })
    }

    /// Everything stored for trajectory `index`.
    pub fn read(&self, index: usize) -> Result<TrajectoryData, EnsembleError> {
        let cx = Ctx(&self.path);
        let object = group_path(index);
        let g = self.group(index)?;
        let header = read_header(cx, &g, &object, index, self.meta.n_dof)?;
        let (status, phase) = read_status(cx, &g, &object)?;
        let (rows, hops) = self.counts(&g, &object)?;
        let warnings = get_opt_usize(cx, &g, &object, "warnings_written")?;
        let diagnostics = read_diagnostics(cx, &g, &object, rows, self.meta.n_states, false)?;
        let rows = read_step_rows(
            cx,
            &g,
            &object,
            rows,
            self.meta.n_dof,
            self.meta.n_states,
            false,
        )?;
        let hops = read_hops(cx, &g, &object, hops, false)?;
        let warnings = read_warnings(cx, &g, &object, warnings, false)?;
        Ok(TrajectoryData {
            header,
            rows,
            hops,
            diagnostics,
            warnings,
            status,
            phase,
        })
    }

    /// The course of trajectory `index`: status, step numbers, active
    /// states, amplitudes, total energies and hop attempts (what a run's
    /// summary needs; a fraction of [`PartReader::read`]'s work).
    pub fn read_course(&self, index: usize) -> Result<TrajectoryCourse, EnsembleError> {
        let cx = Ctx(&self.path);
        let object = group_path(index);
        let g = self.group(index)?;
        let (status, _) = read_status(cx, &g, &object)?;
        let (rows, hops) = self.counts(&g, &object)?;
        let column = |spec: &Spec| -> Result<(Dataset, String), EnsembleError> {
            Ok((
                open_ds(cx, &g, &object, spec.name)?,
                format!("{object}/{}", spec.name),
            ))
        };
        let (ds, o) = column(&STEP)?;
        let step = read_rows_from::<u64>(cx, &ds, &o, rows, None, false)?;
        let (ds, o) = column(&ACTIVE)?;
        let active = read_rows_from::<u32>(cx, &ds, &o, rows, None, false)?;
        let (ds, o) = column(&AMPLITUDES)?;
        let amplitudes =
            read_rows_from::<Complex64>(cx, &ds, &o, rows, Some(self.meta.n_states), false)?;
        let (ds, o) = column(&TOTAL)?;
        let total = read_rows_from::<f64>(cx, &ds, &o, rows, None, false)?;
        Ok(TrajectoryCourse {
            index,
            initial_state: get_usize(cx, &g, &object, "initial_state")?,
            status,
            step,
            active,
            amplitudes,
            total,
            hops: read_hops(cx, &g, &object, hops, false)?,
        })
    }

    /// The status attributes of trajectory `index` only (no datasets read).
    pub fn status(&self, index: usize) -> Result<(Status, Phase), EnsembleError> {
        let g = self.group(index)?;
        read_status(Ctx(&self.path), &g, &group_path(index))
    }

    /// The first `rows` rows and `hops` hop attempts of trajectory `index`,
    /// accepting datasets that are longer or whose lengths disagree with
    /// each other or with `steps_written` — the state a writer killed
    /// between two flushes can leave behind. Resume uses it to keep exactly
    /// the rows a checkpoint vouches for.
    pub fn read_prefix(
        &self,
        index: usize,
        rows: u64,
        hops: u64,
    ) -> Result<TrajectoryData, EnsembleError> {
        self.read_prefix_all(
            index,
            Counts {
                rows,
                hops,
                warnings: 0,
            },
        )
    }

    /// As [`PartReader::read_prefix`], with the first `keep.warnings` warnings too.
    pub fn read_prefix_all(
        &self,
        index: usize,
        keep: Counts,
    ) -> Result<TrajectoryData, EnsembleError> {
        let cx = Ctx(&self.path);
        let object = group_path(index);
        let g = self.group(index)?;
        let header = read_header(cx, &g, &object, index, self.meta.n_dof)?;
        let (status, phase) = read_status(cx, &g, &object)?;
        let diagnostics = read_diagnostics(
            cx,
            &g,
            &object,
            keep.rows as usize,
            self.meta.n_states,
            true,
        )?;
        let rows = read_step_rows(
            cx,
            &g,
            &object,
            keep.rows as usize,
            self.meta.n_dof,
            self.meta.n_states,
            true,
        )?;
        let hops = read_hops(cx, &g, &object, keep.hops as usize, true)?;
        let warnings = read_warnings(cx, &g, &object, keep.warnings as usize, true)?;
        Ok(TrajectoryData {
            header,
            rows,
            hops,
            diagnostics,
            warnings,
            status,
            phase,
        })
    }
}

/// Reads `path` completely in a forked child process first (root layout,
/// every trajectory's status and, with `everything`, all its data) and
/// reports a crash of that child as a damaged file. The HDF5 C library
/// (1.10) can crash on some damaged files instead of returning an error —
/// found by fuzzing: a flipped byte in the global heap that holds the
/// variable-length string attributes makes `H5HG_read` copy out of bounds.
/// The command-line tools probe a file before reading it so that such a
/// file gets a message, not a segmentation fault.
///
/// Only for single-threaded callers (the child inherits no other thread, and
/// a lock another thread held at the fork would never be released in it).
pub fn probe_in_child(path: &Path, everything: bool) -> Result<(), EnsembleError> {
    // SAFETY: the child only reads the file and leaves with `_exit`, running
    // no destructors and flushing nothing of the parent's.
    let pid = unsafe { libc::fork() };
    if pid < 0 {
        return Ok(()); // cannot fork: read directly
    }
    if pid == 0 {
        let ok = PartReader::open(path).is_ok_and(|r| {
            r.trajectory_indices().into_iter().all(|i| {
                if everything {
                    r.read(i).is_ok()
                } else {
                    r.summary(i).is_ok()
                }
            })
        });
        // SAFETY: ends the child at once.
        unsafe { libc::_exit(if ok { 0 } else { 1 }) };
    }
    let mut status = 0;
    // SAFETY: waiting for our own child.
    let rc = unsafe { libc::waitpid(pid, &mut status, 0) };
    if rc == pid && libc::WIFSIGNALED(status) {
        return Err(Ctx(path).layout(
            "/",
            format!("the file is damaged: reading it crashed the HDF5 library (signal {}); restore it from a copy, or resume/rerun the slice that wrote it", libc::WTERMSIG(status)),
        ));
    }
    Ok(())
}

fn read_step_rows(
    cx: Ctx,
    g: &Group,
    object: &str,
    n: usize,
    n_dof: usize,
    n_states: usize,
    prefix: bool,
) -> Result<Vec<StepRow>, EnsembleError> {
    let f64s = |spec: &Spec, w: Option<usize>| {
        read_rows_from::<f64>(
            cx,
            &open_ds(cx, g, object, spec.name)?,
            &format!("{object}/{}", spec.name),
            n,
            w,
            prefix,
        )
    };
    let time = f64s(&TIME, None)?;
    let step = read_rows_from::<u64>(
        cx,
        &open_ds(cx, g, object, STEP.name)?,
        &format!("{object}/step"),
        n,
        None,
        prefix,
    )?;
    let q = f64s(&POSITIONS, Some(n_dof))?;
    let v = f64s(&VELOCITIES, Some(n_dof))?;
    let e = f64s(&ENERGIES, Some(n_states))?;
    let active = read_rows_from::<u32>(
        cx,
        &open_ds(cx, g, object, ACTIVE.name)?,
        &format!("{object}/active_state"),
        n,
        None,
        prefix,
    )?;
    let amps = read_rows_from::<Complex64>(
        cx,
        &open_ds(cx, g, object, AMPLITUDES.name)?,
        &format!("{object}/amplitudes"),
        n,
        Some(n_states),
        prefix,
    )?;
    let kin = f64s(&KINETIC, None)?;
    let pot = f64s(&POTENTIAL, None)?;
    let tot = f64s(&TOTAL, None)?;
    Ok((0..n)
        .map(|k| StepRow {
            step: step[k],
            time: time[k],
            q: q[k * n_dof..(k + 1) * n_dof].to_vec(),
            v: v[k * n_dof..(k + 1) * n_dof].to_vec(),
            energies: e[k * n_states..(k + 1) * n_states].to_vec(),
            active: active[k],
            amplitudes: amps[k * n_states..(k + 1) * n_states].to_vec(),
            kinetic: kin[k],
            potential: pot[k],
            total: tot[k],
        })
        .collect())
}

/// The diagnostics of the first `n` rows; "none" for files that predate them.
fn read_diagnostics(
    cx: Ctx,
    g: &Group,
    object: &str,
    n: usize,
    n_states: usize,
    prefix: bool,
) -> Result<Vec<RowDiagnostics>, EnsembleError> {
    if !g.link_exists(SOLVER_ITERATIONS.name) {
        return Ok(vec![RowDiagnostics::none(n_states); n]);
    }
    let o = |spec: &Spec| format!("{object}/{}", spec.name);
    let it = read_rows_from::<i32>(
        cx,
        &open_ds(cx, g, object, SOLVER_ITERATIONS.name)?,
        &o(&SOLVER_ITERATIONS),
        n,
        None,
        prefix,
    )?;
    let rit = read_rows_from::<i32>(
        cx,
        &open_ds(cx, g, object, RESPONSE_ITERATIONS.name)?,
        &o(&RESPONSE_ITERATIONS),
        n,
        None,
        prefix,
    )?;
    let s2 = read_rows_from::<f64>(
        cx,
        &open_ds(cx, g, object, SPIN_SQUARED.name)?,
        &o(&SPIN_SQUARED),
        n,
        Some(n_states),
        prefix,
    )?;
    Ok((0..n)
        .map(|k| RowDiagnostics {
            iterations: it[k],
            response_iterations: rit[k],
            spin_squared: s2[k * n_states..(k + 1) * n_states].to_vec(),
        })
        .collect())
}

/// The first `n` warnings; none for files that predate them.
fn read_warnings(
    cx: Ctx,
    g: &Group,
    object: &str,
    n: usize,
    prefix: bool,
) -> Result<Vec<WarningRow>, EnsembleError> {
    if !g.link_exists("warnings") {
        return if n == 0 {
            Ok(vec![])
        } else {
            Err(cx.layout(&format!("{object}/warnings"), "group is missing"))
        };
    }
    let wobject = format!("{object}/warnings");
    let wg = g
        .group("warnings")
        .map_err(cx.h5(&wobject, "opening group"))?;
    let steps = read_rows_from::<u64>(
        cx,
        &open_ds(cx, &wg, &wobject, "step")?,
        &format!("{wobject}/step"),
        n,
        None,
        prefix,
    )?;
    let texts = read_rows_from::<VarLenUnicode>(
        cx,
        &open_ds(cx, &wg, &wobject, "text")?,
        &format!("{wobject}/text"),
        n,
        None,
        prefix,
    )?;
    Ok(steps
        .into_iter()
        .zip(texts)
        .map(|(step, t)| WarningRow {
            step,
            text: t.as_str().to_string(),
        })
        .collect())
}

fn read_hops(
    cx: Ctx,
    g: &Group,
    object: &str,
    n: usize,
    prefix: bool,
) -> Result<Vec<Hop>, EnsembleError> {
    let hobject = format!("{object}/hops");
    let hg = g
        .group("hops")
        .map_err(|_| cx.layout(&hobject, "group is missing"))?;
    let ds = |name: &str| open_ds(cx, &hg, &hobject, name);
    let o = |name: &str| format!("{hobject}/{name}");
    let f = |name: &str| read_rows_from::<f64>(cx, &ds(name)?, &o(name), n, None, prefix);
    let step = read_rows_from::<u64>(cx, &ds("step")?, &o("step"), n, None, prefix)?;
    let time = f("time")?;
    let from = read_rows_from::<u32>(cx, &ds("from_state")?, &o("from_state"), n, None, prefix)?;
    let to = read_rows_from::<u32>(cx, &ds("to_state")?, &o("to_state"), n, None, prefix)?;
    let accepted = read_rows_from::<u8>(cx, &ds("accepted")?, &o("accepted"), n, None, prefix)?;
    let gap = f("energy_gap")?;
    let before = f("kinetic_before")?;
    let after = f("kinetic_after")?;
    (0..n)
        .map(|k| {
            let accepted = match accepted[k] {
                0 => false,
                1 => true,
                x => {
                    return Err(cx.layout(
                        &o("accepted"),
                        format!("row {k} holds {x}, expected 0 or 1"),
                    ))
                }
            };
            Ok(Hop {
                step: step[k],
                time: time[k],
                from: from[k] as usize,
                to: to[k] as usize,
                accepted,
                gap: gap[k],
                kinetic_before: before[k],
                kinetic_after: after[k],
            })
        })
        .collect()
}

// ---------------------------------------------------------------------------
// Merge
// ---------------------------------------------------------------------------

/// Merges closed part files of one ensemble into `out`, a part file covering
/// slice (0, 1) with the union of their trajectories. Refuses: an existing
/// `out`; a part with `writer_state` "open"; parts of different ensembles
/// (`config_toml`, `n_states`, `n_dof`, masses, time step); a trajectory in
/// two parts. Values are copied bit for bit, and the output is read back and
/// checked (every trajectory, its row and hop counts and its status). On any
/// error the partial output is removed.
pub fn merge(parts: &[PathBuf], out: &Path) -> Result<MergeReport, EnsembleError> {
    if out.exists() {
        return Err(EnsembleError::Exists {
            file: out.to_path_buf(),
        });
    }
    merge_checked(parts, out, false)
}

/// [`merge`], probing every part in a child process first when `probe`
/// (see [`probe_in_child`]; for single-threaded callers such as the CLI).
pub fn merge_checked(
    parts: &[PathBuf],
    out: &Path,
    probe: bool,
) -> Result<MergeReport, EnsembleError> {
    if out.exists() {
        return Err(EnsembleError::Exists {
            file: out.to_path_buf(),
        });
    }
    if probe {
        for p in parts {
            probe_in_child(p, true)?;
        }
    }
    let readers = open_parts(parts)?;
    let owner = check_disjoint(&readers)?;
    let meta = merged_meta(&readers[0].meta, owner.keys().copied().collect());
    let result = write_merged(&readers, &meta, out)
        .and_then(|report| verify_merged(&readers, out).map(|()| report));
    if result.is_err() {
        // The output was created by this call: remove the partial file.
        let _ = std::fs::remove_file(out);
    }
    result
}

fn open_parts(parts: &[PathBuf]) -> Result<Vec<PartReader>, EnsembleError> {
    if parts.is_empty() {
        return Err(EnsembleError::Input {
            file: PathBuf::new(),
            object: "merge".into(),
            what: "no part files given".into(),
        });
    }
    let readers = parts
        .iter()
        .map(|p| PartReader::open(p))
        .collect::<Result<Vec<_>, _>>()?;
    let first = &readers[0];
    for r in &readers {
        if r.state == WriterState::Open {
            return Err(EnsembleError::NotClosed {
                file: r.path.clone(),
            });
        }
        if let Some(what) = meta_difference(&first.meta, &r.meta) {
            return Err(EnsembleError::Mismatch {
                first: first.path.clone(),
                second: r.path.clone(),
                what,
            });
        }
    }
    Ok(readers)
}

/// What makes two parts belong to different ensembles, if anything.
fn meta_difference(a: &PartMeta, b: &PartMeta) -> Option<String> {
    if a.config_toml != b.config_toml {
        return Some("config_toml".into());
    }
    if a.n_states != b.n_states {
        return Some(format!("n_states ({} vs {})", a.n_states, b.n_states));
    }
    if a.n_dof != b.n_dof {
        return Some(format!("n_dof ({} vs {})", a.n_dof, b.n_dof));
    }
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    if bits(&a.masses) != bits(&b.masses) {
        return Some("masses".into());
    }
    if a.timestep_au.to_bits() != b.timestep_au.to_bits() {
        return Some(format!(
            "timestep_au ({} vs {})",
            a.timestep_au, b.timestep_au
        ));
    }
    None
}

/// Which part holds each trajectory (assigned or present); refuses duplicates.
fn check_disjoint(readers: &[PartReader]) -> Result<BTreeMap<usize, usize>, EnsembleError> {
    let mut owner: BTreeMap<usize, usize> = BTreeMap::new();
    for (k, r) in readers.iter().enumerate() {
        let mut mine: Vec<usize> = r
            .meta
            .trajectories
            .iter()
            .chain(&r.indices)
            .copied()
            .collect();
        mine.sort_unstable();
        mine.dedup();
        for index in mine {
            if let Some(&j) = owner.get(&index) {
                return Err(EnsembleError::Duplicate {
                    index,
                    first: readers[j].path.clone(),
                    second: r.path.clone(),
                });
            }
            owner.insert(index, k);
        }
    }
    Ok(owner)
}

fn merged_meta(first: &PartMeta, trajectories: Vec<usize>) -> PartMeta {
    PartMeta {
        program_version: env!("CARGO_PKG_VERSION").to_string(),
        created: now_rfc3339(),
        slice: (0, 1),
        trajectories,
        ..first.clone()
    }
}

fn write_merged(
    readers: &[PartReader],
    meta: &PartMeta,
    out: &Path,
) -> Result<MergeReport, EnsembleError> {
    let mut w = PartWriter::create(out, meta)?;
    let mut report = MergeReport {
        output: out.to_path_buf(),
        parts: readers.len(),
        trajectories: 0,
        rows: 0,
        hops: 0,
    };
    for r in readers {
        for &index in &r.indices {
            let data = r.read(index)?;
            w.begin(&data.header)?;
            w.append_all(
                index,
                &data.rows,
                &data.diagnostics,
                &data.hops,
                &data.warnings,
            )?;
            let g = w.group(index)?;
            write_status(Ctx(out), &g, &group_path(index), &data.status, data.phase)?;
            report.trajectories += 1;
            report.rows += data.rows.len() as u64;
            report.hops += data.hops.len() as u64;
        }
    }
    w.close()?;
    Ok(report)
}

fn verify_merged(readers: &[PartReader], out: &Path) -> Result<(), EnsembleError> {
    let merged = PartReader::open(out)?;
    let fail = |what: String| {
        Err(EnsembleError::Verify {
            file: out.to_path_buf(),
            what,
        })
    };
    for r in readers {
        for &index in &r.indices {
            if merged.indices.binary_search(&index).is_err() {
                return fail(format!(
                    "trajectory {index} from {} is missing",
                    r.path.display()
                ));
            }
            let (a, b) = (r.summary(index)?, merged.summary(index)?);
            if (a.steps, a.hops, a.phase) != (b.steps, b.hops, b.phase) || a.status != b.status {
                return fail(format!(
                    "trajectory {index}: {} has {} rows, {} hops, status {}; the output has {} rows, {} hops, status {}",
                    r.path.display(),
                    a.steps,
                    a.hops,
                    a.phase,
                    b.steps,
                    b.hops,
                    b.phase
                ));
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The template of a trajectory is copied only while every object keeps
    /// its attributes in the object header: at most 8 (the default
    /// `max_compact` of H5Pset_attr_phase_change, HDF5 reference manual,
    /// from memory). The layout written today passes; a ninth attribute on
    /// any object, at any depth, turns the copying off.
    #[test]
    fn templates_are_copied_only_with_compact_attributes() {
        let f = File::with_options()
            .with_fapl(|p| p.core_filebacked(false).libver_v18())
            .create("flipswarm-unit-compact.h5")
            .unwrap();
        let cx = Ctx(Path::new("flipswarm-unit-compact.h5"));
        let blank = TrajectoryHeader {
            index: 0,
            q0: vec![0.0; 6],
            v0: vec![0.0; 6],
            initial_state: 0,
            seed: 0,
        };
        let t = create_trajectory(cx, &f, &blank, 6, 3).unwrap();
        assert!(compact_attributes(&t), "today's layout must stay copyable");
        let hops = t.group("hops").unwrap();
        for k in 0..7 {
            put_attr(cx, &hops, "/hops", &format!("extra{k}"), &(k as u64)).unwrap();
        }
        assert!(compact_attributes(&t), "description + 7 = 8 attributes");
        put_attr(cx, &hops, "/hops", "extra7", &7u64).unwrap();
        assert!(!compact_attributes(&t), "9 attributes on a subgroup");
    }
}
