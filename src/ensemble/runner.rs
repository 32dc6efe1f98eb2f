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
//! by rayon, buffer their rows in columns ([`RowBlock`]) and send them in
//! blocks (at each checkpoint, and whenever a block passes
//! [`BLOCK_BYTES`]). A trajectory checkpoints by handing its rows together
//! with its state to the writer and going on at once: the writer appends
//! the rows, and at its next commit — as soon as its queue is empty —
//! flushes the part file, syncs it to disk and only then writes the
//! checkpoint files (newest per trajectory; older ones still queued are
//! superseded), so a checkpoint never claims rows that are not on disk and
//! the trajectories never wait for the disk. A killed process loses at most
//! the steps after the last checkpoint that reached the disk. On resume, rows beyond a checkpoint are
//! truncated and recomputed; because every trajectory is deterministic given
//! its state, generator and snapshot, the continued trajectory is bit-for-bit
//! the one that never stopped.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{self, RecvTimeoutError, SyncSender};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use rayon::prelude::*;

use super::checkpoint::{self, with_suffix, Checkpoint, Source};
use super::h5::{now_rfc3339, Counts, EnsembleError, PartReader, PartWriter, WriterState};
use super::record::{PartMeta, RowBlock, TrajectoryHeader, WarningRow};
use crate::config::RunConfig;
use crate::dynamics::{
    Flow, Hop, Observer, RecordKind, Status, StepRecord, Trajectory, TrajectoryState,
};
use crate::electronic::{Backend, Snapshot};
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

/// A trajectory sends its buffered rows to the writer every this many rows,
/// checkpoint or not (bounds the memory of long checkpoint intervals). A
/// multiple of the datasets' chunk length (256 rows), so that the writer
/// fills whole chunks and never reads a partial one back.
pub const BLOCK_ROWS: usize = 1024;

/// … or once they pass this size (very wide rows).
pub const BLOCK_BYTES: usize = 8 << 20;

/// The writer commits (flush, sync, checkpoint files) at the latest after
/// this many queued checkpoints, even if its queue never empties.
const COMMIT_AFTER_CHECKPOINTS: usize = 256;

/// A checkpoint handed to the writer: written once its rows are on disk.
struct PendingCheckpoint {
    path: PathBuf,
    state: TrajectoryState,
    snapshot: Snapshot,
}

/// What a trajectory hands the writer in one message.
struct Batch {
    index: usize,
    rows: RowBlock,
    hops: Vec<Hop>,
    warnings: Vec<WarningRow>,
}

/// Messages to the writer thread.
enum ToWriter {
    Begin(TrajectoryHeader),
    /// Append rows; with a checkpoint, write it at the next commit.
    Append {
        batch: Batch,
        checkpoint: Option<Box<PendingCheckpoint>>,
    },
    /// Final rows and status; the checkpoint files are removed after the next commit.
    Finish {
        batch: Batch,
        status: Status,
        checkpoint: PathBuf,
    },
    /// Final rows and checkpoint of a stopped trajectory: commit at once and answer.
    Stop {
        batch: Batch,
        checkpoint: Box<PendingCheckpoint>,
        ack: SyncSender<Result<(), String>>,
    },
}

/// Emptied row blocks, handed back by the writer so that trajectories
/// reuse their buffers (no allocation and page faults per block).
type BlockPool = Arc<Mutex<Vec<RowBlock>>>;

/// Blocks kept in the pool at most.
const POOL_BLOCKS: usize = 64;

/// The writer thread's state.
struct WriterLoop {
    pool: BlockPool,
    w: PartWriter,
    /// The newest checkpoint per trajectory not yet written, with the counts it covers.
    pending: BTreeMap<usize, (Box<PendingCheckpoint>, Counts)>,
    /// Checkpoints of ended trajectories, removed at the next commit.
    to_remove: Vec<PathBuf>,
    dirty: bool,
    queued_checkpoints: usize,
    failure: Option<String>,
    stop: Arc<AtomicBool>,
    last_flush: Instant,
}

impl WriterLoop {
    /// Appends a batch; the counts the file then holds (the writer keeps
    /// them after an append, so this reads nothing back).
    fn append(&mut self, b: &Batch) -> Result<Counts, String> {
        self.dirty = true;
        if !(b.rows.is_empty() && b.hops.is_empty() && b.warnings.is_empty()) {
            self.w
                .append_block(b.index, &b.rows, &b.hops, &b.warnings)
                .map_err(|e| e.to_string())?;
        }
        self.w.all_counts(b.index).map_err(|e| e.to_string())
    }

    /// Return a written block's buffers to the pool.
    fn recycle(&self, mut rows: RowBlock) {
        if rows.q.capacity() == 0 {
            return;
        }
        rows.clear();
        let mut pool = self.pool.lock().unwrap_or_else(|p| p.into_inner());
        if pool.len() < POOL_BLOCKS {
            pool.push(rows);
        }
    }

    fn handle(&mut self, msg: ToWriter) -> Result<(), String> {
        let msg = match msg {
            ToWriter::Append { batch, checkpoint } => {
                let r = self.handle_append(&batch, checkpoint);
                self.recycle(batch.rows);
                return r;
            }
            other => other,
        };
        match msg {
            ToWriter::Begin(h) => {
                self.dirty = true;
                self.w.begin(&h).map_err(|e| e.to_string())
            }
            ToWriter::Append { .. } => unreachable!("handled above"),
            ToWriter::Finish {
                batch,
                status,
                checkpoint,
            } => {
                self.append(&batch)?;
                self.w
                    .set_status(batch.index, &status)
                    .map_err(|e| e.to_string())?;
                // A checkpoint still queued is superseded by the end itself.
                self.pending.remove(&batch.index);
                self.to_remove.push(checkpoint);
                Ok(())
            }
            ToWriter::Stop {
                batch,
                checkpoint,
                ack,
            } => {
                let result = (|| {
                    let c = self.append(&batch)?;
                    self.w
                        .mark_stopped(batch.index)
                        .map_err(|e| e.to_string())?;
                    self.pending.insert(batch.index, (checkpoint, c));
                    self.commit()
                })();
                let _ = ack.send(result.clone());
                result
            }
        }
    }

    fn handle_append(
        &mut self,
        batch: &Batch,
        checkpoint: Option<Box<PendingCheckpoint>>,
    ) -> Result<(), String> {
        let c = self.append(batch)?;
        if let Some(ck) = checkpoint {
            self.pending.insert(batch.index, (ck, c));
            self.queued_checkpoints += 1;
        }
        Ok(())
    }

    /// Flush the part file; when checkpoints are queued, sync it to disk and
    /// write them; remove the checkpoints of ended trajectories.
    fn commit(&mut self) -> Result<(), String> {
        self.commit_if(false)
    }

    /// [`WriterLoop::commit`]; unless `force`, only when checkpoints are
    /// queued or the last flush is 2 s old (removing the checkpoints of
    /// ended trajectories can wait: until then a resume recomputes them from
    /// the checkpoint, to the same result).
    fn commit_if(&mut self, force: bool) -> Result<(), String> {
        if let Some(e) = &self.failure {
            return Err(e.clone());
        }
        if !self.dirty && self.pending.is_empty() && self.to_remove.is_empty() {
            return Ok(());
        }
        if !force && self.pending.is_empty() && self.last_flush.elapsed() < Duration::from_secs(2) {
            // Rows that no checkpoint vouches for need no flush yet.
            return Ok(());
        }
        self.last_flush = Instant::now();
        self.w.flush().map_err(|e| e.to_string())?;
        if !self.pending.is_empty() {
            self.w.sync().map_err(|e| e.to_string())?;
            let batch: Vec<(PathBuf, Checkpoint)> = std::mem::take(&mut self.pending)
                .into_iter()
                .map(|(index, (ck, c))| {
                    let PendingCheckpoint {
                        path,
                        state,
                        snapshot,
                    } = *ck;
                    let ckpt = Checkpoint {
                        format: checkpoint::FORMAT.into(),
                        version: 1,
                        index,
                        rows_written: c.rows,
                        hops_written: c.hops,
                        warnings_written: c.warnings,
                        state,
                        snapshot,
                    };
                    (path, ckpt)
                })
                .collect();
            checkpoint::write_batch(&batch).map_err(|e| e.to_string())?;
        }
        for p in self.to_remove.drain(..) {
            checkpoint::remove(&p);
        }
        self.dirty = false;
        self.queued_checkpoints = 0;
        Ok(())
    }

    fn fail(&mut self, e: String) {
        if self.failure.is_none() {
            tracing::error!("writing {} failed: {e}; stopping every trajectory (resumable from its last checkpoint)", self.w.path().display());
            self.failure = Some(e);
            self.pending.clear();
            self.to_remove.clear();
        }
        // Nothing more can be saved: every trajectory stops at its next step.
        self.stop.store(true, Ordering::Relaxed);
    }
}

fn writer_loop(
    w: PartWriter,
    rx: mpsc::Receiver<ToWriter>,
    stop: Arc<AtomicBool>,
    pool: BlockPool,
) -> Result<(), String> {
    let mut st = WriterLoop {
        pool,
        w,
        pending: BTreeMap::new(),
        to_remove: Vec::new(),
        dirty: false,
        queued_checkpoints: 0,
        failure: None,
        stop,
        last_flush: Instant::now(),
    };
    loop {
        let msg = match rx.try_recv() {
            Ok(m) => m,
            Err(mpsc::TryRecvError::Disconnected) => break,
            Err(mpsc::TryRecvError::Empty) => {
                // Idle: commit what came so far, then wait.
                if st.failure.is_none() {
                    if let Err(e) = st.commit() {
                        st.fail(e);
                    }
                }
                match rx.recv_timeout(Duration::from_millis(500)) {
                    Ok(m) => m,
                    Err(RecvTimeoutError::Timeout) => continue,
                    Err(RecvTimeoutError::Disconnected) => break,
                }
            }
        };
        if st.failure.is_some() {
            // Write nothing more; answer stops with the failure.
            if let ToWriter::Stop { ack, .. } = msg {
                let _ = ack.send(Err(st.failure.clone().unwrap_or_default()));
            }
            continue;
        }
        if let Err(e) = st.handle(msg) {
            st.fail(e);
            continue;
        }
        if st.queued_checkpoints >= COMMIT_AFTER_CHECKPOINTS {
            if let Err(e) = st.commit() {
                st.fail(e);
            }
        }
    }
    if st.failure.is_none() {
        if let Err(e) = st.commit_if(true) {
            st.fail(e);
        }
    }
    match st.failure {
        // Not closed: `writer_state` stays "open", so resume rebuilds the
        // file from what the checkpoints vouch for.
        Some(e) => Err(e),
        None => st.w.close().map_err(|e| e.to_string()),
    }
}

/// Reads the clock for the time-based checkpoint cadence about once per
/// millisecond of trajectory time rather than at every step: a model step
/// can take a few microseconds, and a clock read per step was a measurable
/// share of the writer's overhead on the trajectory thread. Slow (molecular)
/// steps read it at every step.
struct ClockStride {
    /// Steps between clock reads.
    stride: u64,
    /// The step and time of the last read.
    last: Option<(u64, Instant)>,
}

impl ClockStride {
    /// Aim for a read per this much wall time.
    const TARGET: Duration = Duration::from_millis(1);
    /// At most this many steps between reads.
    const MAX_STRIDE: u64 = 64;

    fn new() -> Self {
        Self {
            stride: 1,
            last: None,
        }
    }

    /// The time at `step` when a read is due there, else `None`; adapts the
    /// stride to the measured time per step.
    fn read(&mut self, step: u64) -> Option<Instant> {
        self.read_with(step, Instant::now)
    }

    /// [`ClockStride::read`] with the clock given.
    fn read_with(&mut self, step: u64, clock: impl FnOnce() -> Instant) -> Option<Instant> {
        if let Some((last, _)) = self.last {
            if step.saturating_sub(last) < self.stride {
                return None;
            }
        }
        let now = clock();
        if let Some((last, then)) = self.last {
            let steps = u32::try_from(step.saturating_sub(last).max(1)).unwrap_or(u32::MAX);
            let per_step = now.saturating_duration_since(then) / steps;
            self.stride = match per_step.as_nanos() {
                0 => Self::MAX_STRIDE,
                ns => (Self::TARGET.as_nanos() / ns).clamp(1, Self::MAX_STRIDE as u128) as u64,
            };
        }
        self.last = Some((step, now));
        Some(now)
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
    clock: ClockStride,
    rows: RowBlock,
    hops: Vec<Hop>,
    warnings: Vec<WarningRow>,
    last_recorded_step: Option<u64>,
    resumed: bool,
    writer: SyncSender<ToWriter>,
    checkpoint_path: PathBuf,
    stop: &'a AtomicBool,
    stopped: bool,
    row_bytes: usize,
    pool: BlockPool,
}

impl Recorder<'_> {
    fn record(&mut self, rec: &StepRecord) {
        let s = rec.state;
        if self.last_recorded_step != Some(s.step) {
            let kinetic = s.kinetic(rec.masses);
            self.rows.push(
                s.step,
                s.time,
                &s.q,
                &s.v,
                &s.energies,
                s.active as u32,
                &s.amplitudes,
                kinetic,
                s.potential(),
                &s.diagnostics,
            );
            self.last_recorded_step = Some(s.step);
        }
    }

    fn take_batch(&mut self) -> Batch {
        let recycled = self.pool.lock().unwrap_or_else(|p| p.into_inner()).pop();
        let fresh = match recycled {
            Some(b) if (b.n_dof, b.n_states) == (self.rows.n_dof, self.rows.n_states) => b,
            _ => RowBlock::with_capacity(
                self.rows.n_dof,
                self.rows.n_states,
                self.rows.len().clamp(16, BLOCK_ROWS),
            ),
        };
        let rows = std::mem::replace(&mut self.rows, fresh);
        Batch {
            index: self.index,
            rows,
            hops: std::mem::take(&mut self.hops),
            warnings: std::mem::take(&mut self.warnings),
        }
    }

    fn send(&self, msg: ToWriter) -> Result<(), String> {
        self.writer
            .send(msg)
            .map_err(|_| "the writer has stopped".to_string())
    }

    fn pending_checkpoint(&self, rec: &StepRecord) -> Box<PendingCheckpoint> {
        Box::new(PendingCheckpoint {
            path: self.checkpoint_path.clone(),
            state: rec.state.clone(),
            snapshot: rec.backend.snapshot(),
        })
    }

    fn checkpoint(&mut self, rec: &StepRecord) -> Result<(), String> {
        let checkpoint = Some(self.pending_checkpoint(rec));
        let batch = self.take_batch();
        self.send(ToWriter::Append { batch, checkpoint })?;
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
                    for w in &rec.state.diagnostics.warnings {
                        self.warnings.push(WarningRow {
                            step: rec.state.step,
                            text: w.clone(),
                        });
                    }
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
                for w in &rec.state.diagnostics.warnings {
                    self.warnings.push(WarningRow {
                        step: rec.state.step,
                        text: w.clone(),
                    });
                }
                // Checkpoints and stops add no rows of their own: the rows
                // follow the `record_every` cadence whatever happens, so a
                // stopped and resumed trajectory writes exactly the rows of
                // one that never stopped.
                if self.stop.load(Ordering::Relaxed) {
                    let (ack, answer) = mpsc::sync_channel(1);
                    let checkpoint = self.pending_checkpoint(rec);
                    let batch = self.take_batch();
                    self.send(ToWriter::Stop {
                        batch,
                        checkpoint,
                        ack,
                    })?;
                    answer
                        .recv()
                        .map_err(|_| "the writer has stopped".to_string())??;
                    self.stopped = true;
                    return Ok(Flow::Stop);
                }
                let by_steps = self.checkpoint_every > 0
                    && rec.state.step - self.last_checkpoint_step >= self.checkpoint_every;
                let by_time = self
                    .clock
                    .read(rec.state.step)
                    .is_some_and(|now| now - self.last_checkpoint >= self.checkpoint_interval);
                if by_steps || by_time {
                    self.checkpoint(rec)?;
                } else if self.rows.len() >= BLOCK_ROWS
                    || self.rows.len() * self.row_bytes >= BLOCK_BYTES
                {
                    // A block of rows without a checkpoint: written, but only
                    // vouched for by the next checkpoint.
                    let batch = self.take_batch();
                    self.send(ToWriter::Append {
                        batch,
                        checkpoint: None,
                    })?;
                }
                Ok(Flow::Continue)
            }
            RecordKind::End => {
                self.record(rec);
                let batch = self.take_batch();
                let msg = ToWriter::Finish {
                    batch,
                    status: rec.state.status.clone(),
                    checkpoint: self.checkpoint_path.clone(),
                };
                self.send(msg)?;
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
    pool: BlockPool,
    cfg: &'a RunConfig,
    factory: &'a BackendFactory<'a>,
    ckpt_dir: PathBuf,
    stop: &'a AtomicBool,
}

impl Session<'_> {
    fn run_one(
        &self,
        index: usize,
        plan: Plan,
        writer: SyncSender<ToWriter>,
    ) -> Result<Ended, String> {
        if self.stop.load(Ordering::Relaxed) {
            return Ok(Ended::Skipped);
        }
        let mut backend = (self.factory)(index);
        let path = checkpoint::path_for(&self.ckpt_dir, index);
        let out = &self.cfg.output;
        let (n_dof, n_states) = (self.cfg.model.n_dof(), self.cfg.model.n_states());
        let mut rec = Recorder {
            index,
            every: out.record_every,
            checkpoint_every: out.checkpoint_every,
            checkpoint_interval: Duration::from_secs_f64(out.checkpoint_interval_s),
            last_checkpoint: Instant::now(),
            last_checkpoint_step: 0,
            clock: ClockStride::new(),
            // A block from the pool, or one with room for a whole block: no
            // growth (reallocation, copying, page faults) while recording.
            rows: match self.pool.lock().unwrap_or_else(|p| p.into_inner()).pop() {
                Some(b) if (b.n_dof, b.n_states) == (n_dof, n_states) => b,
                _ => RowBlock::with_capacity(
                    n_dof,
                    n_states,
                    BLOCK_ROWS.min(
                        BLOCK_BYTES / (8 * (2 * n_dof + 2 * n_states + 6) + 16 * n_states).max(1),
                    ),
                ),
            },
            hops: Vec::new(),
            warnings: Vec::new(),
            last_recorded_step: None,
            resumed: false,
            writer: writer.clone(),
            checkpoint_path: path.clone(),
            stop: self.stop,
            stopped: false,
            row_bytes: 8 * (2 * n_dof + 2 * n_states + 6) + 16 * n_states,
            pool: self.pool.clone(),
        };
        let masses = backend.info().masses;
        let mut traj = match plan {
            Plan::Fresh => {
                let (q, v, state) = swarm::initial_condition(self.cfg, &masses, index);
                let header = TrajectoryHeader {
                    index,
                    q0: q.clone(),
                    v0: v.clone(),
                    initial_state: state,
                    seed: self.cfg.seed,
                };
                writer
                    .send(ToWriter::Begin(header))
                    .map_err(|_| "the writer has stopped".to_string())?;
                let rng = swarm::trajectory_rng(self.cfg.seed, index, 1);
                match Trajectory::start(
                    backend.as_mut(),
                    self.cfg.settings.clone(),
                    q,
                    v,
                    state,
                    rng,
                ) {
                    Ok(t) => t,
                    Err(e) => {
                        let status = Status::Failed {
                            step: 0,
                            reason: e.to_string(),
                        };
                        let batch = Batch {
                            index,
                            rows: RowBlock::new(n_dof, n_states),
                            hops: vec![],
                            warnings: vec![],
                        };
                        writer
                            .send(ToWriter::Finish {
                                batch,
                                status,
                                checkpoint: path,
                            })
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
        Ok(if rec.stopped {
            Ended::Stopped
        } else {
            Ended::Done
        })
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
pub fn start(
    cfg: &RunConfig,
    dir: &Path,
    slice: (usize, usize),
    opts: &Options,
) -> Result<RunReport, RunError> {
    let (k, n) = slice;
    let derr = |message: String| RunError::Directory {
        path: dir.to_path_buf(),
        message,
    };
    if dir.join(part_name(k, n)).exists() {
        return Err(derr(format!("already holds a run of slice {k}/{n}; use `flipswarm resume` to continue it, or choose another directory")));
    }
    let est = disk_estimate(cfg, slice);
    if let Some(free) = free_bytes(dir) {
        tracing::info!("expected size of the part file: {}, of the checkpoints: {}, free on its file system: {}", human(est.part_bytes), human(est.checkpoint_bytes), human(free));
        if est.total() > free {
            return Err(derr(format!(
                "the run would need about {} but only {} are free: the part file {} trajectories × {} rows × {} datasets ({} bytes per row) ≈ {}, checkpoints ≈ {}; raise output.record_every_steps, run fewer trajectories per slice or free space",
                human(est.total()),
                human(free),
                est.trajectories,
                est.rows_per_trajectory,
                est.datasets,
                est.row_bytes,
                human(est.part_bytes),
                human(est.checkpoint_bytes)
            )));
        }
    }
    std::fs::create_dir_all(checkpoint_dir(dir, k))
        .map_err(|e| derr(format!("cannot create: {e}")))?;
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
    let derr = |message: String| RunError::Directory {
        path: dir.to_path_buf(),
        message,
    };
    std::fs::create_dir_all(dir).map_err(|e| derr(format!("cannot create: {e}")))?;
    let mut contained = self_contained(cfg, dir)?;
    let toml_path = dir.join("run.toml");
    if toml_path.exists() {
        // Other slices of the same ensemble share the directory and its
        // run.toml; the stored text stays the reference for every part file.
        let stored = std::fs::read_to_string(&toml_path)
            .map_err(|e| derr(format!("cannot read run.toml: {e}")))?;
        let mut theirs = crate::config::load_str(&stored, "run.toml", dir, &[])?;
        theirs.effective_toml.clear();
        contained.effective_toml.clear();
        if theirs != contained {
            return Err(derr("already holds a run of a different configuration (run.toml differs); choose another directory".into()));
        }
        contained.effective_toml = stored;
    } else {
        write_new(&toml_path, contained.effective_toml.as_bytes())
            .map_err(|e| derr(format!("cannot write run.toml: {e}")))?;
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
        if matches!(
            phase,
            crate::ensemble::h5::Phase::Finished | crate::ensemble::h5::Phase::Failed
        ) {
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
        return Err(RunError::Directory {
            path: dir.to_path_buf(),
            message: "not a run directory (no run.toml)".into(),
        });
    }
    let text = std::fs::read_to_string(&toml).map_err(|e| RunError::Directory {
        path: toml.clone(),
        message: e.to_string(),
    })?;
    let mut cfg = crate::config::load_str(&text, &toml.display().to_string(), dir, &[])?;
    cfg.effective_toml = text;
    Ok(cfg)
}

/// What a run of one slice will write at most, before it starts.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct DiskEstimate {
    /// Trajectories of the slice.
    pub trajectories: u64,
    /// Rows per trajectory if it runs to the time limit (steps / record_every + 2).
    pub rows_per_trajectory: u64,
    /// Per-step datasets of a trajectory.
    pub datasets: u64,
    /// Bytes of one row over all those datasets.
    pub row_bytes: u64,
    /// The part file: trajectories × rows × row bytes, plus 25 % for HDF5 structure.
    pub part_bytes: u64,
    /// Checkpoint files at their peak (newest, previous and temporary copy of every trajectory).
    pub checkpoint_bytes: u64,
}

impl DiskEstimate {
    /// Everything together.
    pub fn total(&self) -> u64 {
        self.part_bytes.saturating_add(self.checkpoint_bytes)
    }
}

/// Upper estimate of what slice (k, n) writes: every trajectory running to
/// the time limit, one row every `record_every` steps in each of the 13
/// per-step datasets (time, step, coordinates, velocities, energies, active
/// state, amplitudes, three energies, two solver counts, <S²>), in whole
/// chunks, plus 25 % and 64 KiB per trajectory for HDF5 structure; and its checkpoint files (JSON, about 26 bytes per
/// number, three files per trajectory at the peak).
pub fn disk_estimate(cfg: &RunConfig, slice: (usize, usize)) -> DiskEstimate {
    let (n_dof, n_states) = (cfg.model.n_dof() as u64, cfg.model.n_states() as u64);
    let steps = (cfg.settings.max_time / cfg.settings.dt).ceil().min(1e18) as u64;
    let rows = steps / cfg.output.record_every + 2;
    let row_bytes = 8 * (2 * n_dof + n_states + 5) + 4 + 16 * n_states + 8 + 8 * n_states;
    let trajectories = slice_indices(cfg.trajectories, slice.0, slice.1).len() as u64;
    // Chunks are allocated whole (256 rows), and every trajectory has its
    // group, 25 dataset headers and the first chunks of its hop and warning
    // tables (about 64 KiB whatever its length).
    let rows_allocated = rows.div_ceil(256).saturating_mul(256);
    let per_trajectory = rows_allocated.saturating_mul(row_bytes) / 4 * 5 + 64 * 1024;
    let part_bytes = trajectories
        .saturating_mul(per_trajectory)
        .saturating_add(64 * 1024);
    let numbers = 5 * n_dof + 6 * n_states + n_states * n_states + 64;
    let checkpoint_bytes = trajectories.saturating_mul(3 * (26 * numbers + 1024));
    DiskEstimate {
        trajectories,
        rows_per_trajectory: rows,
        datasets: 13,
        row_bytes,
        part_bytes,
        checkpoint_bytes,
    }
}

/// Upper estimate of the part file's size for slice (k, n) (see [`disk_estimate`]).
pub fn estimated_bytes(cfg: &RunConfig, slice: (usize, usize)) -> u64 {
    disk_estimate(cfg, slice).part_bytes
}

/// Free space (bytes) on the file system that will hold `dir`.
fn free_bytes(dir: &Path) -> Option<u64> {
    use std::os::unix::ffi::OsStrExt;
    let probe = dir.ancestors().find(|p| p.exists())?;
    let probe = if probe.as_os_str().is_empty() {
        Path::new(".")
    } else {
        probe
    };
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
            std::fs::copy(path, &copy).map_err(|e| RunError::Directory {
                path: copy.clone(),
                message: format!("cannot copy the LVC model {}: {e}", path.display()),
            })?;
        }
        sets.push(format!("model.file=\"{MODEL_COPY}\""));
    }
    if let crate::config::ModelSpec::Molecule { path, .. } = &cfg.model {
        let copy = dir.join(GEOMETRY_COPY);
        if !copy.exists() {
            std::fs::copy(path, &copy).map_err(|e| RunError::Directory {
                path: copy.clone(),
                message: format!("cannot copy the geometry {}: {e}", path.display()),
            })?;
        }
        sets.push(format!("model.geometry=\"{GEOMETRY_COPY}\""));
    }
    if let crate::config::Sampling::File { path, .. } = &cfg.sampling {
        let copy = dir.join(INITIAL_CONDITIONS_COPY);
        if !copy.exists() {
            std::fs::copy(path, &copy).map_err(|e| RunError::Directory {
                path: copy.clone(),
                message: format!("cannot copy the initial conditions {}: {e}", path.display()),
            })?;
        }
        sets.push(format!(
            "start.initial_conditions=\"{INITIAL_CONDITIONS_COPY}\""
        ));
    }
    if sets.is_empty() {
        return Ok(cfg.clone());
    }
    let effective =
        crate::config::Reader::parse(&cfg.effective_toml, "run.toml", &sets)?.effective_text();
    let mut out = crate::config::load_str(&effective, "run.toml", dir, &[])?;
    out.effective_toml = effective;
    Ok(out)
}

fn write_new(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    use std::io::Write;
    let mut f = std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(path)?;
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
pub fn resume(
    cfg: &RunConfig,
    dir: &Path,
    slice: (usize, usize),
    opts: &Options,
) -> Result<RunReport, RunError> {
    let (k, n) = slice;
    let part = dir.join(part_name(k, n));
    let killed_copy = with_suffix(&part, ".killed");
    if !part.exists() && killed_copy.exists() {
        // A rebuild was interrupted between its two renames: take the original back.
        std::fs::rename(&killed_copy, &part).map_err(|e| RunError::Directory {
            path: part.clone(),
            message: e.to_string(),
        })?;
    }
    if !part.exists() {
        if !dir.join("run.toml").exists() {
            return Err(RunError::Directory {
                path: dir.to_path_buf(),
                message: "not a run directory (no run.toml)".into(),
            });
        }
        // Stopped before its part file existed: nothing was computed yet.
        tracing::info!(
            "{}: not written yet (the run stopped before it began); starting slice {k}/{n}",
            part.display()
        );
        return start(cfg, dir, slice, opts);
    }
    let reader = match PartReader::open(&part) {
        Ok(r) => r,
        Err(e) => {
            // Unreadable (e.g. killed while being created): nothing in it can
            // be trusted, and the checkpoints' rows were in it. Keep it aside,
            // say so, and compute the slice again (deterministically the same).
            // The copy is never deleted by the program: it may hold what
            // a user wants to recover by other means.
            let aside = with_suffix(&part, &format!(".unreadable-{}", std::process::id()));
            tracing::warn!(
                "{e}; moving it to {} and computing slice {k}/{n} again from the start",
                aside.display()
            );
            std::fs::rename(&part, &aside).map_err(|e| RunError::Directory {
                path: part.clone(),
                message: e.to_string(),
            })?;
            let ckpt_dir = checkpoint_dir(dir, k);
            let _ = std::fs::remove_dir_all(&ckpt_dir);
            return start(cfg, dir, slice, opts);
        }
    };
    let meta = reader.meta().clone();
    if meta.config_toml != cfg.effective_toml {
        return Err(RunError::Directory {
            path: part,
            message: "was written with a different configuration than run.toml".into(),
        });
    }
    let killed = reader.writer_state() == WriterState::Open;
    if killed {
        tracing::warn!("{}: its writer was killed; rebuilding it from the data that checkpoints and finished trajectories vouch for", part.display());
    }
    let ckpt_dir = checkpoint_dir(dir, k);
    std::fs::create_dir_all(&ckpt_dir).map_err(|e| RunError::Directory {
        path: ckpt_dir.clone(),
        message: e.to_string(),
    })?;
    let present = reader.trajectory_indices();
    let mut plans = Vec::new();
    let mut keep: Vec<(usize, Keep)> = Vec::new();
    let mut from_previous = Vec::new();
    for &index in &meta.trajectories {
        let status = if present.binary_search(&index).is_ok() {
            match reader.status(index) {
                Ok((s, _)) => Some(s),
                // A killed writer can leave a damaged status: rely on the checkpoint.
                Err(e) if killed => {
                    tracing::warn!("trajectory {index}: {e}");
                    Some(Status::Running)
                }
                Err(e) => return Err(e.into()),
            }
        } else {
            None
        };
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
                    from_previous.push(index);
                }
                keep.push((
                    index,
                    Keep::Prefix(Counts {
                        rows: c.rows_written,
                        hops: c.hops_written,
                        warnings: c.warnings_written,
                    }),
                ));
                plans.push((index, Plan::FromCheckpoint(Box::new(c))));
            }
            None => {
                if status.is_some() {
                    keep.push((index, Keep::Prefix(Counts::default())));
                    if !problems.is_empty() {
                        tracing::warn!("trajectory {index}: no usable checkpoint; recomputing it from its start");
                    }
                }
                plans.push((index, Plan::Fresh));
            }
        }
    }
    let writer = if killed {
        let damaged = rebuild(&reader, &part, &keep)?;
        for index in damaged {
            // Its rows did not read back whole (a chunk the kill left half
            // written): recompute it from its start, deterministically the same.
            checkpoint::remove(&checkpoint::path_for(&ckpt_dir, index));
            if let Some(p) = plans.iter_mut().find(|(i, _)| *i == index) {
                p.1 = Plan::Fresh;
            } else {
                plans.push((index, Plan::Fresh));
            }
        }
        plans.sort_by_key(|(i, _)| *i);
        drop(reader);
        PartWriter::open_existing(&part)?.0
    } else {
        drop(reader);
        let (mut w, _) = PartWriter::open_existing(&part)?;
        for (index, what) in &keep {
            if let Keep::Prefix(c) = what {
                w.truncate_all(*index, *c)?;
            }
        }
        w.flush()?;
        w
    };
    let from_checkpoint = |i: &usize| {
        plans
            .iter()
            .any(|(j, p)| j == i && matches!(p, Plan::FromCheckpoint(_)))
    };
    let from_prev = from_previous.iter().filter(|i| from_checkpoint(i)).count();
    let from_ckpt = plans
        .iter()
        .filter(|(_, p)| matches!(p, Plan::FromCheckpoint(_)))
        .count();
    tracing::info!(
        "resuming {} of {} trajectories ({} from checkpoints)",
        plans.len(),
        meta.trajectories.len(),
        from_ckpt
    );
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
    /// The first rows, hops and warnings (what its checkpoint covers; zero to recompute).
    Prefix(Counts),
}

/// Write the trustworthy content of a killed writer's part file into a new
/// file and put it in the old one's place (the old one is kept as
/// `*.killed` until the new one is in place). Returns the trajectories whose
/// kept data did not read back (checksum or layout errors); they are left
/// out of the new file, to be recomputed.
fn rebuild(
    reader: &PartReader,
    part: &Path,
    keep: &[(usize, Keep)],
) -> Result<Vec<usize>, RunError> {
    let tmp = with_suffix(part, ".rebuild");
    let _ = std::fs::remove_file(&tmp);
    let mut w = PartWriter::create(&tmp, reader.meta())?;
    let mut damaged = Vec::new();
    for (index, what) in keep {
        let data = match what {
            Keep::Whole => reader.read(*index),
            Keep::Prefix(c) if *c == Counts::default() => continue,
            Keep::Prefix(c) => reader.read_prefix_all(*index, *c),
        };
        let data = match data {
            Ok(d) => d,
            Err(e) => {
                tracing::warn!("trajectory {index}: {e}; recomputing it from its start");
                damaged.push(*index);
                continue;
            }
        };
        w.begin(&data.header)?;
        w.append_all(
            *index,
            &data.rows,
            &data.diagnostics,
            &data.hops,
            &data.warnings,
        )?;
        if let Keep::Whole = what {
            w.set_status(*index, &data.status)?;
        }
    }
    w.close()?;
    let io = |e: std::io::Error| RunError::Directory {
        path: part.to_path_buf(),
        message: format!("replacing it with its rebuilt copy: {e}"),
    };
    let killed_copy = with_suffix(part, ".killed");
    std::fs::rename(part, &killed_copy).map_err(io)?;
    std::fs::rename(&tmp, part).map_err(io)?;
    let _ = std::fs::remove_file(&killed_copy);
    Ok(damaged)
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

fn execute(
    cfg: &RunConfig,
    dir: &Path,
    k: usize,
    writer: PartWriter,
    plans: Vec<(usize, Plan)>,
    opts: &Options,
) -> Result<RunReport, RunError> {
    // Bounded: when the writer falls behind, trajectories wait for it instead
    // of piling rows up in memory.
    let (tx, rx) = mpsc::sync_channel(256);
    let stop = opts.stop.clone();
    let pool: BlockPool = Arc::new(Mutex::new(Vec::new()));
    let writer_pool = pool.clone();
    let writer_thread = std::thread::spawn(move || writer_loop(writer, rx, stop, writer_pool));
    let session = Session {
        pool,
        cfg,
        factory: opts.factory,
        ckpt_dir: checkpoint_dir(dir, k),
        stop: &opts.stop,
    };
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(opts.threads)
        .build()
        .map_err(|e| RunError::Threads(e.to_string()))?;
    let progress = Progress::new(plans.len(), opts.progress_bar);
    let errors: Mutex<Vec<String>> = Mutex::new(Vec::new());
    pool.install(|| {
        plans.into_par_iter().for_each(|(index, plan)| {
            match session.run_one(index, plan, tx.clone()) {
                Ok(Ended::Done) => progress.tick(),
                Ok(Ended::Stopped | Ended::Skipped) => {}
                Err(e) => {
                    errors.lock().unwrap_or_else(|p| p.into_inner()).push(e);
                    // Without a working writer nothing more can be saved: stop cleanly.
                    opts.stop.store(true, Ordering::Relaxed);
                }
            }
        })
    });
    drop(tx);
    progress.finish();
    let written = writer_thread
        .join()
        .map_err(|_| RunError::Writer("the writer thread panicked".into()))?;
    written.map_err(RunError::Writer)?;
    if let Some(e) = errors
        .into_inner()
        .unwrap_or_else(|p| p.into_inner())
        .into_iter()
        .next()
    {
        return Err(RunError::Writer(e));
    }
    Ok(RunReport::default())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Common practice: the time-based checkpoint cadence must not be
    /// delayed by more than about a millisecond of trajectory time, and slow
    /// steps must read the clock at every step.
    #[test]
    fn the_clock_is_read_about_once_per_millisecond_of_steps() {
        let t0 = Instant::now();
        let mut c = ClockStride::new();
        // The first step always reads.
        assert_eq!(c.read_with(0, || t0), Some(t0));
        // 10 µs per step: the next read is due 1 ms / 10 µs = 100 → 64 steps later.
        let at = |s: u64| t0 + Duration::from_micros(10 * s);
        assert_eq!(c.read_with(1, || at(1)), Some(at(1)));
        assert_eq!(c.stride, 64);
        for s in 2..65 {
            assert_eq!(c.read_with(s, || panic!("read at step {s}")), None);
        }
        assert_eq!(c.read_with(65, || at(65)), Some(at(65)));
        // 250 µs per step: every 4 steps.
        let slow = |s: u64| at(65) + Duration::from_micros(250 * (s - 65));
        assert_eq!(c.read_with(129, || slow(129)), Some(slow(129)));
        assert_eq!(c.stride, 4);
        assert_eq!(c.read_with(130, || panic!("read at step 130")), None);
        assert_eq!(c.read_with(133, || slow(133)), Some(slow(133)));
        // 2 s per step: every step.
        let t = slow(133) + Duration::from_secs(8);
        assert_eq!(c.read_with(137, || t), Some(t));
        assert_eq!(c.stride, 1);
        assert!(c.read_with(138, || t + Duration::from_secs(2)).is_some());
    }
}
