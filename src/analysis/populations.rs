//! Populations against time: the fraction of trajectories on each state with
//! 95 % Wilson score intervals, and the mean quantum populations |c|².
//!
//! The time grid has one point every `record_every` steps from step 0 up to the
//! last recorded step of the longest trajectory (that last step is a point too).
//! At a grid point a trajectory counts with the state of its latest row at or
//! before that step. A trajectory that ended before a grid point is handled by
//! the [`Ended`] policy; a failed trajectory is left out everywhere; one still
//! running (an unfinished run) counts only while it has rows.
//!
//! Wilson score interval for k successes in n trials, p̂ = k/n, z = 1.959964:
//! (p̂ + z²/2n ± z √(p̂(1−p̂)/n + z²/4n²)) / (1 + z²/n)  (J. Am. Stat. Assoc. 22, 209 (1927)).

use serde::Serialize;

use super::data::{Ensemble, Traj};
use crate::dynamics::Status;

/// Normal quantile for a two-sided 95 % interval.
pub const Z95: f64 = 1.959_963_984_540_054;

/// What a trajectory that ended before a grid point contributes there.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, clap::ValueEnum)]
#[serde(rename_all = "snake_case")]
pub enum Ended {
    /// Keeps its last state and |c|² (1D scattering that left the interaction
    /// region; trajectories stopped in the ground state).
    Hold,
    /// Leaves the denominator from its end on.
    Drop,
}

/// The state a trajectory is on along the grid, as runs.
#[derive(Clone, Debug, PartialEq)]
pub struct Occupancy {
    /// Counted at grid points `0..end`.
    pub end: usize,
    /// (first grid point, state) of each run, ascending; a run lasts until the next one or `end`.
    pub runs: Vec<(u32, u32)>,
}

/// Grid and per-trajectory occupancy of an ensemble.
#[derive(Clone, Debug, PartialEq)]
pub struct Grid {
    /// Step of every grid point.
    pub steps: Vec<u64>,
    /// Time of every grid point (fs).
    pub times_fs: Vec<f64>,
    /// Number of states.
    pub n_states: usize,
    /// Occupancy of every trajectory used (same order as `used`).
    pub occ: Vec<Occupancy>,
    /// Ensemble indices of the trajectories used.
    pub used: Vec<usize>,
    /// Sum over used trajectories of |c|² at every point, `n_states` per point.
    pub pop_sum: Vec<f64>,
}

/// The Wilson score interval (lower, upper) of k in n at normal quantile z.
pub fn wilson(k: f64, n: f64, z: f64) -> (f64, f64) {
    if n <= 0.0 {
        return (f64::NAN, f64::NAN);
    }
    let p = k / n;
    let z2 = z * z;
    let denom = 1.0 + z2 / n;
    let centre = (p + z2 / (2.0 * n)) / denom;
    let half = z / denom * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).max(0.0).sqrt();
    ((centre - half).max(0.0), (centre + half).min(1.0))
}

impl Grid {
    /// Build the grid of the non-failed trajectories of `ens` under `policy`.
    pub fn new(ens: &Ensemble, policy: Ended) -> Self {
        let r = ens.record_every.max(1);
        let used: Vec<&Traj> = ens
            .trajs
            .iter()
            .filter(|t| !t.failed() && !t.steps.is_empty())
            .collect();
        let last = used
            .iter()
            .filter_map(|t| t.steps.last().copied())
            .max()
            .unwrap_or(0);
        let mut steps: Vec<u64> = (0..=last / r).map(|k| k * r).collect();
        if last % r != 0 {
            steps.push(last);
        }
        let n_grid = steps.len();
        let ns = ens.n_states;
        let mut pop_sum = vec![0.0; n_grid * ns];
        let mut occ = Vec::with_capacity(used.len());
        for t in &used {
            let mut runs: Vec<(u32, u32)> = Vec::new();
            let mut j = 0;
            let t_last = *t.steps.last().unwrap();
            let mut k = 0;
            while k < n_grid && steps[k] <= t_last {
                while j + 1 < t.steps.len() && t.steps[j + 1] <= steps[k] {
                    j += 1;
                }
                let s = t.active[j];
                if runs.last().is_none_or(|&(_, prev)| prev != s) {
                    runs.push((k as u32, s));
                }
                let p = &t.pops[j * ns..(j + 1) * ns];
                for (acc, x) in pop_sum[k * ns..(k + 1) * ns].iter_mut().zip(p) {
                    *acc += x;
                }
                k += 1;
            }
            let mut end = k;
            let holds = policy == Ended::Hold && matches!(t.status, Status::Finished(_));
            if holds {
                let jl = t.steps.len() - 1;
                let s = t.active[jl];
                if end < n_grid && runs.last().is_none_or(|&(_, prev)| prev != s) {
                    runs.push((end as u32, s));
                }
                let p = &t.pops[jl * ns..(jl + 1) * ns];
                for kk in end..n_grid {
                    for (acc, x) in pop_sum[kk * ns..(kk + 1) * ns].iter_mut().zip(p) {
                        *acc += x;
                    }
                }
                end = n_grid;
            }
            occ.push(Occupancy { end, runs });
        }
        let dt_fs = crate::units::au_to_fs(ens.timestep_au);
        let times_fs = steps.iter().map(|&s| s as f64 * dt_fs).collect();
        Self {
            steps,
            times_fs,
            n_states: ns,
            occ,
            used: used.iter().map(|t| t.index).collect(),
            pop_sum,
        }
    }

    /// Counts on each state (`n_states` per grid point) and the number of
    /// trajectories counted at each point, with trajectory `i` counted
    /// `weights[i]` times (all once when `None`).
    pub fn counts(&self, weights: Option<&[u32]>) -> (Vec<f64>, Vec<f64>) {
        let n_grid = self.steps.len();
        let ns = self.n_states;
        let mut diff = vec![0.0; (n_grid + 1) * ns];
        let mut ddiff = vec![0.0; n_grid + 1];
        for (i, o) in self.occ.iter().enumerate() {
            let w = weights.map_or(1.0, |w| w[i] as f64);
            if w == 0.0 {
                continue;
            }
            ddiff[0] += w;
            ddiff[o.end] -= w;
            for (r, &(start, s)) in o.runs.iter().enumerate() {
                let stop = o.runs.get(r + 1).map_or(o.end, |n| n.0 as usize);
                diff[start as usize * ns + s as usize] += w;
                diff[stop * ns + s as usize] -= w;
            }
        }
        let mut counts = vec![0.0; n_grid * ns];
        let mut denom = vec![0.0; n_grid];
        let mut acc = vec![0.0; ns];
        let mut dacc = 0.0;
        for k in 0..n_grid {
            dacc += ddiff[k];
            denom[k] = dacc;
            for s in 0..ns {
                acc[s] += diff[k * ns + s];
                counts[k * ns + s] = acc[s];
            }
        }
        (counts, denom)
    }
}

/// Population curves on a window of the grid.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Populations {
    /// Times (fs).
    pub times_fs: Vec<f64>,
    /// Trajectories counted at each time.
    pub used: Vec<usize>,
    /// States reported.
    pub states: Vec<usize>,
    /// Fraction on each reported state: `fraction[t][j]` for `states[j]`.
    pub fraction: Vec<Vec<f64>>,
    /// Lower end of the 95 % Wilson interval.
    pub lower: Vec<Vec<f64>>,
    /// Upper end of the 95 % Wilson interval.
    pub upper: Vec<Vec<f64>>,
    /// Mean |c|² of each reported state.
    pub mean_population: Vec<Vec<f64>>,
}

impl Populations {
    /// Curves at grid points `window` for `states`.
    pub fn new(grid: &Grid, window: std::ops::Range<usize>, states: &[usize]) -> Self {
        let (counts, denom) = grid.counts(None);
        let ns = grid.n_states;
        let mut p = Populations {
            times_fs: Vec::new(),
            used: Vec::new(),
            states: states.to_vec(),
            fraction: Vec::new(),
            lower: Vec::new(),
            upper: Vec::new(),
            mean_population: Vec::new(),
        };
        for k in window {
            let n = denom[k];
            p.times_fs.push(grid.times_fs[k]);
            p.used.push(n.round() as usize);
            let mut f = Vec::new();
            let mut lo = Vec::new();
            let mut hi = Vec::new();
            let mut c = Vec::new();
            for &s in states {
                let kk = counts[k * ns + s];
                f.push(if n > 0.0 { kk / n } else { f64::NAN });
                let (l, h) = wilson(kk, n, Z95);
                lo.push(l);
                hi.push(h);
                c.push(if n > 0.0 {
                    grid.pop_sum[k * ns + s] / n
                } else {
                    f64::NAN
                });
            }
            p.fraction.push(f);
            p.lower.push(lo);
            p.upper.push(hi);
            p.mean_population.push(c);
        }
        p
    }

    /// CSV: time, trajectories counted, then fraction, interval and mean |c|² per state.
    pub fn to_csv(&self) -> String {
        let mut s = String::from("time_fs,trajectories");
        for st in &self.states {
            s.push_str(&format!(
                ",fraction_{st},fraction_{st}_lower95,fraction_{st}_upper95,mean_population_{st}"
            ));
        }
        s.push('\n');
        for t in 0..self.times_fs.len() {
            s.push_str(&format!("{:.6},{}", self.times_fs[t], self.used[t]));
            for j in 0..self.states.len() {
                s.push_str(&format!(
                    ",{:.6},{:.6},{:.6},{:.6}",
                    self.fraction[t][j],
                    self.lower[t][j],
                    self.upper[t][j],
                    self.mean_population[t][j]
                ));
            }
            s.push('\n');
        }
        s
    }
}
