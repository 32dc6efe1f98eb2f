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
//! gradient-difference direction x̂ of the branching plane (the coupling
//! direction needs coupling vectors, which the caller may add).

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
    /// Stages run.
    pub stages: usize,
    /// All evaluations of all stages.
    pub history: Vec<StepRecord>,
}

impl fmt::Display for Crossing {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
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
