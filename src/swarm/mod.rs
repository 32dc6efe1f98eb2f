//! Ensembles of trajectories: back ends from the configuration, seeded
//! initial conditions, parallel execution and the summary users read.
//!
//! Reproducibility: every trajectory owns two ChaCha20 streams derived from the
//! ensemble seed and its index (stream 2i draws its initial condition, stream
//! 2i + 1 its hops), so the result of trajectory i does not depend on how the
//! ensemble is split over threads or cluster tasks.

mod summary;

use std::io::IsTerminal;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::Instant;

use rand::SeedableRng;
use rand_chacha::ChaCha20Rng;
use rand_distr::{Distribution, Normal};
use rayon::prelude::*;

pub use summary::{Channel, ChannelEstimate, PopulationCurves, Summary};

use crate::config::{ModelSpec, RunConfig, Sampling};
use crate::dynamics::{Flow, Hop, Observer, RecordKind, Status, StepRecord, Trajectory};
use crate::electronic::models::DiabaticBackend;
use crate::electronic::Backend;

/// A fresh back end for one trajectory.
pub fn make_backend(model: &ModelSpec) -> Box<dyn Backend> {
    match model {
        ModelSpec::Tully(m) => Box::new(DiabaticBackend::new(m.clone())),
        ModelSpec::Lvc { model, .. } => Box::new(DiabaticBackend::new(model.clone())),
        ModelSpec::Harmonic(m) => Box::new(DiabaticBackend::new(m.clone())),
        ModelSpec::Morse(m) => Box::new(DiabaticBackend::new(m.clone())),
        ModelSpec::Molecule { spec, .. } => Box::new(
            crate::electronic::qc::backend::MrsfBackend::new(spec.clone()),
        ),
    }
}

/// The generator of trajectory `index` for purpose `stream` (0 = initial
/// condition, 1 = hops).
pub fn trajectory_rng(seed: u64, index: usize, stream: u64) -> ChaCha20Rng {
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    rng.set_stream(2 * index as u64 + stream);
    rng
}

/// Positions, velocities (atomic units) and initial state of trajectory
/// `index`: the state is `start.state` unless the initial-conditions file
/// selected one for this trajectory.
pub fn initial_condition(
    cfg: &RunConfig,
    masses: &[f64],
    index: usize,
) -> (Vec<f64>, Vec<f64>, usize) {
    if let Sampling::File { rows, .. } = &cfg.sampling {
        let (q, v, state) = &rows[index];
        return (q.clone(), v.clone(), state.unwrap_or(cfg.initial_state));
    }
    let (q, v) = sampled(cfg, masses, index);
    (q, v, cfg.initial_state)
}

fn sampled(cfg: &RunConfig, masses: &[f64], index: usize) -> (Vec<f64>, Vec<f64>) {
    let mut rng = trajectory_rng(cfg.seed, index, 0);
    match (&cfg.sampling, &cfg.model) {
        (Sampling::Fixed { position, momentum }, _) => {
            (vec![*position], vec![momentum / masses[0]])
        }
        (
            Sampling::Wavepacket {
                position,
                momentum,
                width,
            },
            _,
        ) => {
            // Wigner function of ψ ∝ exp(−(x−x0)²/4σ² + i p0 x): a product of
            // Gaussians with σ_x = σ and σ_p = ħ/(2σ) (common practice).
            let x = Normal::new(*position, *width)
                .expect("validated width")
                .sample(&mut rng);
            let p = Normal::new(*momentum, 0.5 / width)
                .expect("validated width")
                .sample(&mut rng);
            (vec![x], vec![p / masses[0]])
        }
        (Sampling::HarmonicGround, ModelSpec::Lvc { model, .. }) => {
            // Ground-state Wigner function of each mode (unit mass):
            // σ_x² = 1/(2ω), σ_p² = ω/2.
            let mut q = Vec::with_capacity(model.n_modes());
            let mut v = Vec::with_capacity(model.n_modes());
            for &w in &model.omegas {
                q.push(
                    Normal::new(0.0, (0.5 / w).sqrt())
                        .expect("ω > 0")
                        .sample(&mut rng),
                );
                v.push(
                    Normal::new(0.0, (0.5 * w).sqrt())
                        .expect("ω > 0")
                        .sample(&mut rng),
                );
            }
            (q, v)
        }
        (_, ModelSpec::Molecule { spec, .. }) => {
            (spec.reference_coordinates(), vec![0.0; spec.masses().len()])
        }
        (_, m) => (vec![0.0; m.n_dof()], vec![0.0; m.n_dof()]),
    }
}

/// What is kept of one finished trajectory in memory.
#[derive(Clone, Debug, PartialEq)]
pub struct Outcome {
    /// Index in the ensemble.
    pub index: usize,
    /// Final status.
    pub status: Status,
    /// Active state at the end.
    pub active: usize,
    /// |c|² at the end.
    pub populations: Vec<f64>,
    /// Steps done.
    pub steps: u64,
    /// Largest |E_tot − E_tot(0)| seen (hartree).
    pub max_drift: f64,
    /// Hop attempts.
    pub hops: Vec<Hop>,
    /// Active state and |c|² every `record_every` steps (index k ↔ step k·record_every).
    pub series: Vec<(usize, Vec<f64>)>,
}

impl Outcome {
    /// The outcome of a trajectory read back from an ensemble file.
    pub fn from_data(data: &crate::ensemble::h5::TrajectoryData) -> Self {
        Self::from_course(&data.course())
    }

    /// The outcome of a trajectory from its course in an ensemble file
    /// ([`PartReader::read_course`](crate::ensemble::h5::PartReader::read_course)).
    pub fn from_course(c: &crate::ensemble::h5::TrajectoryCourse) -> Self {
        let n_states = if c.step.is_empty() {
            0
        } else {
            c.amplitudes.len() / c.step.len()
        };
        let populations = |k: usize| -> Vec<f64> {
            c.amplitudes[k * n_states..(k + 1) * n_states]
                .iter()
                .map(|a| a.norm_sqr())
                .collect()
        };
        let rows = c.step.len();
        let e0 = c.total.first().copied().unwrap_or(0.0);
        Outcome {
            index: c.index,
            status: c.status.clone(),
            active: c.active.last().map_or(c.initial_state, |&a| a as usize),
            populations: if rows == 0 {
                Vec::new()
            } else {
                populations(rows - 1)
            },
            steps: c.step.last().copied().unwrap_or(0),
            max_drift: c.total.iter().map(|t| (t - e0).abs()).fold(0.0, f64::max),
            hops: c.hops.clone(),
            series: (0..rows)
                .map(|k| (c.active[k] as usize, populations(k)))
                .collect(),
        }
    }
}

/// Collects the per-trajectory series and energy drift.
struct Recorder {
    every: u64,
    max_drift: f64,
    series: Vec<(usize, Vec<f64>)>,
}

impl Observer for Recorder {
    fn observe(&mut self, rec: &StepRecord) -> Result<Flow, String> {
        let s = rec.state;
        let drift = (s.kinetic(rec.masses) + s.potential() - s.initial_total_energy).abs();
        self.max_drift = self.max_drift.max(drift);
        if rec.kind != RecordKind::End && s.step % self.every == 0 {
            self.series.push((s.active, s.populations()));
        }
        Ok(Flow::Continue)
    }
}

/// Run trajectory `index` of the ensemble to its end.
pub fn run_one(cfg: &RunConfig, index: usize, record_every: u64) -> Outcome {
    let mut backend = make_backend(&cfg.model);
    let masses = backend.info().masses;
    let (q, v, state) = initial_condition(cfg, &masses, index);
    let rng = trajectory_rng(cfg.seed, index, 1);
    let mut rec = Recorder {
        every: record_every.max(1),
        max_drift: 0.0,
        series: Vec::new(),
    };
    let fail = |reason: String| Outcome {
        index,
        status: Status::Failed { step: 0, reason },
        active: state,
        populations: vec![],
        steps: 0,
        max_drift: 0.0,
        hops: vec![],
        series: vec![],
    };
    let mut traj = match Trajectory::start(backend.as_mut(), cfg.settings.clone(), q, v, state, rng)
    {
        Ok(t) => t,
        Err(e) => return fail(e.to_string()),
    };
    if let Err(e) = traj.run(&mut rec) {
        traj.state.status = Status::Failed {
            step: traj.state.step,
            reason: e,
        };
    }
    Outcome {
        index,
        status: traj.state.status.clone(),
        active: traj.state.active,
        populations: traj.state.populations(),
        steps: traj.state.step,
        max_drift: rec.max_drift,
        hops: std::mem::take(&mut traj.hops),
        series: rec.series,
    }
}

/// Run trajectories `indices` on `threads` threads (0 = all cores), with a
/// progress bar on a terminal or periodic log lines. Outcomes come back in
/// index order.
pub fn run_indices(
    cfg: &RunConfig,
    indices: &[usize],
    threads: usize,
    record_every: u64,
) -> Result<Vec<Outcome>, rayon::ThreadPoolBuildError> {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()?;
    let progress = Progress::new(indices.len(), true);
    let outcomes = pool.install(|| {
        indices
            .par_iter()
            .map(|&i| {
                let out = run_one(cfg, i, record_every);
                progress.tick();
                out
            })
            .collect()
    });
    progress.finish();
    Ok(outcomes)
}

/// A progress bar on a terminal, periodic log lines otherwise.
pub(crate) struct Progress {
    bar: Option<indicatif::ProgressBar>,
    done: AtomicUsize,
    total: usize,
    started: Instant,
    last: Mutex<Instant>,
}

impl Progress {
    pub(crate) fn new(total: usize, bar: bool) -> Self {
        let bar = (bar && std::io::stderr().is_terminal()).then(|| {
            let b = indicatif::ProgressBar::new(total as u64);
            if let Ok(style) = indicatif::ProgressStyle::with_template(
                "{elapsed_precise} [{bar:40}] {pos}/{len} trajectories, {per_sec}, about {eta} left",
            ) {
                b.set_style(style.progress_chars("=> "));
            }
            b
        });
        Self {
            bar,
            done: AtomicUsize::new(0),
            total,
            started: Instant::now(),
            last: Mutex::new(Instant::now()),
        }
    }

    pub(crate) fn tick(&self) {
        let n = self.done.fetch_add(1, Ordering::Relaxed) + 1;
        if let Some(b) = &self.bar {
            b.inc(1);
            return;
        }
        let mut last = self.last.lock().unwrap_or_else(|p| p.into_inner());
        if last.elapsed().as_secs_f64() > 2.0 || n == self.total {
            *last = Instant::now();
            let secs = self.started.elapsed().as_secs_f64();
            let eta = secs / n as f64 * (self.total - n) as f64;
            tracing::info!(
                "trajectories done: {n}/{} ({secs:.1} s elapsed, about {eta:.0} s left)",
                self.total
            );
        }
    }

    pub(crate) fn finish(&self) {
        if let Some(b) = &self.bar {
            b.finish_and_clear();
        }
    }
}

/// How often (in steps) populations are recorded: about 200 points per curve.
pub fn record_interval(cfg: &RunConfig) -> u64 {
    let steps = (cfg.settings.max_time / cfg.settings.dt).ceil().max(1.0) as u64;
    (steps / 200).max(1)
}

/// Run the whole ensemble.
pub fn run(cfg: &RunConfig, threads: usize) -> Result<Vec<Outcome>, rayon::ThreadPoolBuildError> {
    let indices: Vec<usize> = (0..cfg.trajectories).collect();
    run_indices(cfg, &indices, threads, record_interval(cfg))
}
