//! One surface-hopping trajectory: the step loop of the engine.
//!
//! Each step: velocity Verlet on the active state; the back end at the new
//! geometry (energies, active-state gradient, overlaps with the previous
//! step); phase alignment and the step coupling T from the overlaps; the
//! amplitudes over the step with fewest-switches probabilities; a hop test
//! with one uniform number; momentum adjustment or frustrated-hop handling;
//! the decoherence correction; stop conditions. Observers see every step.

use num_complex::Complex64;
use rand::Rng;
use rand_chacha::ChaCha20Rng;
use serde::{Deserialize, Serialize};

use super::amplitudes::{align_phases, check_tracking, StepCoupling};
use super::decoherence::{Decoherence, DecoherenceScheme};
use super::hopping::{
    adjust_velocity, choose_target, kinetic_energy, reflect_velocity, FrustratedHops, HopDirection,
};
use super::verlet;
use crate::electronic::{Backend, BackendError, Diagnostics, Request};

/// Validated engine settings, atomic units.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// Nuclear time step (a.u. of time).
    pub dt: f64,
    /// Electronic substeps per nuclear step.
    pub substeps: usize,
    /// Stop at this time (a.u.).
    pub max_time: f64,
    /// Velocity adjustment direction at hops.
    pub hop_direction: HopDirection,
    /// Frustrated-hop treatment.
    pub frustrated: FrustratedHops,
    /// Decoherence correction.
    pub decoherence: DecoherenceScheme,
    /// A total-energy change beyond this (hartree) fails the trajectory.
    pub energy_drift_limit: f64,
    /// |det| of the overlap between consecutive steps' states below this
    /// means a state left the tracked set: the trajectory fails if it is the
    /// active or a populated state, else the step is passed over with a
    /// warning ([`check_tracking`]); 0 disables the check.
    pub min_overlap_determinant: f64,
    /// For one-dimensional models: stop once the coordinate is outside
    /// [min, max] and moving away.
    pub exit_region: Option<(f64, f64)>,
}

/// A back-end failure during a step, with the step it happened at.
fn at_step(e: BackendError, step: u64) -> BackendError {
    match e {
        BackendError::Failed(m) => BackendError::Failed(format!("{m}, at step {step}")),
        other => BackendError::Failed(format!("{other}, at step {step}")),
    }
}

/// Why a trajectory ended normally.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum EndReason {
    /// Reached the configured time.
    TimeLimit,
    /// Left the interaction region at the low side (reflection in 1D).
    ExitLow,
    /// Left the interaction region at the high side (transmission in 1D).
    ExitHigh,
    /// An observer asked to stop.
    Observer,
}

/// Trajectory status (design §5).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum Status {
    /// Still running.
    Running,
    /// Ended normally.
    Finished(EndReason),
    /// Ended by an error at `step`.
    Failed { step: u64, reason: String },
}

/// A hop attempt that happened at the end of a step.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Hop {
    /// Step number (after the step completed).
    pub step: u64,
    /// Time (a.u.).
    pub time: f64,
    /// Active state before.
    pub from: usize,
    /// Target state.
    pub to: usize,
    /// Whether the hop happened (false: frustrated).
    pub accepted: bool,
    /// E_to − E_from (hartree).
    pub gap: f64,
    /// Nuclear kinetic energy before and after (hartree).
    pub kinetic_before: f64,
    /// Nuclear kinetic energy after the hop (or the frustrated-hop treatment).
    pub kinetic_after: f64,
}

/// Everything needed to continue a trajectory exactly (with the back end's
/// snapshot). Serialisable, so checkpoints are exact.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TrajectoryState {
    /// Steps done.
    pub step: u64,
    /// Time reached (a.u.).
    pub time: f64,
    /// Coordinates (bohr or the model's own).
    pub q: Vec<f64>,
    /// Velocities (a.u.).
    pub v: Vec<f64>,
    /// Active state.
    pub active: usize,
    /// Electronic amplitudes in the phase-aligned adiabatic basis.
    pub amplitudes: Vec<Complex64>,
    /// Adiabatic energies at `q` (hartree).
    pub energies: Vec<f64>,
    /// Gradient of the active state at `q` (hartree/bohr).
    pub gradient: Vec<f64>,
    /// Accumulated ±1 phases that align the back end's states with the
    /// trajectory's continuous basis.
    pub phases: Vec<f64>,
    /// Total energy at the start (hartree).
    pub initial_total_energy: f64,
    /// The hopping generator.
    pub rng: ChaCha20Rng,
    /// Status.
    pub status: Status,
    /// The back end's diagnostics of the call at `q` (recorded, never used
    /// by the physics; kept here so a resumed trajectory records exactly
    /// what an uninterrupted one does).
    #[serde(default)]
    pub diagnostics: Diagnostics,
}

impl TrajectoryState {
    /// Nuclear kinetic energy.
    pub fn kinetic(&self, masses: &[f64]) -> f64 {
        kinetic_energy(&self.v, masses)
    }
    /// Potential energy of the active state.
    pub fn potential(&self) -> f64 {
        self.energies[self.active]
    }
    /// Quantum populations |c_j|².
    pub fn populations(&self) -> Vec<f64> {
        self.amplitudes.iter().map(|c| c.norm_sqr()).collect()
    }
}

/// Where in the run a record comes from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum RecordKind {
    /// The initial point, before the first step.
    Start,
    /// After a completed step.
    Step,
    /// The trajectory ended (the state is the last step's, seen again with its final status).
    End,
}

/// What an observer sees after each step.
pub struct StepRecord<'a> {
    /// Start, step or end.
    pub kind: RecordKind,
    /// The state after the step.
    pub state: &'a TrajectoryState,
    /// Masses of the coordinates.
    pub masses: &'a [f64],
    /// A hop attempt in this step.
    pub hop: Option<&'a Hop>,
    /// The back end, for snapshots (checkpoints).
    pub backend: &'a dyn Backend,
}

/// Whether the run goes on.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Flow {
    /// Keep going.
    Continue,
    /// Stop cleanly (resumable).
    Stop,
}

/// Observers attach to a run (writers, recorders, checkpointers).
pub trait Observer {
    /// Called for the initial point, after every step, and once at the end.
    fn observe(&mut self, record: &StepRecord) -> Result<Flow, String>;
}

impl Observer for () {
    fn observe(&mut self, _: &StepRecord) -> Result<Flow, String> {
        Ok(Flow::Continue)
    }
}

/// The first non-finite energy or gradient component, described.
fn non_finite(energies: &[f64], gradient: &[f64]) -> Option<String> {
    if let Some(i) = energies.iter().position(|x| !x.is_finite()) {
        return Some(format!(
            "energy or gradient (energy of state {i} = {})",
            energies[i]
        ));
    }
    gradient.iter().position(|x| !x.is_finite()).map(|i| {
        format!(
            "energy or gradient (gradient component {i} = {})",
            gradient[i]
        )
    })
}

/// A trajectory bound to its back end.
pub struct Trajectory<'b> {
    backend: &'b mut dyn Backend,
    settings: Settings,
    masses: Vec<f64>,
    /// Current state.
    pub state: TrajectoryState,
    /// Hop attempts so far (accepted and frustrated) in this session.
    pub hops: Vec<Hop>,
    /// Reused per-step buffers.
    request: Request,
    new_energies: Vec<f64>,
    q_new: Vec<f64>,
    v_new: Vec<f64>,
}

impl<'b> Trajectory<'b> {
    /// Start from positions, velocities and an active state (amplitude 1 on it).
    pub fn start(
        backend: &'b mut dyn Backend,
        settings: Settings,
        q: Vec<f64>,
        v: Vec<f64>,
        active: usize,
        rng: ChaCha20Rng,
    ) -> Result<Self, BackendError> {
        let info = backend.info();
        let n = info.n_states;
        if active >= n {
            return Err(BackendError::NoSuchState {
                state: active,
                n_states: n,
            });
        }
        let res = backend.compute(&q, &Request::gradient_of(active))?;
        let energies = res.energies.clone();
        let gradient = res
            .gradient(active)
            .ok_or_else(|| {
                BackendError::Failed(format!(
                    "the back end did not return the requested gradient of state {active}"
                ))
            })?
            .to_vec();
        if let Some(bad) = non_finite(&energies, &gradient) {
            return Err(BackendError::Failed(format!(
                "the back end returned a non-finite {bad} at the initial geometry (step 0)"
            )));
        }
        let diagnostics = res.diagnostics.clone();
        let mut amplitudes = vec![Complex64::new(0.0, 0.0); n];
        amplitudes[active] = Complex64::new(1.0, 0.0);
        let e0 = kinetic_energy(&v, &info.masses) + energies[active];
        let state = TrajectoryState {
            step: 0,
            time: 0.0,
            q,
            v,
            active,
            amplitudes,
            energies,
            gradient,
            phases: vec![1.0; n],
            initial_total_energy: e0,
            rng,
            status: Status::Running,
            diagnostics,
        };
        Ok(Self {
            backend,
            settings,
            masses: info.masses,
            state,
            hops: Vec::new(),
            request: Request::default(),
            new_energies: Vec::new(),
            q_new: Vec::new(),
            v_new: Vec::new(),
        })
    }

    /// Continue from a saved state; the back end must already hold the
    /// matching snapshot.
    pub fn resume(
        backend: &'b mut dyn Backend,
        settings: Settings,
        state: TrajectoryState,
    ) -> Self {
        let masses = backend.info().masses;
        Self {
            backend,
            settings,
            masses,
            state,
            hops: Vec::new(),
            request: Request::default(),
            new_energies: Vec::new(),
            q_new: Vec::new(),
            v_new: Vec::new(),
        }
    }

    /// Masses of the coordinates.
    pub fn masses(&self) -> &[f64] {
        &self.masses
    }

    /// The back end (for snapshots).
    pub fn backend(&self) -> &dyn Backend {
        &*self.backend
    }

    /// One nuclear step. Returns the hop attempt, if any.
    pub fn step(&mut self) -> Result<Option<Hop>, BackendError> {
        let dt = self.settings.dt;
        let s = &mut self.state;
        // The step is computed on copies and committed only when the back
        // end has answered with finite numbers, so a failing step leaves the
        // state (and what observers record) at the last good step.
        self.q_new.clear();
        self.q_new.extend_from_slice(&s.q);
        self.v_new.clear();
        self.v_new.extend_from_slice(&s.v);
        verlet::kick_drift(
            &mut self.q_new,
            &mut self.v_new,
            &s.gradient,
            &self.masses,
            dt,
        );
        let n = s.amplitudes.len();
        self.request.gradients.clear();
        self.request.gradients.push(s.active);
        self.request.overlaps = n > 1;
        let res = self
            .backend
            .compute(&self.q_new, &self.request)
            .map_err(|e| at_step(e, s.step + 1))?;
        let gradient = res.gradient(s.active).ok_or_else(|| {
            BackendError::Failed(format!(
                "the back end did not return the requested gradient of state {} at step {}",
                s.active,
                s.step + 1
            ))
        })?;
        if let Some(bad) = non_finite(&res.energies, gradient) {
            return Err(BackendError::Failed(format!(
                "the back end returned a non-finite {bad} at step {}",
                s.step + 1
            )));
        }
        if res.energies.len() != n {
            return Err(BackendError::Failed(format!(
                "the back end returned {} energies for {n} states at step {}",
                res.energies.len(),
                s.step + 1
            )));
        }

        verlet::kick(&mut self.v_new, gradient, &self.masses, dt);
        if let Some(i) = self
            .q_new
            .iter()
            .chain(&self.v_new)
            .position(|x| !x.is_finite())
        {
            let what = if i < self.q_new.len() {
                format!("position {i}")
            } else {
                format!("velocity {}", i - self.q_new.len())
            };
            return Err(BackendError::Failed(format!(
                "non-finite {what} after step {} (the gradient overflowed)",
                s.step + 1
            )));
        }
        self.new_energies.clear();
        self.new_energies.extend_from_slice(&res.energies);
        let new_energies = &self.new_energies;

        let mut tracking_warning = None;
        let coupling = match (&res.overlaps, n > 1) {
            (Some(raw), true) => {
                let exchanged = check_tracking(
                    raw,
                    self.settings.min_overlap_determinant,
                    s.active,
                    &s.amplitudes,
                )
                .map_err(|e| BackendError::Failed(format!("{e}, at step {}", s.step + 1)))?;
                let patched = exchanged.as_ref().map(|x| x.patch(raw));
                if let Some(x) = exchanged {
                    tracking_warning = Some(format!(
                        "states {:?} (empty, not active) exchanged with untracked states (|det| of the overlap {:.3}); they get no coupling over this step",
                        x.states, x.determinant
                    ));
                }
                let (aligned, mut phases) =
                    align_phases(patched.as_ref().unwrap_or(raw), &s.phases);
                let c =
                    StepCoupling::from_overlaps(&aligned, &mut phases, dt, self.settings.substeps)
                        .map_err(|e| BackendError::Failed(e.to_string()))?;
                s.phases = phases;
                c
            }
            _ => StepCoupling::none(n),
        };
        s.diagnostics.clone_from(&res.diagnostics);
        if let Some(w) = tracking_warning {
            s.diagnostics
                .warnings
                .push(format!("{w}, at step {}", s.step + 1));
        }
        std::mem::swap(&mut s.q, &mut self.q_new);
        std::mem::swap(&mut s.v, &mut self.v_new);
        s.gradient.copy_from_slice(gradient);
        let g = coupling.propagate(
            &mut s.amplitudes,
            &s.energies,
            new_energies,
            dt,
            self.settings.substeps,
            s.active,
        );
        s.energies.copy_from_slice(new_energies);
        s.step += 1;
        s.time = s.step as f64 * dt;

        // One uniform number per step, drawn whether or not a hop is possible,
        // so the generator's stream does not depend on the amplitudes.
        let xi: f64 = s.rng.gen();
        let hop = match choose_target(&g, s.active, xi) {
            Some(target) => Some(self.attempt_hop(target)?),
            None => None,
        };
        let s = &mut self.state;
        let kinetic = kinetic_energy(&s.v, &self.masses);
        self.settings
            .decoherence
            .apply(&mut s.amplitudes, s.active, &s.energies, kinetic, dt);
        if let Some(h) = &hop {
            self.hops.push(h.clone());
        }
        Ok(hop)
    }

    fn attempt_hop(&mut self, target: usize) -> Result<Hop, BackendError> {
        let s = &mut self.state;
        let from = s.active;
        let gap = s.energies[target] - s.energies[from];
        let kinetic_before = kinetic_energy(&s.v, &self.masses);
        let missing = |what: &str| {
            BackendError::Failed(format!("the back end did not return the {what} requested for a hop {from} → {target}, at step {}", s.step))
        };
        // The target's gradient at this geometry, when the direction needed it.
        let mut target_gradient = None;
        let direction: Vec<f64> = match self.settings.hop_direction {
            HopDirection::Velocity => s.v.iter().zip(&self.masses).map(|(v, m)| m * v).collect(),
            HopDirection::Coupling => {
                let req = Request {
                    couplings: true,
                    ..Request::default()
                };
                let res = self
                    .backend
                    .compute(&s.q, &req)
                    .map_err(|e| at_step(e, s.step))?;
                res.couplings
                    .as_ref()
                    .ok_or_else(|| missing("coupling vectors"))?
                    .get(from, target)
            }
            HopDirection::GradientDifference => {
                let res = self
                    .backend
                    .compute(&s.q, &Request::gradient_of(target))
                    .map_err(|e| at_step(e, s.step))?;
                let g = res
                    .gradient(target)
                    .ok_or_else(|| missing("target gradient"))?
                    .to_vec();
                let d = g.iter().zip(&s.gradient).map(|(t, f)| t - f).collect();
                target_gradient = Some(g);
                d
            }
        };
        let accepted = adjust_velocity(&mut s.v, &self.masses, &direction, gap);
        if accepted {
            s.active = target;
            s.gradient = match target_gradient {
                Some(g) => g,
                None => {
                    let res = self
                        .backend
                        .compute(&s.q, &Request::gradient_of(target))
                        .map_err(|e| at_step(e, s.step))?;
                    res.gradient(target)
                        .ok_or_else(|| missing("target gradient"))?
                        .to_vec()
                }
            };
        } else if self.settings.frustrated == FrustratedHops::Reflect {
            reflect_velocity(&mut s.v, &self.masses, &direction);
        }
        Ok(Hop {
            step: s.step,
            time: s.time,
            from,
            to: target,
            accepted,
            gap,
            kinetic_before,
            kinetic_after: kinetic_energy(&s.v, &self.masses),
        })
    }

    /// Why the trajectory should stop now, if it should.
    fn stop_reason(&self) -> Option<Status> {
        let s = &self.state;
        let etot = kinetic_energy(&s.v, &self.masses) + s.potential();
        let drift = etot - s.initial_total_energy;
        if !(drift.abs() <= self.settings.energy_drift_limit) {
            return Some(Status::Failed {
                step: s.step,
                reason: format!(
                    "total energy drifted by {drift:.3e} hartree (limit {:.3e}); reduce the time step",
                    self.settings.energy_drift_limit
                ),
            });
        }
        if let Some((lo, hi)) = self.settings.exit_region {
            if s.q[0] < lo && s.v[0] < 0.0 {
                return Some(Status::Finished(EndReason::ExitLow));
            }
            if s.q[0] > hi && s.v[0] > 0.0 {
                return Some(Status::Finished(EndReason::ExitHigh));
            }
        }
        if s.time >= self.settings.max_time - 1e-9 * self.settings.dt {
            return Some(Status::Finished(EndReason::TimeLimit));
        }
        None
    }

    /// Run until a stop condition, an error or an observer's stop. Errors of
    /// the back end end the trajectory as `Failed` (they are values, never
    /// panics); an observer's error is returned as `Err` after marking the
    /// state failed.
    pub fn run(&mut self, observer: &mut dyn Observer) -> Result<&Status, String> {
        if self.state.step == 0 && self.state.status == Status::Running {
            let flow = observer.observe(&StepRecord {
                kind: RecordKind::Start,
                state: &self.state,
                masses: &self.masses,
                hop: None,
                backend: &*self.backend,
            })?;
            if flow == Flow::Stop {
                return Ok(&self.state.status);
            }
        }
        while self.state.status == Status::Running {
            if let Some(status) = self.stop_reason() {
                self.state.status = status;
                break;
            }
            let hop = match self.step() {
                Ok(h) => h,
                Err(e) => {
                    self.state.status = Status::Failed {
                        step: self.state.step,
                        reason: e.to_string(),
                    };
                    break;
                }
            };
            let flow = observer.observe(&StepRecord {
                kind: RecordKind::Step,
                state: &self.state,
                masses: &self.masses,
                hop: hop.as_ref(),
                backend: &*self.backend,
            })?;
            if flow == Flow::Stop {
                return Ok(&self.state.status);
            }
        }
        // The final status is reported once more, so writers see it.
        observer.observe(&StepRecord {
            kind: RecordKind::End,
            state: &self.state,
            masses: &self.masses,
            hop: None,
            backend: &*self.backend,
        })?;
        Ok(&self.state.status)
    }
}
