//! Minimum-energy crossing points between two states of the same spin by
//! the penalty-function method (J. Phys. Chem. B 112, 405 (2008), from
//! memory), which needs only the two states' gradients:
//!
//! ```text
//!   F = (E_I + E_J)/2 + σ ΔE² / (ΔE + α),    ΔE = E_J − E_I ≥ 0,
//!   ∇F = (∇E_I + ∇E_J)/2 + σ (ΔE² + 2αΔE)/(ΔE + α)² ∇ΔE,
//! ```
//!
//! minimised with the quasi-Newton optimiser of this module ([`minimize`]).
//! At a minimum of F the gap is about α |∇Ē·x̂| / (2σ |∇ΔE|) (x̂ the unit
//! gradient difference), so σ is raised stage by stage (σ ← 4σ, starting at
//! the published σ = 3.5 with α = 0.02 Eh) until the gap is below the
//! requested tolerance. The result reports the gap, both energies and the
//! gradient-difference direction x̂ of the branching plane.
//!
//! # Gradient projection
//! [`minimize_crossing_projected`] is the gradient-projection method (Chem.
//! Phys. Lett. 223, 269 (1994), from memory): with x̂ the unit gradient
//! difference, ŷ the second unit vector of the branching plane and
//! P = 1 − x̂x̂ᵀ − ŷŷᵀ the projector onto the intersection space, it drives
//!
//! ```text
//!   g = 2 ΔE x̂ + P ∇Ē,        Ē = (E_I + E_J)/2,
//! ```
//!
//! to zero: the first term closes the gap, the second lowers the energy
//! along the seam. Unlike the penalty function it converges to the crossing
//! itself (gap → 0, P∇Ē → 0). Our solver for these conditions (a composed
//! step, chosen because one BFGS matrix on g mixes the cone's rotating x̂
//! into the seam curvature and stalled on ethylene): each step is the
//! Newton step on the locally linear gap along x̂, −ΔE/|∇ΔE| x̂, plus a BFGS
//! step on P∇Ē in the intersection space (Hessian updated with projected
//! steps and projected mean-gradient differences), each within the trust
//! radius.
//! ŷ is the component orthogonal to x̂ of a derivative-coupling vector when
//! the caller supplies one; otherwise it is estimated from the previous
//! steps by the branching-plane update (J. Chem. Theory Comput. 6, 1538
//! (2010), from memory): ŷ_k ∝ (ŷ_{k−1}·x̂_k) x̂_{k−1} − (x̂_{k−1}·x̂_k) ŷ_{k−1},
//! which stays in the previous branching plane and orthogonal to x̂_k. Our
//! choice for the first step, which has no previous plane: no ŷ (P removes
//! x̂ only), and ŷ_1 = the part of x̂_0 orthogonal to x̂_1. Convergence: gap
//! below the tolerance and the four optimiser criteria of
//! [`OptimizeOptions`] on P∇Ē and the step. The trust radius follows the
//! ratio of the actual change of Ē (less the first-order change from the
//! gap step) to the change the seam step predicts, as in [`minimize`], and
//! is also halved when the gap more than doubles; steps are not rejected.

use super::{minimize, OptimizeError, OptimizeOptions, StepRecord};
use std::fmt;

/// Tunables of [`minimize_crossing`].
#[derive(Clone, Debug, PartialEq)]
pub struct CrossingOptions {
    /// The optimiser's options for each stage.
    pub stage: OptimizeOptions,
    /// α of the penalty (Eh), default 0.02.
    pub alpha: f64,
    /// σ of the first stage, default 3.5.
    pub sigma: f64,
    /// Factor of σ between stages, default 4.
    pub growth: f64,
    /// Largest number of stages, default 8.
    pub max_stages: usize,
    /// Gap at which to stop (Eh), default 1e−4.
    pub gap_tolerance: f64,
}

impl Default for CrossingOptions {
    fn default() -> Self {
        CrossingOptions {
            stage: OptimizeOptions::default(),
            alpha: 0.02,
            sigma: 3.5,
            growth: 4.0,
            max_stages: 8,
            gap_tolerance: 1e-4,
        }
    }
}

/// The two states at one geometry: energies (Eh) and gradients (Eh/bohr).
#[derive(Clone, Debug)]
pub struct StatePair {
    /// Lower state energy.
    pub lower: f64,
    /// Upper state energy.
    pub upper: f64,
    /// Gradient of the lower state.
    pub lower_gradient: Vec<[f64; 3]>,
    /// Gradient of the upper state.
    pub upper_gradient: Vec<[f64; 3]>,
}

/// A located crossing.
#[derive(Clone, Debug)]
pub struct Crossing {
    /// Positions (bohr).
    pub positions: Vec<[f64; 3]>,
    /// The two states there.
    pub states: StatePair,
    /// E_upper − E_lower (Eh).
    pub gap: f64,
    /// Unit gradient difference ∇(E_upper − E_lower)/|…| (branching plane).
    pub gradient_difference: Vec<[f64; 3]>,
    /// σ of the last stage.
    pub sigma: f64,
    /// Stages run (0 for the gradient-projection search).
    pub stages: usize,
    /// The second unit vector of the branching plane, orthogonal to
    /// `gradient_difference` (gradient projection only: from the coupling
    /// vector, or the branching-plane update's estimate).
    pub coupling_direction: Option<Vec<[f64; 3]>>,
    /// All evaluations of all stages.
    pub history: Vec<StepRecord>,
}

impl fmt::Display for Crossing {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.stages == 0 {
            return write!(
                f,
                "E_lower = {:.10} Eh, E_upper = {:.10} Eh, gap = {:.2e} Eh (gradient projection, {} evaluations)",
                self.states.lower,
                self.states.upper,
                self.gap,
                self.history.len()
            );
        }
        write!(
            f,
            "E_lower = {:.10} Eh, E_upper = {:.10} Eh, gap = {:.2e} Eh ({} stages, σ = {:.1}, {} evaluations)",
            self.states.lower,
            self.states.upper,
            self.gap,
            self.stages,
            self.sigma,
            self.history.len()
        )
    }
}

/// Minimise the mean energy of two states subject to their degeneracy.
/// `pair` evaluates both states at a geometry.
pub fn minimize_crossing<F, E>(
    start: &[[f64; 3]],
    opts: &CrossingOptions,
    mut pair: F,
) -> Result<Crossing, OptimizeError>
where
    F: FnMut(&[[f64; 3]]) -> Result<StatePair, E>,
    E: fmt::Display,
{
    if !(opts.alpha > 0.0
        && opts.sigma > 0.0
        && opts.growth > 1.0
        && opts.gap_tolerance > 0.0
        && opts.max_stages > 0)
    {
        return Err(OptimizeError::Options(format!(
            "crossing search needs α > 0, σ > 0, growth > 1, gap tolerance > 0 and at least one stage, got {opts:?}"
        )));
    }
    let mut x = start.to_vec();
    let mut sigma = opts.sigma;
    let mut history = Vec::new();
    let mut last: Option<StatePair> = None;
    for stage in 1..=opts.max_stages {
        let alpha = opts.alpha;
        let s = sigma;
        let mut seen: Option<StatePair> = None;
        let result = minimize(
            &x,
            &opts.stage,
            |p| -> Result<(f64, Vec<[f64; 3]>), String> {
                let st = pair(p).map_err(|e| e.to_string())?;
                let gap = st.upper - st.lower;
                if gap < -1e-10 {
                    return Err(format!(
                        "the upper state lies below the lower one by {:.2e} Eh",
                        -gap
                    ));
                }
                let gap = gap.max(0.0);
                let value = 0.5 * (st.lower + st.upper) + s * gap * gap / (gap + alpha);
                let slope = s * (gap * gap + 2.0 * alpha * gap) / ((gap + alpha) * (gap + alpha));
                let g = st
                    .lower_gradient
                    .iter()
                    .zip(&st.upper_gradient)
                    .map(|(a, b)| {
                        let mut out = [0.0; 3];
                        for k in 0..3 {
                            out[k] = 0.5 * (a[k] + b[k]) + slope * (b[k] - a[k]);
                        }
                        out
                    })
                    .collect();
                seen = Some(st);
                Ok((value, g))
            },
        );
        // A stage ends at a minimum of F, or where the trust radius has
        // collapsed (F resolved to its numerical noise): both are a stage's
        // best point. A step limit is a failure unless the gap is already
        // small enough.
        let (positions, stage_history, exact) = match result {
            Ok(r) => {
                let accepted = r.history.last().is_some_and(|h| h.accepted);
                (r.positions, r.history, accepted)
            }
            Err(OptimizeError::NotConverged {
                last_positions,
                history: h,
                reason,
                ..
            }) => {
                let st = pair(&last_positions).map_err(|e| OptimizeError::Evaluation {
                    step: history.len() + h.len() + 1,
                    message: e.to_string(),
                    last_positions: last_positions.clone(),
                })?;
                let gap = st.upper - st.lower;
                if !reason.starts_with("trust radius") && gap >= opts.gap_tolerance {
                    history.extend(h);
                    return Err(OptimizeError::NotConverged {
                        steps: history.len(),
                        reason: format!(
                            "{reason} in penalty stage {stage} (σ = {sigma:.1}, gap {gap:.2e} Eh)"
                        ),
                        last_positions,
                        energy: 0.5 * (st.lower + st.upper),
                        max_force: 0.0,
                        history,
                    });
                }
                seen = Some(st);
                (last_positions, h, true)
            }
            Err(e) => return Err(e),
        };
        history.extend(stage_history);
        x = positions;
        // The last evaluation need not be at the final point (a rejected
        // step): evaluate there once more only if needed.
        let st = match seen {
            Some(st) if exact => st,
            _ => pair(&x).map_err(|e| OptimizeError::Evaluation {
                step: history.len() + 1,
                message: e.to_string(),
                last_positions: x.clone(),
            })?,
        };
        let gap = st.upper - st.lower;
        tracing::info!("crossing search stage {stage}: σ = {sigma:.1}, gap = {gap:.3e} Eh, mean energy {:.10} Eh", 0.5 * (st.lower + st.upper));
        let converged = gap < opts.gap_tolerance;
        last = Some(st);
        if converged {
            let st = last.take().expect("set");
            let diff: Vec<[f64; 3]> = st
                .upper_gradient
                .iter()
                .zip(&st.lower_gradient)
                .map(|(u, l)| [u[0] - l[0], u[1] - l[1], u[2] - l[2]])
                .collect();
            let norm = diff
                .iter()
                .flatten()
                .map(|v| v * v)
                .sum::<f64>()
                .sqrt()
                .max(f64::MIN_POSITIVE);
            let unit = diff
                .iter()
                .map(|d| [d[0] / norm, d[1] / norm, d[2] / norm])
                .collect();
            return Ok(Crossing {
                positions: x,
                gap,
                states: st,
                gradient_difference: unit,
                sigma,
                stages: stage,
                coupling_direction: None,
                history,
            });
        }
        sigma *= opts.growth;
    }
    let st = last.expect("at least one stage");
    Err(OptimizeError::NotConverged {
        steps: history.len(),
        reason: format!(
            "gap still {:.2e} Eh after {} penalty stages (σ up to {:.1}); tolerance {:.1e} Eh",
            st.upper - st.lower,
            opts.max_stages,
            sigma / opts.growth,
            opts.gap_tolerance
        ),
        last_positions: x,
        energy: 0.5 * (st.lower + st.upper),
        max_force: 0.0,
        history,
    })
}

/// Tunables of [`minimize_crossing_projected`].
#[derive(Clone, Debug, PartialEq)]
pub struct ProjectionOptions {
    /// Step limit, convergence criteria (applied to P∇Ē and the step) and
    /// trust radius.
    pub optimizer: OptimizeOptions,
    /// Gap at which the crossing counts as reached (Eh), default 1e−4.
    pub gap_tolerance: f64,
}

impl Default for ProjectionOptions {
    fn default() -> Self {
        ProjectionOptions {
            optimizer: OptimizeOptions {
                trust_radius: 0.2,
                max_trust_radius: 0.5,
                ..OptimizeOptions::default()
            },
            gap_tolerance: 1e-4,
        }
    }
}

/// The two states at one geometry and, when the caller has one, a
/// derivative-coupling (or interstate-coupling) vector between them: only
/// its direction is used.
#[derive(Clone, Debug)]
pub struct ProjectedPoint {
    /// Energies and gradients.
    pub states: StatePair,
    /// Coupling vector per atom, or `None` for the branching-plane update.
    pub coupling: Option<Vec<[f64; 3]>>,
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn unit(v: &[f64]) -> Option<Vec<f64>> {
    let n = dot(v, v).sqrt();
    (n > 1e-300 && n.is_finite()).then(|| v.iter().map(|x| x / n).collect())
}

/// The part of `v` orthogonal to the unit vector `x`, normalised, unless it
/// is below `1e-6 |v|` (then `v` has no direction out of `x`).
fn orthogonal_unit(v: &[f64], x: &[f64]) -> Option<Vec<f64>> {
    let vx = dot(v, x);
    let r: Vec<f64> = v.iter().zip(x).map(|(a, b)| a - vx * b).collect();
    (dot(&r, &r).sqrt() > 1e-6 * dot(v, v).sqrt())
        .then(|| unit(&r))
        .flatten()
}

/// Minimum-energy crossing of two states by gradient projection (see the
/// module docs). `point` evaluates both states (and optionally a coupling
/// vector) at a geometry.
pub fn minimize_crossing_projected<F, E>(
    start: &[[f64; 3]],
    opts: &ProjectionOptions,
    mut point: F,
) -> Result<Crossing, OptimizeError>
where
    F: FnMut(&[[f64; 3]]) -> Result<ProjectedPoint, E>,
    E: fmt::Display,
{
    let o = &opts.optimizer;
    o.validate()?;
    if !(opts.gap_tolerance.is_finite() && opts.gap_tolerance > 0.0) {
        return Err(OptimizeError::Options(format!(
            "the gap tolerance must be positive, got {}",
            opts.gap_tolerance
        )));
    }
    if start.is_empty() {
        return Err(OptimizeError::Start("no atoms".into()));
    }
    if start.iter().flatten().any(|v| !v.is_finite()) {
        return Err(OptimizeError::Start("non-finite start coordinates".into()));
    }
    let n = 3 * start.len();
    let flat = |v: &[[f64; 3]]| -> Vec<f64> { v.iter().flatten().copied().collect() };
    let mut eval =
        |step: usize, x: &[f64], last: &[f64]| -> Result<ProjectedPoint, OptimizeError> {
            let p = super::to_positions(x);
            let fail = |message: String| OptimizeError::Evaluation {
                step,
                message,
                last_positions: super::to_positions(last),
            };
            let r = point(&p).map_err(|e| fail(e.to_string()))?;
            let st = &r.states;
            let finite =
                |g: &[[f64; 3]]| g.len() == p.len() && g.iter().flatten().all(|v| v.is_finite());
            if !(st.lower.is_finite()
                && st.upper.is_finite()
                && finite(&st.lower_gradient)
                && finite(&st.upper_gradient)
                && r.coupling.as_deref().is_none_or(finite))
            {
                return Err(fail(format!(
                    "non-finite energies, gradients or coupling, or of the wrong length ({} atoms)",
                    p.len()
                )));
            }
            if st.upper - st.lower < -1e-10 {
                return Err(fail(format!(
                    "the upper state lies below the lower one by {:.2e} Eh",
                    st.lower - st.upper
                )));
            }
            Ok(r)
        };
    // Quantities of the gradient-projection step at one point.
    struct Frame {
        gap: f64,
        mean: f64,
        x: Vec<f64>,
        y: Option<Vec<f64>>,
        slope: f64,
        mean_gradient: Vec<f64>,
        projected: Vec<f64>,
    }
    let frame = |r: &ProjectedPoint,
                 previous: Option<(&[f64], Option<&[f64]>)>,
                 step: usize,
                 last: &[f64]|
     -> Result<Frame, OptimizeError> {
        let (gl, gu) = (
            flat(&r.states.lower_gradient),
            flat(&r.states.upper_gradient),
        );
        let diff: Vec<f64> = gu.iter().zip(&gl).map(|(u, l)| u - l).collect();
        let x = unit(&diff).ok_or_else(|| OptimizeError::Evaluation {
            step,
            message: "the two states have the same gradient: no branching plane".into(),
            last_positions: super::to_positions(last),
        })?;
        let y = match (&r.coupling, previous) {
            (Some(c), _) => orthogonal_unit(&flat(c), &x),
            (None, None) => None,
            (None, Some((xp, None))) => orthogonal_unit(xp, &x),
            (None, Some((xp, Some(yp)))) => {
                let (a, b) = (dot(yp, &x), dot(xp, &x));
                let v: Vec<f64> = xp.iter().zip(yp).map(|(xi, yi)| a * xi - b * yi).collect();
                orthogonal_unit(&v, &x).or_else(|| orthogonal_unit(xp, &x))
            }
        };
        let mean_gradient: Vec<f64> = gu.iter().zip(&gl).map(|(u, l)| 0.5 * (u + l)).collect();
        let (gx, gy) = (
            dot(&mean_gradient, &x),
            y.as_deref().map_or(0.0, |y| dot(&mean_gradient, y)),
        );
        let projected: Vec<f64> = (0..n)
            .map(|i| mean_gradient[i] - gx * x[i] - y.as_deref().map_or(0.0, |y| gy * y[i]))
            .collect();
        let gap = (r.states.upper - r.states.lower).max(0.0);
        Ok(Frame {
            slope: dot(&diff, &diff).sqrt(),
            mean_gradient,
            gap,
            mean: 0.5 * (r.states.upper + r.states.lower),
            x,
            y,
            projected,
        })
    };
    let record = |step: usize, f: &Frame, de: f64, p: &[f64], trust: f64| StepRecord {
        step,
        energy: f.mean,
        delta_energy: de,
        max_force: super::max_abs(&f.projected),
        rms_force: super::rms(&f.projected),
        max_step: super::max_abs(p),
        rms_step: super::rms(p),
        trust_radius: trust,
        accepted: true,
    };
    let mut x = flat(start);
    let mut r = eval(1, &x, &x)?;
    let mut f = frame(&r, None, 1, &x)?;
    let mut trust = o.trust_radius;
    let mut history = vec![record(1, &f, 0.0, &[], trust)];
    tracing::info!("crossing (projection) {}  gap {:.3e} Eh", history[0], f.gap);
    let mut h = nalgebra::DMatrix::<f64>::identity(n, n) * o.initial_hessian;
    let mut last_step = (f64::INFINITY, f64::INFINITY);
    let force_ok = |g: &[f64], factor: f64| {
        super::max_abs(g) < o.max_force * factor && super::rms(g) < o.rms_force * factor
    };
    for step in 2..=o.max_steps + 1 {
        let converged = f.gap < opts.gap_tolerance
            && force_ok(&f.projected, 1.0)
            && ((last_step.0 < o.max_step && last_step.1 < o.rms_step)
                || force_ok(&f.projected, 0.01));
        if converged {
            let to = super::to_positions;
            return Ok(Crossing {
                positions: to(&x),
                gap: f.gap,
                gradient_difference: to(&f.x),
                coupling_direction: f.y.as_deref().map(to),
                states: r.states,
                sigma: 0.0,
                stages: 0,
                history,
            });
        }
        if step > o.max_steps {
            break;
        }
        // Newton step on the (locally linear) gap along x̂, and a BFGS step
        // on the mean energy within the intersection space.
        let project = |fr: &Frame, v: &nalgebra::DVector<f64>| {
            let xv = nalgebra::DVector::from_column_slice(&fr.x);
            let mut out = v - &xv * xv.dot(v);
            if let Some(y) = &fr.y {
                let yv = nalgebra::DVector::from_column_slice(y);
                out -= &yv * yv.dot(v);
            }
            out
        };
        let gp = nalgebra::DVector::from_column_slice(&f.projected);
        let mut seam = match h.clone().cholesky() {
            Some(ch) => project(&f, &-ch.solve(&gp)),
            None => -&gp / o.initial_hessian,
        };
        let len = seam.norm();
        let on_boundary = len > trust;
        if on_boundary {
            seam *= trust / len;
        }
        let predicted = gp.dot(&seam) + 0.5 * seam.dot(&(&h * &seam));
        let mut close = nalgebra::DVector::from_column_slice(&f.x) * (-f.gap / f.slope);
        if close.norm() > trust {
            close *= trust / close.norm();
        }
        let p = &seam + &close;
        let xn: Vec<f64> = x.iter().zip(p.iter()).map(|(a, b)| a + b).collect();
        let rn = eval(step, &xn, &x)?;
        let fnew = frame(&rn, Some((&f.x, f.y.as_deref())), step, &x)?;
        // The seam step is judged by the change of the mean energy beyond
        // what the gap step alone explains (first order).
        let gm = nalgebra::DVector::from_column_slice(&f.mean_gradient);
        let actual = fnew.mean - f.mean - gm.dot(&close);
        let ratio = if predicted < 0.0 {
            actual / predicted
        } else {
            1.0
        };
        if ratio < 0.25 || fnew.gap > 2.0 * f.gap.max(opts.gap_tolerance) {
            trust *= 0.5;
        } else if ratio > 0.75 && on_boundary {
            trust = (2.0 * trust).min(o.max_trust_radius);
        }
        // BFGS update in the new intersection space.
        let sp = project(&fnew, &p);
        let yp = project(
            &fnew,
            &(nalgebra::DVector::from_column_slice(&fnew.mean_gradient) - &gm),
        );
        let sy = sp.dot(&yp);
        if sy > 1e-12 * sp.norm() * yp.norm() {
            let hs = &h * &sp;
            let shs = sp.dot(&hs);
            h += &yp * yp.transpose() / sy - &hs * hs.transpose() / shs;
        }
        let ps: Vec<f64> = p.iter().copied().collect();
        let rec = record(step, &fnew, fnew.mean - f.mean, &ps, trust);
        tracing::info!("crossing (projection) {rec}  gap {:.3e} Eh", fnew.gap);
        history.push(rec);
        last_step = (super::max_abs(&ps), super::rms(&ps));
        x = xn;
        r = rn;
        f = fnew;
        if trust < o.min_trust_radius {
            return Err(OptimizeError::NotConverged {
                steps: history.len(),
                reason: format!(
                    "trust radius fell below {:.1e} bohr (gap {:.2e} Eh)",
                    o.min_trust_radius, f.gap
                ),
                last_positions: super::to_positions(&x),
                energy: f.mean,
                max_force: super::max_abs(&f.projected),
                history,
            });
        }
    }
    Err(OptimizeError::NotConverged {
        steps: history.len(),
        reason: format!(
            "step limit {} (gap {:.2e} Eh, tolerance {:.1e} Eh)",
            o.max_steps, f.gap, opts.gap_tolerance
        ),
        last_positions: super::to_positions(&x),
        energy: f.mean,
        max_force: super::max_abs(&f.projected),
        history,
    })
}
