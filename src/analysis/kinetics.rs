//! Kinetic models fitted to the fraction-of-trajectories curves, with
//! percentile bootstrap intervals over trajectories.
//!
//! - Decay of a state with optional delay t0: P(t) = 1 for t ≤ t0,
//!   exp(−(t − t0)/τ) for t > t0 (t0 = 0 without delay). Rise: 1 − P(t).
//! - Sequential first-order reactions A → B → C with k1 = 1/τ1, k2 = 1/τ2,
//!   everything in A at t = 0 (textbook solution of consecutive reactions):
//!   A = e^{−k1 t}, B = k1/(k2 − k1) (e^{−k1 t} − e^{−k2 t}) (k t e^{−k t} when
//!   k1 = k2 = k), C = 1 − A − B. The three curves are fitted together.
//!
//! Lifetimes are fitted as ln τ (so they stay positive). The bootstrap draws
//! the trajectories with replacement (one seeded generator per resample, so
//! the result does not depend on the number of threads), recomputes the
//! fraction curves and refits from the point estimate; the interval is the
//! 2.5 and 97.5 percentiles of the refitted values (the percentile bootstrap;
//! Ann. Stat. 7, 1 (1979)).

use rand::Rng;
use rayon::prelude::*;
use serde::Serialize;

use super::fit::levenberg_marquardt;
use super::populations::Grid;
use super::{input, AnalysisError};

/// A kinetic model to fit.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[serde(tag = "model", rename_all = "snake_case")]
pub enum Model {
    /// Decay of a state's fraction from 1.
    Decay { state: usize, delay: bool },
    /// Rise of a state's fraction from 0.
    Rise { state: usize, delay: bool },
    /// A → B → C.
    Sequential { a: usize, b: usize, c: usize },
}

impl Model {
    /// Parse `decay:S`, `rise:S` or `seq:A,B,C`.
    pub fn parse(s: &str, delay: bool) -> Result<Model, String> {
        let (kind, rest) = s
            .split_once(':')
            .ok_or_else(|| format!("--fit `{s}`: expected decay:STATE, rise:STATE or seq:A,B,C"))?;
        let nums: Result<Vec<usize>, _> =
            rest.split(',').map(|x| x.trim().parse::<usize>()).collect();
        let nums =
            nums.map_err(|_| format!("--fit `{s}`: `{rest}` is not a list of state numbers"))?;
        match (kind.trim(), nums.as_slice()) {
            ("decay", [st]) => Ok(Model::Decay { state: *st, delay }),
            ("rise", [st]) => Ok(Model::Rise { state: *st, delay }),
            ("seq", [a, b, c]) if a != b && b != c && a != c => Ok(Model::Sequential {
                a: *a,
                b: *b,
                c: *c,
            }),
            ("seq", [_, _, _]) => Err(format!(
                "--fit `{s}`: the three states of a sequential model must differ"
            )),
            _ => Err(format!(
                "--fit `{s}`: expected decay:STATE, rise:STATE or seq:A,B,C"
            )),
        }
    }

    /// States whose curves are fitted.
    pub fn states(&self) -> Vec<usize> {
        match self {
            Model::Decay { state, .. } | Model::Rise { state, .. } => vec![*state],
            Model::Sequential { a, b, c } => vec![*a, *b, *c],
        }
    }

    /// Names and units of the parameters.
    pub fn param_names(&self) -> Vec<&'static str> {
        match self {
            Model::Decay { delay: true, .. } | Model::Rise { delay: true, .. } => {
                vec!["tau_fs", "t0_fs"]
            }
            Model::Decay { .. } | Model::Rise { .. } => vec!["tau_fs"],
            Model::Sequential { .. } => vec!["tau1_fs", "tau2_fs"],
        }
    }

    /// Short description.
    pub fn describe(&self) -> String {
        match self {
            Model::Decay { state, delay } => format!(
                "decay of state {state}{}",
                if *delay { " with delay" } else { "" }
            ),
            Model::Rise { state, delay } => format!(
                "rise of state {state}{}",
                if *delay { " with delay" } else { "" }
            ),
            Model::Sequential { a, b, c } => format!("sequential {a} -> {b} -> {c}"),
        }
    }

    /// Physical parameters (τ in fs, t0 in fs) from fit parameters.
    fn physical(&self, p: &[f64]) -> Vec<f64> {
        match self {
            Model::Sequential { .. } => vec![p[0].exp(), p[1].exp()],
            _ => {
                let mut v = vec![p[0].exp()];
                if p.len() > 1 {
                    v.push(p[1]);
                }
                v
            }
        }
    }

    /// Model curves at time t (fs), one per fitted state, from physical parameters.
    pub fn eval(&self, phys: &[f64], t: f64, out: &mut [f64]) {
        match self {
            Model::Decay { .. } | Model::Rise { .. } => {
                let tau = phys[0];
                let t0 = phys.get(1).copied().unwrap_or(0.0);
                let d = if t <= t0 {
                    1.0
                } else {
                    (-(t - t0) / tau).exp()
                };
                out[0] = if matches!(self, Model::Rise { .. }) {
                    1.0 - d
                } else {
                    d
                };
            }
            Model::Sequential { .. } => {
                let (k1, k2) = (1.0 / phys[0], 1.0 / phys[1]);
                let a = (-k1 * t).exp();
                let b = if ((k2 - k1) / k1).abs() < 1e-6 {
                    let k = 0.5 * (k1 + k2);
                    k * t * (-k * t).exp()
                } else {
                    k1 / (k2 - k1) * (a - (-k2 * t).exp())
                };
                out[0] = a;
                out[1] = b;
                out[2] = 1.0 - a - b;
            }
        }
    }
}

/// An estimate with its 95 % bootstrap interval.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Estimate {
    /// Parameter name (unit in the name).
    pub name: String,
    /// Point estimate.
    pub value: f64,
    /// 2.5th percentile of the bootstrap values.
    pub lower95: f64,
    /// 97.5th percentile of the bootstrap values.
    pub upper95: f64,
}

/// A fitted model.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct FitReport {
    /// The model.
    pub model: Model,
    /// Description.
    pub description: String,
    /// Parameters with intervals.
    pub parameters: Vec<Estimate>,
    /// Root mean square of the residuals over all fitted points.
    pub residual_rms: f64,
    /// Coefficient of determination, 1 − SS_res/SS_tot.
    pub r_squared: f64,
    /// Whether the point fit met its convergence test.
    pub converged: bool,
    /// Bootstrap resamples asked for.
    pub resamples: usize,
    /// Resamples whose refit failed (left out of the percentiles).
    pub resamples_failed: usize,
    /// Fitted curve of each fitted state at the window times (`curves[j][t]`).
    #[serde(skip)]
    pub curves: Vec<Vec<f64>>,
}

/// Fraction curves of `states` on the window from weighted counts.
fn fractions(
    grid: &Grid,
    window: &std::ops::Range<usize>,
    states: &[usize],
    weights: Option<&[u32]>,
) -> Vec<f64> {
    let (counts, denom) = grid.counts(weights);
    let ns = grid.n_states;
    let mut y = Vec::with_capacity(states.len() * window.len());
    for &s in states {
        for k in window.clone() {
            y.push(if denom[k] > 0.0 {
                counts[k * ns + s] / denom[k]
            } else {
                f64::NAN
            });
        }
    }
    y
}

/// Fit `model` to data `y` (state-major over times `t`) from `p0`.
fn fit_once(model: &Model, t: &[f64], y: &[f64], p0: &[f64]) -> (Vec<f64>, f64, bool) {
    let nt = t.len();
    let ncurves = model.states().len();
    let mut buf = vec![0.0; ncurves];
    let res = levenberg_marquardt(
        |p, r| {
            let phys = model.physical(p);
            for (k, &tk) in t.iter().enumerate() {
                model.eval(&phys, tk, &mut buf);
                for j in 0..ncurves {
                    let yv = y[j * nt + k];
                    r[j * nt + k] = if yv.is_finite() { buf[j] - yv } else { 0.0 };
                }
            }
        },
        nt * ncurves,
        p0,
        200,
    );
    (res.params, res.cost, res.converged)
}

/// Starting parameters from the data: τ where the first curve crosses 1/e.
fn start(model: &Model, t: &[f64], y: &[f64]) -> Vec<f64> {
    let span = (t.last().copied().unwrap_or(1.0) - t.first().copied().unwrap_or(0.0)).max(1e-3);
    let decaying: Vec<f64> = match model {
        Model::Rise { .. } => y[..t.len()].iter().map(|v| 1.0 - v).collect(),
        _ => y[..t.len()].to_vec(),
    };
    let cross = t
        .iter()
        .zip(&decaying)
        .find(|(_, v)| **v <= (-1.0f64).exp())
        .map(|(tk, _)| *tk);
    let tau = cross.filter(|c| *c > 0.0).unwrap_or(2.0 * span);
    match model {
        Model::Sequential { .. } => vec![tau.ln(), (2.0 * tau).ln()],
        Model::Decay { delay: true, .. } | Model::Rise { delay: true, .. } => {
            vec![(0.7 * tau).ln(), 0.3 * tau]
        }
        _ => vec![tau.ln()],
    }
}

/// Percentile with linear interpolation of sorted values.
pub fn percentile(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let x = q * (sorted.len() - 1) as f64;
    let i = x.floor() as usize;
    let f = x - i as f64;
    if i + 1 < sorted.len() {
        sorted[i] * (1.0 - f) + sorted[i + 1] * f
    } else {
        sorted[i]
    }
}

/// Fit `model` on grid points `window`, with `resamples` bootstrap resamples seeded by `seed`.
pub fn fit(
    grid: &Grid,
    window: std::ops::Range<usize>,
    model: &Model,
    resamples: usize,
    seed: u64,
) -> Result<FitReport, AnalysisError> {
    for s in model.states() {
        if s >= grid.n_states {
            return input(format!(
                "--fit {}: state {s} does not exist (the ensemble has {} states, 0 to {})",
                model.describe(),
                grid.n_states,
                grid.n_states - 1
            ));
        }
    }
    let t: Vec<f64> = window.clone().map(|k| grid.times_fs[k]).collect();
    let n_params = model.param_names().len();
    if t.len() <= n_params {
        return input(format!(
            "--fit {}: only {} time points in the window; need more than {n_params}",
            model.describe(),
            t.len()
        ));
    }
    let states = model.states();
    let y = fractions(grid, &window, &states, None);
    let p0 = start(model, &t, &y);
    let (p, cost, converged) = fit_once(model, &t, &y, &p0);
    let finite: Vec<f64> = y.iter().copied().filter(|v| v.is_finite()).collect();
    let mean = finite.iter().sum::<f64>() / finite.len().max(1) as f64;
    let ss_tot: f64 = finite.iter().map(|v| (v - mean).powi(2)).sum();
    let phys = model.physical(&p);
    let mut curves = vec![Vec::with_capacity(t.len()); states.len()];
    let mut buf = vec![0.0; states.len()];
    for &tk in &t {
        model.eval(&phys, tk, &mut buf);
        for (c, v) in curves.iter_mut().zip(&buf) {
            c.push(*v);
        }
    }
    // Bootstrap over trajectories.
    let n = grid.occ.len();
    tracing::info!(
        "{}: {} bootstrap resamples over {} trajectories",
        model.describe(),
        resamples,
        n
    );
    let clock = std::time::Instant::now();
    let boots: Vec<Option<Vec<f64>>> = (0..resamples)
        .into_par_iter()
        .map(|b| {
            let mut rng = crate::swarm::trajectory_rng(seed, b, 0);
            let mut w = vec![0u32; n];
            for _ in 0..n {
                w[rng.gen_range(0..n)] += 1;
            }
            let yb = fractions(grid, &window, &states, Some(&w));
            let (pb, cb, _) = fit_once(model, &t, &yb, &p);
            let v = model.physical(&pb);
            (cb.is_finite() && v.iter().all(|x| x.is_finite())).then_some(v)
        })
        .collect();
    let ok: Vec<&Vec<f64>> = boots.iter().flatten().collect();
    tracing::info!(
        "{}: bootstrap done in {:.2} s",
        model.describe(),
        clock.elapsed().as_secs_f64()
    );
    let failed = resamples - ok.len();
    let names = model.param_names();
    let parameters = names
        .iter()
        .enumerate()
        .map(|(j, name)| {
            let mut v: Vec<f64> = ok.iter().map(|x| x[j]).collect();
            v.sort_by(f64::total_cmp);
            Estimate {
                name: name.to_string(),
                value: phys[j],
                lower95: percentile(&v, 0.025),
                upper95: percentile(&v, 0.975),
            }
        })
        .collect();
    Ok(FitReport {
        model: model.clone(),
        description: model.describe(),
        parameters,
        residual_rms: (cost / finite.len().max(1) as f64).sqrt(),
        r_squared: if ss_tot > 0.0 {
            1.0 - cost / ss_tot
        } else {
            f64::NAN
        },
        converged,
        resamples,
        resamples_failed: failed,
        curves,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Percentiles with linear interpolation between order statistics
    /// (common practice): the median of 1..=5 is 3, the 2.5th percentile of
    /// 0..=100 is 2.5.
    #[test]
    fn percentiles_interpolate() {
        assert_eq!(percentile(&[1.0, 2.0, 3.0, 4.0, 5.0], 0.5), 3.0);
        let v: Vec<f64> = (0..=100).map(f64::from).collect();
        assert!((percentile(&v, 0.025) - 2.5).abs() < 1e-12);
        assert!(percentile(&[], 0.5).is_nan());
    }

    /// Model specifications parse, and bad ones are refused naming --fit (from the option's documentation).
    #[test]
    fn model_specs_parse() {
        assert_eq!(
            Model::parse("decay:2", false),
            Ok(Model::Decay {
                state: 2,
                delay: false
            })
        );
        assert_eq!(
            Model::parse("seq:2,1,0", true),
            Ok(Model::Sequential { a: 2, b: 1, c: 0 })
        );
        assert!(Model::parse("seq:1,1,0", false)
            .unwrap_err()
            .contains("--fit"));
        assert!(Model::parse("decay", false).unwrap_err().contains("--fit"));
    }
}
