//! Geometry optimisation: quasi-Newton minimisation in Cartesian coordinates.
//!
//! # Method
//! BFGS updates of an approximate Hessian H (J. Inst. Math. Appl. 6, 76
//! (1970); Comput. J. 13, 317 (1970); Math. Comp. 24, 23 (1970); Math. Comp.
//! 24, 647 (1970) — the four papers of the update), starting from
//! H₀ = [`OptimizeOptions::initial_hessian`] · 1, with the quasi-Newton step
//! p = −H⁻¹g restricted to a trust radius (scaled back onto the sphere when
//! longer; common practice). The trust radius follows the ratio r of actual
//! to predicted energy change: r < 0.25 halves it (a quarter of the step
//! length when the energy rose by more than 1e−8 Eh; such a step is rejected
//! and retried from the previous point), r > 0.75 with a step on the boundary doubles it up to
//! [`OptimizeOptions::max_trust_radius`]. The update is skipped when the
//! curvature condition sᵀy > 0 fails, which keeps H positive definite. In
//! Cartesian coordinates the gradient has no component along overall
//! translations and rotations (to first order), and the steps follow it.
//!
//! # Convergence (common practice)
//! All four of: largest gradient component < 4.5e−4 Eh/bohr, RMS gradient
//! < 3.0e−4 Eh/bohr, largest step component < 1.8e−3 bohr, RMS step
//! < 1.2e−3 bohr ([`OptimizeOptions::default`]); a gradient 100 times below
//! its thresholds also counts as converged (the step then follows from it).
//!
//! # Progress and failure
//! One `tracing` info line per step (energy, change, gradient and step
//! norms, trust radius). Not converging within
//! [`OptimizeOptions::max_steps`] is [`OptimizeError::NotConverged`], which
//! carries the last (lowest-energy) geometry so a caller can save it.

pub mod intersection;

use std::fmt;

/// Tunables of [`minimize`].
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct OptimizeOptions {
    /// Energy and gradient evaluations allowed (default 100).
    pub max_steps: usize,
    /// Largest gradient component (Eh/bohr), default 4.5e−4.
    pub max_force: f64,
    /// RMS gradient (Eh/bohr), default 3.0e−4.
    pub rms_force: f64,
    /// Largest step component (bohr), default 1.8e−3.
    pub max_step: f64,
    /// RMS step (bohr), default 1.2e−3.
    pub rms_step: f64,
    /// Initial trust radius (bohr, length of the whole step), default 0.3.
    pub trust_radius: f64,
    /// Largest trust radius (bohr), default 1.0.
    pub max_trust_radius: f64,
    /// Smallest trust radius (bohr) before giving up, default 1e−5.
    pub min_trust_radius: f64,
    /// Diagonal of the initial Hessian (Eh/bohr²), default 0.5.
    pub initial_hessian: f64,
}

impl Default for OptimizeOptions {
    fn default() -> Self {
        OptimizeOptions {
            max_steps: 100,
            max_force: 4.5e-4,
            rms_force: 3.0e-4,
            max_step: 1.8e-3,
            rms_step: 1.2e-3,
            trust_radius: 0.3,
            max_trust_radius: 1.0,
            min_trust_radius: 1e-5,
            initial_hessian: 0.5,
        }
    }
}

impl OptimizeOptions {
    /// The same criteria scaled by `factor` (e.g. 0.01 for tight minima).
    pub fn scaled(mut self, factor: f64) -> Self {
        self.max_force *= factor;
        self.rms_force *= factor;
        self.max_step *= factor;
        self.rms_step *= factor;
        self
    }

    fn validate(&self) -> Result<(), OptimizeError> {
        let pos = [
            ("max_force", self.max_force),
            ("rms_force", self.rms_force),
            ("max_step", self.max_step),
            ("rms_step", self.rms_step),
            ("trust_radius", self.trust_radius),
            ("max_trust_radius", self.max_trust_radius),
            ("min_trust_radius", self.min_trust_radius),
            ("initial_hessian", self.initial_hessian),
        ];
        for (name, v) in pos {
            if !(v.is_finite() && v > 0.0) {
                return Err(OptimizeError::Options(format!(
                    "{name} must be positive, got {v}"
                )));
            }
        }
        if self.max_steps == 0 {
            return Err(OptimizeError::Options(
                "max_steps must be at least 1".into(),
            ));
        }
        Ok(())
    }
}

/// One accepted or rejected step.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct StepRecord {
    /// 1-based evaluation number.
    pub step: usize,
    /// Energy at the evaluated geometry (Eh).
    pub energy: f64,
    /// Change from the current point (Eh).
    pub delta_energy: f64,
    /// Largest gradient component (Eh/bohr).
    pub max_force: f64,
    /// RMS gradient (Eh/bohr).
    pub rms_force: f64,
    /// Largest component of the step that led here (bohr).
    pub max_step: f64,
    /// RMS of that step (bohr).
    pub rms_step: f64,
    /// Trust radius after this step (bohr).
    pub trust_radius: f64,
    /// Whether the step was accepted.
    pub accepted: bool,
}

impl fmt::Display for StepRecord {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{:4}  E = {:+.10} Eh  dE = {:+.2e}  max|g| = {:.2e}  rms g = {:.2e}  max|dx| = {:.2e}  rms dx = {:.2e}  trust {:.3}{}",
            self.step,
            self.energy,
            self.delta_energy,
            self.max_force,
            self.rms_force,
            self.max_step,
            self.rms_step,
            self.trust_radius,
            if self.accepted { "" } else { "  (rejected)" }
        )
    }
}

/// A converged minimisation.
#[derive(Clone, Debug)]
pub struct Optimized {
    /// Final positions (bohr).
    pub positions: Vec<[f64; 3]>,
    /// Final energy (Eh).
    pub energy: f64,
    /// Final gradient (Eh/bohr).
    pub gradient: Vec<[f64; 3]>,
    /// All evaluations.
    pub history: Vec<StepRecord>,
}

/// Errors of [`minimize`].
#[derive(Debug, thiserror::Error)]
pub enum OptimizeError {
    /// Unusable options.
    #[error("optimiser options: {0}")]
    Options(String),
    /// No atoms or non-finite start.
    #[error("optimiser start: {0}")]
    Start(String),
    /// The energy/gradient function failed.
    #[error("energy and gradient at step {step}: {message}")]
    Evaluation {
        /// 1-based evaluation number.
        step: usize,
        /// The underlying error.
        message: String,
        /// The last accepted geometry (bohr).
        last_positions: Vec<[f64; 3]>,
    },
    /// Not converged within the step limit (or the trust radius collapsed).
    #[error(
        "geometry not converged after {steps} steps ({reason}); last energy {energy:.10} Eh, \
         largest gradient component {max_force:.2e} Eh/bohr"
    )]
    NotConverged {
        /// Evaluations done.
        steps: usize,
        /// Why it stopped.
        reason: String,
        /// The last accepted (lowest-energy) geometry (bohr).
        last_positions: Vec<[f64; 3]>,
        /// Its energy (Eh).
        energy: f64,
        /// Its largest gradient component (Eh/bohr).
        max_force: f64,
        /// All evaluations.
        history: Vec<StepRecord>,
    },
}

impl OptimizeError {
    /// The last accepted geometry, if the optimisation got that far.
    pub fn last_positions(&self) -> Option<&[[f64; 3]]> {
        match self {
            OptimizeError::NotConverged { last_positions, .. }
            | OptimizeError::Evaluation { last_positions, .. } => Some(last_positions),
            _ => None,
        }
    }
}

fn max_abs(v: &[f64]) -> f64 {
    v.iter().fold(0.0, |m, x| m.max(x.abs()))
}

fn rms(v: &[f64]) -> f64 {
    if v.is_empty() {
        0.0
    } else {
        (v.iter().map(|x| x * x).sum::<f64>() / v.len() as f64).sqrt()
    }
}

fn to_positions(x: &[f64]) -> Vec<[f64; 3]> {
    x.chunks_exact(3).map(|c| [c[0], c[1], c[2]]).collect()
}

/// Minimise the energy returned with its gradient by `f` (positions in
/// bohr → (energy in Eh, gradient per atom in Eh/bohr)), from `start`.
/// `f` may keep state (e.g. the last orbitals as the next guess).
pub fn minimize<F, E>(
    start: &[[f64; 3]],
    opts: &OptimizeOptions,
    mut f: F,
) -> Result<Optimized, OptimizeError>
where
    F: FnMut(&[[f64; 3]]) -> Result<(f64, Vec<[f64; 3]>), E>,
    E: fmt::Display,
{
    opts.validate()?;
    if start.is_empty() {
        return Err(OptimizeError::Start("no atoms".into()));
    }
    if start.iter().flatten().any(|v| !v.is_finite()) {
        return Err(OptimizeError::Start("non-finite start coordinates".into()));
    }
    let n = 3 * start.len();
    let mut x: Vec<f64> = start.iter().flatten().copied().collect();
    let mut eval =
        |step: usize, x: &[f64], last: &[f64]| -> Result<(f64, Vec<f64>), OptimizeError> {
            let p = to_positions(x);
            let (e, g) = f(&p).map_err(|e| OptimizeError::Evaluation {
                step,
                message: e.to_string(),
                last_positions: to_positions(last),
            })?;
            if g.len() != p.len() || !e.is_finite() || g.iter().flatten().any(|v| !v.is_finite()) {
                return Err(OptimizeError::Evaluation {
                    step,
                    message: format!(
                        "non-finite energy or gradient of wrong length ({} atoms)",
                        g.len()
                    ),
                    last_positions: to_positions(last),
                });
            }
            Ok((e, g.into_iter().flatten().collect()))
        };
    let (mut e, mut g) = eval(1, &x, &x)?;
    let mut history = vec![StepRecord {
        step: 1,
        energy: e,
        delta_energy: 0.0,
        max_force: max_abs(&g),
        rms_force: rms(&g),
        max_step: 0.0,
        rms_step: 0.0,
        trust_radius: opts.trust_radius,
        accepted: true,
    }];
    tracing::info!("optimize {}", history[0]);
    let mut h = nalgebra::DMatrix::<f64>::identity(n, n) * opts.initial_hessian;
    let mut trust = opts.trust_radius;
    let mut last_step = (f64::INFINITY, f64::INFINITY);
    let force_ok = |g: &[f64], factor: f64| {
        max_abs(g) < opts.max_force * factor && rms(g) < opts.rms_force * factor
    };
    for step in 2..=opts.max_steps + 1 {
        let converged = force_ok(&g, 1.0)
            && ((last_step.0 < opts.max_step && last_step.1 < opts.rms_step) || force_ok(&g, 0.01));
        if converged {
            return Ok(Optimized {
                positions: to_positions(&x),
                energy: e,
                gradient: to_positions(&g),
                history,
            });
        }
        if step > opts.max_steps {
            break;
        }
        // Quasi-Newton step within the trust radius.
        let gv = nalgebra::DVector::from_column_slice(&g);
        let mut p = match h.clone().cholesky() {
            Some(ch) => -ch.solve(&gv),
            None => -&gv / opts.initial_hessian,
        };
        let len = p.norm();
        let on_boundary = len > trust;
        if on_boundary {
            p *= trust / len;
        }
        let predicted = gv.dot(&p) + 0.5 * p.dot(&(&h * &p));
        let xn: Vec<f64> = x.iter().zip(p.iter()).map(|(a, b)| a + b).collect();
        let (en, gn) = eval(step, &xn, &x)?;
        let de = en - e;
        let ratio = if predicted != 0.0 {
            de / predicted
        } else {
            1.0
        };
        // Uphill steps within SCF noise (1e−8 Eh) are accepted.
        let accepted = de < 1e-8;
        if ratio < 0.25 || !accepted {
            trust = if accepted {
                0.5 * trust
            } else {
                0.25 * p.norm()
            };
        } else if ratio > 0.75 && on_boundary {
            trust = (2.0 * trust).min(opts.max_trust_radius);
        }
        let ps: Vec<f64> = p.iter().copied().collect();
        let rec = StepRecord {
            step,
            energy: en,
            delta_energy: de,
            max_force: max_abs(&gn),
            rms_force: rms(&gn),
            max_step: max_abs(&ps),
            rms_step: rms(&ps),
            trust_radius: trust,
            accepted,
        };
        tracing::info!("optimize {rec}");
        history.push(rec);
        if accepted {
            // BFGS update with s = p, y = g_new − g.
            let y = nalgebra::DVector::from_column_slice(&gn) - &gv;
            let sy = p.dot(&y);
            if sy > 1e-12 * p.norm() * y.norm() {
                let hs = &h * &p;
                let shs = p.dot(&hs);
                h += &y * y.transpose() / sy - &hs * hs.transpose() / shs;
            }
            x = xn;
            e = en;
            g = gn;
            last_step = (max_abs(&ps), rms(&ps));
        }
        if trust < opts.min_trust_radius {
            return Err(OptimizeError::NotConverged {
                steps: history.len(),
                reason: format!("trust radius fell below {:.1e} bohr", opts.min_trust_radius),
                last_positions: to_positions(&x),
                energy: e,
                max_force: max_abs(&g),
                history,
            });
        }
    }
    Err(OptimizeError::NotConverged {
        steps: history.len(),
        reason: format!("step limit {}", opts.max_steps),
        last_positions: to_positions(&x),
        energy: e,
        max_force: max_abs(&g),
        history,
    })
}

/// How [`minimize_energy`] gets gradients.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub enum GradientKind {
    /// Analytic SCF gradients ([`crate::electronic::qc::gradient::scf`]) or,
    /// for an MRSF state, analytic MRSF gradients ([`crate::electronic::qc::gradient::mrsf`]).
    Analytic,
    /// Central differences with this step (bohr).
    Numerical(f64),
}

/// Minimise an SCF or MRSF-state energy of `calc` from `start` (bohr). Each
/// SCF starts from the occupied orbitals of the previous geometry.
pub fn minimize_energy(
    calc: &crate::electronic::qc::gradient::numerical::ScfEnergy,
    start: &[[f64; 3]],
    target: &crate::electronic::qc::gradient::numerical::Target,
    gradient: GradientKind,
    opts: &OptimizeOptions,
) -> Result<Optimized, OptimizeError> {
    use crate::electronic::qc::gradient::numerical::{orbital_guess, Target};
    use crate::electronic::qc::gradient::{scf::scf_gradient, GradientError};
    use crate::electronic::qc::scf::Guess;
    let mut guess = Guess::AtomicSuperposition;
    minimize(
        start,
        opts,
        |p| -> Result<(f64, Vec<[f64; 3]>), GradientError> {
            let (c, engine) = calc.compute_with_engine(p, &guess, target)?;
            let g = match (gradient, target) {
                (GradientKind::Analytic, Target::Ground) => {
                    scf_gradient(&c.basis, &c.scf, &calc.potential)?
                }
                (GradientKind::Analytic, Target::Mrsf { label, .. }) => {
                    use crate::electronic::qc::gradient::mrsf::{
                        mrsf_state_gradients_reusing, ZVectorOptions,
                    };
                    let x = c.excited.as_ref().expect("MRSF target");
                    let e = crate::electronic::qc::gradient::numerical::state_energy(x, label)?;
                    let i = x
                        .states
                        .iter()
                        .position(|s| s.energy == e)
                        .expect("the state just found");
                    let (mut g, _) = mrsf_state_gradients_reusing(
                        &c.basis,
                        &c.scf,
                        x,
                        &[i],
                        &calc.potential,
                        &calc.jk,
                        engine,
                        &ZVectorOptions::default(),
                    )?;
                    g.swap_remove(0)
                }
                (GradientKind::Numerical(h), _) => {
                    calc.numerical_gradient(p, h, target, Some(&c.scf))?
                }
            };
            guess = orbital_guess(&c.scf);
            Ok((c.energy, g))
        },
    )
}

/// Both MRSF states of a crossing search at `p`: energies and gradients
/// (analytic, or central differences of both states from one set of
/// displaced calculations), and the calculation itself.
fn mrsf_state_pair(
    calc: &crate::electronic::qc::gradient::numerical::ScfEnergy,
    p: &[[f64; 3]],
    guess: &crate::electronic::qc::scf::Guess,
    labels: (&str, &str),
    roots: (usize, usize),
    gradient: GradientKind,
) -> Result<
    (
        intersection::StatePair,
        crate::electronic::qc::gradient::numerical::Computed,
        [usize; 2],
    ),
    crate::electronic::qc::gradient::GradientError,
> {
    use crate::electronic::qc::gradient::mrsf::{mrsf_state_gradients_reusing, ZVectorOptions};
    use crate::electronic::qc::gradient::numerical::{
        central_differences_many, orbital_guess, state_energy, Target,
    };
    let (lower, upper) = labels;
    let target = Target::Mrsf {
        label: lower.to_string(),
        singlets: roots.0,
        triplets: roots.1,
    };
    let (c, engine) = calc.compute_with_engine(p, guess, &target)?;
    let x = c.excited.as_ref().expect("MRSF target");
    let (el, eu) = (state_energy(x, lower)?, state_energy(x, upper)?);
    let index = |e: f64| {
        x.states
            .iter()
            .position(|s| s.energy == e)
            .expect("the state just found")
    };
    let indices = [index(el), index(eu)];
    let grads = match gradient {
        GradientKind::Analytic => {
            mrsf_state_gradients_reusing(
                &c.basis,
                &c.scf,
                x,
                &indices,
                &calc.potential,
                &calc.jk,
                engine,
                &ZVectorOptions::default(),
            )?
            .0
        }
        GradientKind::Numerical(step) => {
            let g = orbital_guess(&c.scf);
            central_differences_many(p, step, 2, |q| {
                let d = calc.compute(q, &g, &target).map_err(|e| e.to_string())?;
                let x = d.excited.as_ref().ok_or("no excited states")?;
                Ok(vec![
                    state_energy(x, lower).map_err(|e| e.to_string())?,
                    state_energy(x, upper).map_err(|e| e.to_string())?,
                ])
            })?
        }
    };
    let mut it = grads.into_iter();
    let (lower_gradient, upper_gradient) = (it.next().expect("two"), it.next().expect("two"));
    Ok((
        intersection::StatePair {
            lower: el,
            upper: eu,
            lower_gradient,
            upper_gradient,
        },
        c,
        indices,
    ))
}

/// The derivative coupling ⟨ψ_lower|∂ψ_upper/∂q⟩ (1/bohr) of two MRSF states
/// at `p`, by central differences of the state overlaps with the states at
/// `p` (6N displaced calculations in parallel, each started from the
/// orbitals of `p`); antisymmetrised, (d_lu − d_ul)/2, with the phases of
/// the displaced states aligned to those at `p`.
pub fn mrsf_derivative_coupling(
    calc: &crate::electronic::qc::gradient::numerical::ScfEnergy,
    p: &[[f64; 3]],
    at: &crate::electronic::qc::gradient::numerical::Computed,
    labels: (&str, &str),
    roots: (usize, usize),
    step: f64,
) -> Result<Vec<[f64; 3]>, crate::electronic::qc::gradient::GradientError> {
    use crate::electronic::qc::gradient::numerical::{
        central_differences_many, orbital_guess, state_energy, Target,
    };
    use crate::electronic::qc::response::overlap::{state_overlaps, StateVectors};
    let vectors = |x: &crate::electronic::qc::response::ExcitedStates| {
        let mut idx = [0usize; 2];
        for (k, l) in [labels.0, labels.1].iter().enumerate() {
            let e = state_energy(x, l).map_err(|e| e.to_string())?;
            idx[k] = x
                .states
                .iter()
                .position(|s| s.energy == e)
                .expect("the state just found");
        }
        StateVectors::from_states(x, &idx).map_err(|e| e.to_string())
    };
    let x0 = at.excited.as_ref().expect("MRSF target");
    let v0 = vectors(x0).map_err(crate::electronic::qc::gradient::GradientError::Input)?;
    let guess = orbital_guess(&at.scf);
    let target = Target::Mrsf {
        label: labels.0.to_string(),
        singlets: roots.0,
        triplets: roots.1,
    };
    // The "energies" of the displaced calculations are the overlaps S_lu and
    // S_ul, phase-aligned; their central difference is the coupling.
    let d = central_differences_many(p, step, 2, |q| {
        let c = calc
            .compute(q, &guess, &target)
            .map_err(|e| e.to_string())?;
        let x = c.excited.as_ref().ok_or("no excited states")?;
        let v = vectors(x)?;
        let s = state_overlaps(&v0, &at.basis, &v, &c.basis).map_err(|e| e.to_string())?;
        let (sl, su) = (s[(0, 0)].signum(), s[(1, 1)].signum());
        Ok(vec![s[(0, 1)] * su, s[(1, 0)] * sl])
    })?;
    Ok(d[0]
        .iter()
        .zip(&d[1])
        .map(|(a, b)| {
            [
                0.5 * (a[0] - b[0]),
                0.5 * (a[1] - b[1]),
                0.5 * (a[2] - b[2]),
            ]
        })
        .collect())
}

/// The minimum-energy crossing of two MRSF-TDDFT states of `calc` (labels
/// as [`crate::electronic::qc::response::ExcitedStates::label`], e.g. `S0`
/// and `S1`), with analytic MRSF gradients ([`GradientKind::Analytic`]) or
/// central differences ([`GradientKind::Numerical`]: both states from one
/// set of displaced calculations); each SCF starts from the orbitals of the
/// previous geometry.
#[allow(clippy::too_many_arguments)]
pub fn minimize_mrsf_crossing(
    calc: &crate::electronic::qc::gradient::numerical::ScfEnergy,
    start: &[[f64; 3]],
    lower: &str,
    upper: &str,
    singlets: usize,
    triplets: usize,
    gradient: GradientKind,
    opts: &intersection::CrossingOptions,
) -> Result<intersection::Crossing, OptimizeError> {
    use crate::electronic::qc::gradient::numerical::orbital_guess;
    use crate::electronic::qc::gradient::GradientError;
    use crate::electronic::qc::scf::Guess;
    let mut guess = Guess::AtomicSuperposition;
    intersection::minimize_crossing(
        start,
        opts,
        |p| -> Result<intersection::StatePair, GradientError> {
            let (pair, c, _) = mrsf_state_pair(
                calc,
                p,
                &guess,
                (lower, upper),
                (singlets, triplets),
                gradient,
            )?;
            guess = orbital_guess(&c.scf);
            Ok(pair)
        },
    )
}

/// As [`minimize_mrsf_crossing`], by gradient projection
/// ([`intersection::minimize_crossing_projected`]): with `coupling_step`
/// the second branching-plane vector is the derivative coupling
/// ([`mrsf_derivative_coupling`], central differences with that step, 6N
/// extra calculations per step) while the gap exceeds 10 steps' worth of
/// gap change (10 h |∇ΔE|: closer in, the displaced states swap and the
/// overlaps no longer resolve the coupling), otherwise the branching-plane
/// update.
#[allow(clippy::too_many_arguments)]
pub fn minimize_mrsf_crossing_projected(
    calc: &crate::electronic::qc::gradient::numerical::ScfEnergy,
    start: &[[f64; 3]],
    lower: &str,
    upper: &str,
    singlets: usize,
    triplets: usize,
    gradient: GradientKind,
    coupling_step: Option<f64>,
    opts: &intersection::ProjectionOptions,
) -> Result<intersection::Crossing, OptimizeError> {
    use crate::electronic::qc::gradient::numerical::orbital_guess;
    use crate::electronic::qc::gradient::GradientError;
    use crate::electronic::qc::scf::Guess;
    let mut guess = Guess::AtomicSuperposition;
    intersection::minimize_crossing_projected(
        start,
        opts,
        |p| -> Result<intersection::ProjectedPoint, GradientError> {
            let labels = (lower, upper);
            let roots = (singlets, triplets);
            let (states, c, _) = mrsf_state_pair(calc, p, &guess, labels, roots, gradient)?;
            // Overlap differences resolve the coupling only while the
            // states do not swap within a step: beyond 10 steps from the
            // crossing (gap > 10 h |∇ΔE|); closer in, the branching-plane
            // update carries the last plane on.
            let slope = states
                .upper_gradient
                .iter()
                .flatten()
                .zip(states.lower_gradient.iter().flatten())
                .map(|(u, l)| (u - l) * (u - l))
                .sum::<f64>()
                .sqrt();
            let coupling = match coupling_step {
                Some(h) if states.upper - states.lower > 10.0 * h * slope => {
                    Some(mrsf_derivative_coupling(calc, p, &c, labels, roots, h)?)
                }
                _ => None,
            };
            guess = orbital_guess(&c.scf);
            Ok(intersection::ProjectedPoint { states, coupling })
        },
    )
}
