//! Running an ensemble into a run directory, and resuming it.
//!
//! Layout of a run directory (our own):
//!
//! ```text
//! DIR/run.toml                         the effective configuration (after --set)
//! DIR/part-KKKK-of-NNNN.h5             trajectories of slice K (one writer: this process)
//! DIR/checkpoints/part-KKKK/traj-IIIIII.ckpt[.prev]   per-trajectory checkpoints
//! ```
//!
//! One writer thread owns the part file; the trajectories, run in parallel
//! by rayon, send it their rows. A trajectory checkpoints by sending its rows
//! with an acknowledgement request (the writer appends and flushes, then
//! answers) and only then writing its checkpoint file, so a checkpoint never
//! claims rows that are not on disk. On resume, rows beyond a checkpoint are
//! truncated and recomputed; because every trajectory is deterministic given
//! its state, generator and snapshot, the continued trajectory is bit-for-bit
//! the one that never stopped.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{self, RecvTimeoutError, SyncSender};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use rayon::prelude::*;

use super::checkpoint::{self, with_suffix, Checkpoint, Source};
use super::h5::{now_rfc3339, EnsembleError, PartReader, PartWriter, WriterState};
use super::record::{PartMeta, StepRow, TrajectoryHeader};
use crate::config::RunConfig;
use crate::dynamics::{Flow, Hop, Observer, RecordKind, Status, StepRecord, Trajectory, TrajectoryState};
use crate::electronic::Backend;
use crate::swarm::{self, Progress};

/// Creates the back end of trajectory `index` (tests inject faults here).
pub type BackendFactory<'a> = dyn Fn(usize) -> Box<dyn Backend> + Sync + 'a;

/// Problems of a run as a whole (single trajectories fail as values).
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    /// The run directory or a file in it cannot be used.
    #[error("{path}: {message}")]
    Directory { path: PathBuf, message: String },
    /// The part file could not be written or read.
    #[error(transparent)]
    Ensemble(#[from] EnsembleError),
    /// The configuration stored in the run directory is invalid.
    #[error("{0}")]
    Config(#[from] crate::config::ConfigError),
    /// The thread pool could not be started.
    #[error("cannot start worker threads: {0}")]
    Threads(String),
    /// Writing to the part file failed while running.
    #[error("writing results failed: {0}")]
    Writer(String),
}

/// How a run (or resume) ended.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct RunReport {
    /// Trajectories that ended normally (including earlier sessions).
    pub finished: usize,
    /// Trajectories that failed (including earlier sessions).
    pub failed: usize,
    /// Trajectories stopped by a signal, resumable.
    pub stopped: usize,
    /// Trajectories never started (a stop came first).
    pub pending: usize,
    /// Trajectories continued from a checkpoint in this session.
    pub resumed_from_checkpoint: usize,
    /// Trajectories resumed from the previous checkpoint because the newest was damaged.
    pub resumed_from_previous: usize,
    /// The part file written.
    pub part: PathBuf,
}

/// Which slice of the ensemble a process runs: trajectories
/// [k·N/n, (k+1)·N/n), contiguous and deterministic.
pub fn slice_indices(total: usize, k: usize, n: usize) -> Vec<usize> {
    (k * total / n..(k + 1) * total / n).collect()
}

/// Part file name of slice k of n.
pub fn part_name(k: usize, n: usize) -> String {
    format!("part-{k:04}-of-{n:04}.h5")
}

fn checkpoint_dir(dir: &Path, k: usize) -> PathBuf {
    dir.join("checkpoints").join(format!("part-{k:04}"))
}

/// Messages to the writer thread.
enum ToWriter {
    Begin(TrajectoryHeader),
    /// Append rows; with `ack`, flush and answer with the counts on disk.
    Append { index: usize, rows: Vec<StepRow>, hops: Vec<Hop>, ack: Option<SyncSender<Result<(u64, u64), String>>> },
    /// Final rows and status; the checkpoint files are removed after the next flush.
    Finish { index: usize, rows: Vec<StepRow>, hops: Vec<Hop>, status: Status, checkpoint: PathBuf },
    /// Final rows of a stopped trajectory, with acknowledgement.
    Stop { index: usize, rows: Vec<StepRow>, hops: Vec<Hop>, ack: SyncSender<Result<(u64, u64), String>> },
}

fn writer_loop(mut w: PartWriter, rx: mpsc::Receiver<ToWriter>) -> Result<(), String> {
    let mut dirty = false;
    let mut last_flush = Instant::now();
    let mut to_remove: Vec<PathBuf> = Vec::new();
    let mut failure: Option<String> = None;
    let flush = |w: &mut PartWriter, to_remove: &mut Vec<PathBuf>, dirty: &mut bool| -> Result<(), String> {
        w.flush().map_err(|e| e.to_string())?;
        for p in to_remove.drain(..) {
            checkpoint::remove(&p);
        }
        *dirty = false;
        Ok(())
    };
    loop {
        let msg = match rx.recv_timeout(Duration::from_millis(500)) {
            Ok(m) => m,
            Err(RecvTimeoutError::Timeout) => {
                if dirty && failure.is_none() {
                    if let Err(e) = flush(&mut w, &mut to_remove, &mut dirty) {
                        failure = Some(e);
                    }
                    last_flush = Instant::now();
                }
                continue;
            }
            Err(RecvTimeoutError::Disconnected) => break,
        };
        let result: Result<Option<(SyncSender<_>, usize)>, String> = (|| match msg {
            ToWriter::Begin(h) => {
                w.begin(&h).map_err(|e| e.to_string())?;
                Ok(None)
            }
            ToWriter::Append { index, rows, hops, ack } => {
                w.append(index, &rows, &hops).map_err(|e| e.to_string())?;
                Ok(ack.map(|a| (a, index)))
            }
            ToWriter::Finish { index, rows, hops, status, checkpoint } => {
                w.append(index, &rows, &hops).map_err(|e| e.to_string())?;
                w.set_status(index, &status).map_err(|e| e.to_string())?;
                to_remove.push(checkpoint);
                Ok(None)
            }
            ToWriter::Stop { index, rows, hops, ack } => {
                w.append(index, &rows, &hops).map_err(|e| e.to_string())?;
                w.mark_stopped(index).map_err(|e| e.to_string())?;
                Ok(Some((ack, index)))
            }
        })();
        dirty = true;
        match result {
            Err(e) => {
                failure.get_or_insert(e);
            }
            Ok(Some((ack, index))) => {
                let answer = match &failure {
                    Some(e) => Err(e.clone()),
                    None => flush(&mut w, &mut to_remove, &mut dirty)
                        .and_then(|_| w.counts(index).map_err(|e| e.to_string())),
                };
                last_flush = Instant::now();
                if let Err(e) = &answer {
                    failure.get_or_insert(e.clone());
                }
                let _ = ack.send(answer);
            }
            Ok(None) => {
                if last_flush.elapsed() > Duration::from_secs(2) && failure.is_none() {
                    if let Err(e) = flush(&mut w, &mut to_remove, &mut dirty) {
                        failure = Some(e);
                    }
                    last_flush = Instant::now();
                }
            }
        }
    }
    if failure.is_none() {
        if let Err(e) = flush(&mut w, &mut to_remove, &mut dirty) {
            failure = Some(e);
        }
    }
    let closed = w.close().map_err(|e| e.to_string());
    match failure {
        Some(e) => Err(e),
        None => closed,
    }
}

/// The observer that buffers rows, checkpoints and reports the end.
struct Recorder<'a> {
    index: usize,
    every: u64,
    checkpoint_every: u64,
    checkpoint_interval: Duration,
    last_checkpoint: Instant,
    last_checkpoint_step: u64,
    rows: Vec<StepRow>,
    hops: Vec<Hop>,
    last_recorded_step: Option<u64>,
    resumed: bool,
    writer: SyncSender<ToWriter>,
    checkpoint_path: PathBuf,
    stop: &'a AtomicBool,
    stopped: bool,
}

fn row_of(s: &TrajectoryState, masses: &[f64]) -> StepRow {
    let kinetic = s.kinetic(masses);
    let potential = s.potential();
    StepRow {
        step: s.step,
        time: s.time,
        q: s.q.clone(),
        v: s.v.clone(),
        energies: s.energies.clone(),
        active: s.active as u32,
        amplitudes: s.amplitudes.clone(),
        kinetic,
        potential,
        total: kinetic + potential,
    }
}

impl Recorder<'_> {
    fn record(&mut self, rec: &StepRecord) {
        if self.last_recorded_step != Some(rec.state.step) {
            self.rows.push(row_of(rec.state, rec.masses));
            self.last_recorded_step = Some(rec.state.step);
        }
    }

    fn checkpoint(&mut self, rec: &StepRecord) -> Result<(), String> {
        let (ack, answer) = mpsc::sync_channel(1);
        let msg = ToWriter::Append {
            index: self.index,
            rows: std::mem::take(&mut self.rows),
            hops: std::mem::take(&mut self.hops),
            ack: Some(ack),
        };
        self.writer.send(msg).map_err(|_| "the writer has stopped".to_string())?;
        let (rows_written, hops_written) = answer.recv().map_err(|_| "the writer has stopped".to_string())??;
        let ckpt = Checkpoint {
            format: checkpoint::FORMAT.into(),
            version: 1,
            index: self.index,
            rows_written,
            hops_written,
            state: rec.state.clone(),
            snapshot: rec.backend.snapshot(),
        };
        checkpoint::write(&self.checkpoint_path, &ckpt).map_err(|e| e.to_string())?;
        self.last_checkpoint = Instant::now();
        self.last_checkpoint_step = rec.state.step;
        Ok(())
    }
}

impl Observer for Recorder<'_> {
    fn observe(&mut self, rec: &StepRecord) -> Result<Flow, String> {
        match rec.kind {
            RecordKind::Start => {
                if !self.resumed {
                    self.record(rec);
                }
                Ok(Flow::Continue)
            }
            RecordKind::Step => {
                if rec.state.step % self.every == 0 {
                    self.record(rec);
                }
                if let Some(h) = rec.hop {
                    self.hops.push(h.clone());
                }
                // Checkpoints and stops add no rows of their own: the rows
                // follow the `record_every` cadence whatever happens, so a
                // stopped and resumed trajectory writes exactly the rows of
                // one that never stopped.
                if self.stop.load(Ordering::Relaxed) {
                    self.checkpoint(rec)?;
                    let (ack, answer) = mpsc::sync_channel(1);
                    self.writer
                        .send(ToWriter::Stop { index: self.index, rows: vec![], hops: vec![], ack })
                        .map_err(|_| "the writer has stopped".to_string())?;
                    answer.recv().map_err(|_| "the writer has stopped".to_string())??;
                    self.stopped = true;
                    return Ok(Flow::Stop);
                }
                let by_steps = self.checkpoint_every > 0 && rec.state.step - self.last_checkpoint_step >= self.checkpoint_every;
                let by_time = self.last_checkpoint.elapsed() >= self.checkpoint_interval;
                if by_steps || by_time {
                    self.checkpoint(rec)?;
                }
                Ok(Flow::Continue)
            }
            RecordKind::End => {
                self.record(rec);
                let msg = ToWriter::Finish {
                    index: self.index,
                    rows: std::mem::take(&mut self.rows),
                    hops: std::mem::take(&mut self.hops),
                    status: rec.state.status.clone(),
                    checkpoint: self.checkpoint_path.clone(),
                };
                self.writer.send(msg).map_err(|_| "the writer has stopped".to_string())?;
                Ok(Flow::Continue)
            }
        }
    }
}

/// What to do with one trajectory in this session.
enum Plan {
    Fresh,
    FromCheckpoint(Box<Checkpoint>),
}

enum Ended {
    Done,
    Stopped,
    Skipped,
}

struct Session<'a> {
    cfg: &'a RunConfig,
    factory: &'a BackendFactory<'a>,
    ckpt_dir: PathBuf,
    stop: &'a AtomicBool,
}

impl Session<'_> {
    fn run_one(&self, index: usize, plan: Plan, writer: SyncSender<ToWriter>) -> Result<Ended, String> {
        if self.stop.load(Ordering::Relaxed) {
            return Ok(Ended::Skipped);
        }
        let mut backend = (self.factory)(index);
        let path = checkpoint::path_for(&self.ckpt_dir, index);
        let out = &self.cfg.output;
        let mut rec = Recorder {
            index,
            every: out.record_every,
            checkpoint_every: out.checkpoint_every,
            checkpoint_interval: Duration::from_secs_f64(out.checkpoint_interval_s),
            last_checkpoint: Instant::now(),
            last_checkpoint_step: 0,
            rows: Vec::new(),
            hops: Vec::new(),
            last_recorded_step: None,
            resumed: false,
            writer: writer.clone(),
            checkpoint_path: path.clone(),
            stop: self.stop,
            stopped: false,
        };
        let masses = backend.info().masses;
        let mut traj = match plan {
            Plan::Fresh => {
                let (q, v, state) = swarm::initial_condition(self.cfg, &masses, index);
                let header = TrajectoryHeader { index, q0: q.clone(), v0: v.clone(), initial_state: state, seed: self.cfg.seed };
                writer.send(ToWriter::Begin(header)).map_err(|_| "the writer has stopped".to_string())?;
                let rng = swarm::trajectory_rng(self.cfg.seed, index, 1);
                match Trajectory::start(backend.as_mut(), self.cfg.settings.clone(), q, v, state, rng) {
                    Ok(t) => t,
                    Err(e) => {
                        let status = Status::Failed { step: 0, reason: e.to_string() };
                        writer
                            .send(ToWriter::Finish { index, rows: vec![], hops: vec![], status, checkpoint: path })
                            .map_err(|_| "the writer has stopped".to_string())?;
                        return Ok(Ended::Done);
                    }
                }
            }
            Plan::FromCheckpoint(ckpt) => {
                if let Err(e) = backend.restore(&ckpt.snapshot) {
                    return Err(format!("trajectory {index}: {e}"));
                }
                rec.resumed = true;
                // The checkpoint's own step has a row only if it lies on the
                // `record_every` grid (rows are recorded before checkpoints);
                // otherwise the end of the trajectory must still write it.
                let step = ckpt.state.step;
                rec.last_recorded_step = (step % rec.every == 0).then_some(step);
                rec.last_checkpoint_step = ckpt.state.step;
                let mut state = ckpt.state;
                state.status = Status::Running;
                Trajectory::resume(backend.as_mut(), self.cfg.settings.clone(), state)
            }
        };
        traj.run(&mut rec)?;
        Ok(if rec.stopped { Ended::Stopped } else { Ended::Done })
    }
}

/// Options common to `run` and `resume`.
pub struct Options<'a> {
    /// Worker threads (0 = all cores).
    pub threads: usize,
    /// Set by signal handlers: finish the current step, checkpoint, stop.
    pub stop: Arc<AtomicBool>,
    /// The back ends.
    pub factory: &'a BackendFactory<'a>,
    /// Draw a progress bar on a terminal (otherwise log lines).
    pub progress_bar: bool,
}

/// Start a new run of slice (k, n) in `dir`, which must not exist yet.
pub fn start(cfg: &RunConfig, dir: &Path, slice: (usize, usize), opts: &Options) -> Result<RunReport, RunError> {
    let (k, n) = slice;
    let derr = |message: String| RunError::Directory { path: dir.to_path_buf(), message };
    if dir.join(part_name(k, n)).exists() {
        return Err(derr(format!("already holds a run of slice {k}/{n}; use `flipswarm resume` to continue it, or choose another directory")));
    }
    let estimate = estimated_bytes(cfg, slice);
    if let Some(free) = free_bytes(dir) {
        tracing::info!("expected size of the part file: {}, free on its file system: {}", human(estimate), human(free));
        if estimate > free {
            return Err(derr(format!(
                "the part file would need about {} but only {} are free; raise output.record_every_steps or free space",
                human(estimate),
                human(free)
            )));
        }
    }
    std::fs::create_dir_all(checkpoint_dir(dir, k)).map_err(|e| derr(format!("cannot create: {e}")))?;
    let contained = prepare(cfg, dir)?;
    let cfg = &contained;
    let indices = slice_indices(cfg.trajectories, k, n);
    let masses = swarm::make_backend(&cfg.model).info().masses;
    let meta = PartMeta {
        config_toml: cfg.effective_toml.clone(),
        program_version: env!("CARGO_PKG_VERSION").into(),
        created: now_rfc3339(),
        n_states: cfg.model.n_states(),
        n_dof: cfg.model.n_dof(),
        masses,
        slice,
        trajectories: indices.clone(),
        timestep_au: cfg.settings.dt,
    };
    let part = dir.join(part_name(k, n));
    let writer = PartWriter::create(&part, &meta)?;
    let plans = indices.into_iter().map(|i| (i, Plan::Fresh)).collect();
    let mut report = execute(cfg, dir, k, writer, plans, opts)?;
    report.part = part;
    finish_report(&mut report)?;
    Ok(report)
}

/// Create (or check) the run directory shared by every slice of `cfg`: the
/// directory, `run.toml` and copies of the files the run reads. An existing
/// `run.toml` must describe the same run. Returns the configuration as the
/// run directory holds it.
pub fn prepare(cfg: &RunConfig, dir: &Path) -> Result<RunConfig, RunError> {
    let derr = |message: String| RunError::Directory { path: dir.to_path_buf(), message };
    std::fs::create_dir_all(dir).map_err(|e| derr(format!("cannot create: {e}")))?;
    let mut contained = self_contained(cfg, dir)?;
    let toml_path = dir.join("run.toml");
    if toml_path.exists() {
        // Other slices of the same ensemble share the directory and its
        // run.toml; the stored text stays the reference for every part file.
        let stored = std::fs::read_to_string(&toml_path).map_err(|e| derr(format!("cannot read run.toml: {e}")))?;
        let mut theirs = crate::config::load_str(&stored, "run.toml", dir, &[])?;
        theirs.effective_toml.clear();
        contained.effective_toml.clear();
        if theirs != contained {
            return Err(derr("already holds a run of a different configuration (run.toml differs); choose another directory".into()));
        }
        contained.effective_toml = stored;
    } else {
        write_new(&toml_path, contained.effective_toml.as_bytes()).map_err(|e| derr(format!("cannot write run.toml: {e}")))?;
    }
    Ok(contained)
}

/// Progress of slice (k, n) in `dir`: (trajectories ended, trajectories in
/// the slice), or `None` if its part file does not exist yet.
pub fn slice_progress(dir: &Path, k: usize, n: usize) -> Result<Option<(usize, usize)>, RunError> {
    let part = dir.join(part_name(k, n));
    if !part.exists() {
        return Ok(None);
    }
    let reader = PartReader::open(&part)?;
    let total = reader.meta().trajectories.len();
    let mut ended = 0;
    for i in reader.trajectory_indices() {
        let (_, phase) = reader.status(i)?;
        if matches!(phase, crate::ensemble::h5::Phase::Finished | crate::ensemble::h5::Phase::Failed) {
            ended += 1;
        }
    }
    Ok(Some((ended, total)))
}

/// The configuration stored in a run directory (`run.toml`), with its text
/// kept verbatim so that it matches the copy in the part files.
pub fn load_run_config(dir: &Path) -> Result<RunConfig, RunError> {
    let toml = dir.join("run.toml");
    if !toml.exists() {
        return Err(RunError::Directory { path: dir.to_path_buf(), message: "not a run directory (no run.toml)".into() });
    }
    let text = std::fs::read_to_string(&toml).map_err(|e| RunError::Directory { path: toml.clone(), message: e.to_string() })?;
    let mut cfg = crate::config::load_str(&text, &toml.display().to_string(), dir, &[])?;
    cfg.effective_toml = text;
    Ok(cfg)
}

/// Upper estimate of the part file's size for slice (k, n): every
/// trajectory running to the time limit, one row every `record_every`
/// steps (coordinates, velocities, energies, amplitudes, four scalars and the
/// step), plus 25 % for HDF5 structure.
pub fn estimated_bytes(cfg: &RunConfig, slice: (usize, usize)) -> u64 {
    let (n_dof, n_states) = (cfg.model.n_dof() as u64, cfg.model.n_states() as u64);
    let steps = (cfg.settings.max_time / cfg.settings.dt).ceil() as u64;
    let rows = steps / cfg.output.record_every + 2;
    let row_bytes = 8 * (2 * n_dof + n_states + 5) + 4 + 16 * n_states;
    let trajectories = slice_indices(cfg.trajectories, slice.0, slice.1).len() as u64;
    trajectories * rows * row_bytes * 5 / 4
}

/// Free space (bytes) on the file system that will hold `dir`.
fn free_bytes(dir: &Path) -> Option<u64> {
    use std::os::unix::ffi::OsStrExt;
    let probe = dir.ancestors().find(|p| p.exists())?;
    let probe = if probe.as_os_str().is_empty() { Path::new(".") } else { probe };
    let c = std::ffi::CString::new(probe.as_os_str().as_bytes()).ok()?;
    let mut st: libc::statvfs = unsafe { std::mem::zeroed() };
    // SAFETY: `c` is a valid NUL-terminated path and `st` a valid out-pointer.
    let rc = unsafe { libc::statvfs(c.as_ptr(), &mut st) };
    (rc == 0).then(|| st.f_bavail as u64 * st.f_frsize as u64)
}

fn human(bytes: u64) -> String {
    let b = bytes as f64;
    match b {
        b if b >= 1e12 => format!("{:.1} TB", b / 1e12),
        b if b >= 1e9 => format!("{:.1} GB", b / 1e9),
        b if b >= 1e6 => format!("{:.1} MB", b / 1e6),
        _ => format!("{:.0} kB", b / 1e3),
    }
}

/// The name under which an LVC model file is copied into the run directory.
pub const MODEL_COPY: &str = "lvc-model.toml";

/// The name under which a molecule's geometry file is copied into the run directory.
pub const GEOMETRY_COPY: &str = "molecule.xyz";

/// The name under which an initial-conditions file is copied into the run directory.
pub const INITIAL_CONDITIONS_COPY: &str = "initial-conditions.h5";

/// A run directory must not depend on files outside it: an LVC model file,
/// a molecule's geometry and an initial-conditions file are copied in and
/// `model.file`, `model.geometry` and `start.initial_conditions` rewritten
/// to point at the copies.
fn self_contained(cfg: &RunConfig, dir: &Path) -> Result<RunConfig, RunError> {
    let mut sets = Vec::new();
    if let crate::config::ModelSpec::Lvc { path, .. } = &cfg.model {
        let copy = dir.join(MODEL_COPY);
        if !copy.exists() {
            std::fs::copy(path, &copy).map_err(|e| RunError::Directory { path: copy.clone(), message: format!("cannot copy the LVC model {}: {e}", path.display()) })?;
        }
        sets.push(format!("model.file=\"{MODEL_COPY}\""));
    }
    if let crate::config::ModelSpec::Molecule { path, .. } = &cfg.model {
        let copy = dir.join(GEOMETRY_COPY);
        if !copy.exists() {
            std::fs::copy(path, &copy).map_err(|e| RunError::Directory { path: copy.clone(), message: format!("cannot copy the geometry {}: {e}", path.display()) })?;
        }
        sets.push(format!("model.geometry=\"{GEOMETRY_COPY}\""));
    }
    if let crate::config::Sampling::File { path, .. } = &cfg.sampling {
        let copy = dir.join(INITIAL_CONDITIONS_COPY);
        if !copy.exists() {
            std::fs::copy(path, &copy).map_err(|e| RunError::Directory { path: copy.clone(), message: format!("cannot copy the initial conditions {}: {e}", path.display()) })?;
        }
        sets.push(format!("start.initial_conditions=\"{INITIAL_CONDITIONS_COPY}\""));
    }
    if sets.is_empty() {
        return Ok(cfg.clone());
    }
    let effective = crate::config::Reader::parse(&cfg.effective_toml, "run.toml", &sets)?.effective_text();
    let mut out = crate::config::load_str(&effective, "run.toml", dir, &[])?;
    out.effective_toml = effective;
    Ok(out)
}

fn write_new(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    use std::io::Write;
    let mut f = std::fs::OpenOptions::new().write(true).create_new(true).open(path)?;
    f.write_all(bytes)?;
    f.sync_all()
}

/// Continue every unfinished trajectory of slice (k, n) in `dir`.
///
/// A part file left "open" by a killed writer may hold rows beyond its last
/// flush, with dataset lengths that disagree. It is never appended to:
/// resume rebuilds it, copying finished trajectories that read back
/// completely and, of the others, exactly the rows their checkpoints vouch
/// for, into a new file that replaces it. A cleanly closed file is
/// continued in place, truncated to the checkpoints.
pub fn resume(cfg: &RunConfig, dir: &Path, slice: (usize, usize), opts: &Options) -> Result<RunReport, RunError> {
    let (k, n) = slice;
    let part = dir.join(part_name(k, n));
    let killed_copy = with_suffix(&part, ".killed");
    if !part.exists() && killed_copy.exists() {
        // A rebuild was interrupted between its two renames: take the original back.
        std::fs::rename(&killed_copy, &part).map_err(|e| RunError::Directory { path: part.clone(), message: e.to_string() })?;
    }
    if !part.exists() {
        if !dir.join("run.toml").exists() {
            return Err(RunError::Directory { path: dir.to_path_buf(), message: "not a run directory (no run.toml)".into() });
        }
        // Stopped before its part file existed: nothing was computed yet.
        tracing::info!("{}: not written yet (the run stopped before it began); starting slice {k}/{n}", part.display());
        return start(cfg, dir, slice, opts);
    }
    let reader = match PartReader::open(&part) {
        Ok(r) => r,
        Err(e) => {
            // Unreadable (e.g. killed while being created): nothing in it can
            // be trusted, and the checkpoints' rows were in it. Keep it aside,
            // say so, and compute the slice again (deterministically the same).
            let aside = with_suffix(&part, &format!(".unreadable-{}", std::process::id()));
            tracing::warn!("{e}; moving it to {} and computing slice {k}/{n} again from the start", aside.display());
            std::fs::rename(&part, &aside).map_err(|e| RunError::Directory { path: part.clone(), message: e.to_string() })?;
            let ckpt_dir = checkpoint_dir(dir, k);
            let _ = std::fs::remove_dir_all(&ckpt_dir);
            return start(cfg, dir, slice, opts);
        }
    };
    let meta = reader.meta().clone();
    if meta.config_toml != cfg.effective_toml {
        return Err(RunError::Directory { path: part, message: "was written with a different configuration than run.toml".into() });
    }
    let killed = reader.writer_state() == WriterState::Open;
    if killed {
        tracing::warn!("{}: its writer was killed; rebuilding it from the data that checkpoints and finished trajectories vouch for", part.display());
    }
    let ckpt_dir = checkpoint_dir(dir, k);
    std::fs::create_dir_all(&ckpt_dir).map_err(|e| RunError::Directory { path: ckpt_dir.clone(), message: e.to_string() })?;
    let present = reader.trajectory_indices();
    let mut plans = Vec::new();
    let mut keep: Vec<(usize, Keep)> = Vec::new();
    let (mut from_prev, mut from_ckpt) = (0, 0);
    for &index in &meta.trajectories {
        let status = if present.binary_search(&index).is_ok() { Some(reader.status(index)?.0) } else { None };
        let ended = matches!(status, Some(Status::Finished(_) | Status::Failed { .. }));
        if ended && !killed {
            keep.push((index, Keep::Whole));
            continue;
        }
        let (best, problems) = checkpoint::read_best(&checkpoint::path_for(&ckpt_dir, index));
        for p in &problems {
            tracing::warn!("{p}");
        }
        if ended && best.is_none() {
            // Ended with its checkpoints removed, which happens only after the
            // flush that wrote its end; still, trust it only if it reads back whole.
            match reader.read(index) {
                Ok(_) => {
                    keep.push((index, Keep::Whole));
                    continue;
                }
                Err(e) => tracing::warn!("trajectory {index}: {e}; recomputing it from its start"),
            }
        }
        match best {
            Some((c, source)) => {
                if source == Source::Previous {
                    tracing::warn!("trajectory {index}: resuming from the previous checkpoint (step {}): the newest was missing or damaged", c.state.step);
                    from_prev += 1;
                }
                from_ckpt += 1;
                keep.push((index, Keep::Prefix(c.rows_written, c.hops_written)));
                plans.push((index, Plan::FromCheckpoint(Box::new(c))));
            }
            None => {
                if status.is_some() {
                    keep.push((index, Keep::Prefix(0, 0)));
                    if !problems.is_empty() {
                        tracing::warn!("trajectory {index}: no usable checkpoint; recomputing it from its start");
                    }
                }
                plans.push((index, Plan::Fresh));
            }
        }
    }
    let writer = if killed {
        rebuild(&reader, &part, &keep)?;
        drop(reader);
        PartWriter::open_existing(&part)?.0
    } else {
        drop(reader);
        let (mut w, _) = PartWriter::open_existing(&part)?;
        for (index, what) in &keep {
            if let Keep::Prefix(rows, hops) = what {
                w.truncate(*index, *rows, *hops)?;
            }
        }
        w.flush()?;
        w
    };
    tracing::info!("resuming {} of {} trajectories ({} from checkpoints)", plans.len(), meta.trajectories.len(), from_ckpt);
    let mut report = execute(cfg, dir, k, writer, plans, opts)?;
    report.part = part;
    report.resumed_from_checkpoint = from_ckpt;
    report.resumed_from_previous = from_prev;
    finish_report(&mut report)?;
    Ok(report)
}

/// What resume keeps of a trajectory already in the part file.
enum Keep {
    /// Everything (it ended and reads back completely).
    Whole,
    /// The first rows and hops (what its checkpoint covers; (0, 0) to recompute).
    Prefix(u64, u64),
}

/// Write the trustworthy content of a killed writer's part file into a new
/// file and put it in the old one's place (the old one is kept as
/// `*.killed` until the new one is in place).
fn rebuild(reader: &PartReader, part: &Path, keep: &[(usize, Keep)]) -> Result<(), RunError> {
    let tmp = with_suffix(part, ".rebuild");
    let _ = std::fs::remove_file(&tmp);
    let mut w = PartWriter::create(&tmp, reader.meta())?;
    for (index, what) in keep {
        let data = match what {
            Keep::Whole => reader.read(*index)?,
            Keep::Prefix(0, 0) => continue,
            Keep::Prefix(rows, hops) => reader.read_prefix(*index, *rows, *hops)?,
        };
        w.begin(&data.header)?;
        w.append(*index, &data.rows, &data.hops)?;
        if let Keep::Whole = what {
            w.set_status(*index, &data.status)?;
        }
    }
    w.close()?;
    let io = |e: std::io::Error| RunError::Directory { path: part.to_path_buf(), message: format!("replacing it with its rebuilt copy: {e}") };
    let killed_copy = with_suffix(part, ".killed");
    std::fs::rename(part, &killed_copy).map_err(io)?;
    std::fs::rename(&tmp, part).map_err(io)?;
    let _ = std::fs::remove_file(&killed_copy);
    Ok(())
}

fn finish_report(report: &mut RunReport) -> Result<(), RunError> {
    let reader = PartReader::open(&report.part)?;
    let (mut finished, mut failed, mut unfinished) = (0, 0, 0);
    for i in reader.trajectory_indices() {
        match reader.summary(i)?.status {
            Status::Finished(_) => finished += 1,
            Status::Failed { .. } => failed += 1,
            Status::Running => unfinished += 1,
        }
    }
    let absent = reader.meta().trajectories.len() - reader.trajectory_indices().len();
    report.finished = finished;
    report.failed = failed;
    report.stopped = unfinished;
    report.pending = absent;
    Ok(())
}

fn execute(cfg: &RunConfig, dir: &Path, k: usize, writer: PartWriter, plans: Vec<(usize, Plan)>, opts: &Options) -> Result<RunReport, RunError> {
    // Bounded: when the writer falls behind, trajectories wait for it instead
    // of piling rows up in memory.
    let (tx, rx) = mpsc::sync_channel(256);
    let writer_thread = std::thread::spawn(move || writer_loop(writer, rx));
    let session = Session { cfg, factory: opts.factory, ckpt_dir: checkpoint_dir(dir, k), stop: &opts.stop };
    let pool = rayon::ThreadPoolBuilder::new().num_threads(opts.threads).build().map_err(|e| RunError::Threads(e.to_string()))?;
    let progress = Progress::new(plans.len(), opts.progress_bar);
    let errors: Mutex<Vec<String>> = Mutex::new(Vec::new());
    pool.install(|| {
        plans.into_par_iter().for_each(|(index, plan)| match session.run_one(index, plan, tx.clone()) {
            Ok(Ended::Done) => progress.tick(),
            Ok(Ended::Stopped | Ended::Skipped) => {}
            Err(e) => {
                errors.lock().unwrap_or_else(|p| p.into_inner()).push(e);
                // Without a working writer nothing more can be saved: stop cleanly.
                opts.stop.store(true, Ordering::Relaxed);
            }
        })
    });
    drop(tx);
    progress.finish();
    let written = writer_thread.join().map_err(|_| RunError::Writer("the writer thread panicked".into()))?;
    written.map_err(RunError::Writer)?;
    if let Some(e) = errors.into_inner().unwrap_or_else(|p| p.into_inner()).into_iter().next() {
        return Err(RunError::Writer(e));
    }
    Ok(RunReport::default())
}


