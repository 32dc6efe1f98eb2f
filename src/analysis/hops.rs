//! Hop statistics: attempts per state pair (accepted, frustrated), the
//! hop-time histogram of accepted hops, energy gaps at hops and geometric
//! parameters at hops (from the recorded row nearest the hop step: exact when
//! rows are written every step).

use serde::Serialize;

use super::data::Ensemble;
use super::geometry::Param;
use crate::units;

/// One hop attempt with what was measured at it.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct HopRecord {
    /// Trajectory.
    pub trajectory: usize,
    /// Time (fs).
    pub time_fs: f64,
    /// Step.
    pub step: u64,
    /// From state.
    pub from: usize,
    /// To state.
    pub to: usize,
    /// Accepted (false: frustrated).
    pub accepted: bool,
    /// E_to − E_from (eV).
    pub gap_ev: f64,
    /// Step of the row the geometry was taken from (when geometry was asked for).
    pub geometry_step: Option<u64>,
    /// Geometric parameters, in the order asked for.
    pub geometry: Vec<f64>,
}

/// Counts and gap statistics of one state pair.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PairStats {
    /// From state.
    pub from: usize,
    /// To state.
    pub to: usize,
    /// Accepted hops.
    pub accepted: usize,
    /// Frustrated attempts.
    pub frustrated: usize,
    /// Mean |gap| of accepted hops (eV).
    pub mean_abs_gap_ev: f64,
    /// Standard deviation of the gaps of accepted hops (eV).
    pub sd_gap_ev: f64,
    /// Mean of each geometric parameter over accepted hops.
    pub mean_geometry: Vec<f64>,
}

/// Histogram of accepted hop times.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Histogram {
    /// Bin edges (fs), one more than counts.
    pub edges_fs: Vec<f64>,
    /// Hops per bin.
    pub counts: Vec<usize>,
}

/// Everything about hops.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct HopStats {
    /// Geometric parameters measured (labels).
    pub parameters: Vec<String>,
    /// Per state pair, pairs with at least one attempt.
    pub pairs: Vec<PairStats>,
    /// Histogram of accepted hop times.
    pub histogram: Histogram,
    /// Every attempt in the window.
    #[serde(skip)]
    pub records: Vec<HopRecord>,
}

/// Hop statistics of the non-failed trajectories of `ens` within [from_fs, to_fs].
pub fn hop_stats(
    ens: &Ensemble,
    from_fs: f64,
    to_fs: f64,
    states: &[usize],
    params: &[Param],
    bins: usize,
) -> HopStats {
    let mut records = Vec::new();
    let nd = ens.n_dof;
    for t in ens.trajs.iter().filter(|t| !t.failed()) {
        for h in &t.hops {
            let time_fs = units::au_to_fs(h.time);
            // A small tolerance: times are converted from atomic units.
            let eps = 1e-9 * (1.0 + to_fs.abs());
            if time_fs < from_fs - eps
                || time_fs > to_fs + eps
                || !(states.contains(&h.from) || states.contains(&h.to))
            {
                continue;
            }
            let (mut geometry_step, mut geometry) = (None, Vec::new());
            if !params.is_empty() && !t.steps.is_empty() && t.q.len() == t.steps.len() * nd {
                let j = match t.steps.binary_search(&h.step) {
                    Ok(j) => j,
                    Err(0) => 0,
                    Err(j) if j >= t.steps.len() => t.steps.len() - 1,
                    Err(j) => {
                        if h.step - t.steps[j - 1] <= t.steps[j] - h.step {
                            j - 1
                        } else {
                            j
                        }
                    }
                };
                geometry_step = Some(t.steps[j]);
                let q = &t.q[j * nd..(j + 1) * nd];
                geometry = params.iter().map(|p| p.value(q)).collect();
            }
            records.push(HopRecord {
                trajectory: t.index,
                time_fs,
                step: h.step,
                from: h.from,
                to: h.to,
                accepted: h.accepted,
                gap_ev: units::hartree_to_ev(h.gap),
                geometry_step,
                geometry,
            });
        }
    }
    let mut keys: Vec<(usize, usize)> = records.iter().map(|r| (r.from, r.to)).collect();
    keys.sort();
    keys.dedup();
    let pairs = keys
        .into_iter()
        .map(|(from, to)| {
            let acc: Vec<&HopRecord> = records
                .iter()
                .filter(|r| r.from == from && r.to == to && r.accepted)
                .collect();
            let frustrated = records
                .iter()
                .filter(|r| r.from == from && r.to == to && !r.accepted)
                .count();
            let n = acc.len() as f64;
            let mean_gap = acc.iter().map(|r| r.gap_ev).sum::<f64>() / n;
            let sd = if acc.len() > 1 {
                (acc.iter()
                    .map(|r| (r.gap_ev - mean_gap).powi(2))
                    .sum::<f64>()
                    / (n - 1.0))
                    .sqrt()
            } else {
                f64::NAN
            };
            let mean_geometry = (0..params.len())
                .map(|g| acc.iter().filter_map(|r| r.geometry.get(g)).sum::<f64>() / n)
                .collect();
            PairStats {
                from,
                to,
                accepted: acc.len(),
                frustrated,
                mean_abs_gap_ev: if acc.is_empty() {
                    f64::NAN
                } else {
                    acc.iter().map(|r| r.gap_ev.abs()).sum::<f64>() / n
                },
                sd_gap_ev: sd,
                mean_geometry,
            }
        })
        .collect();
    let bins = bins.max(1);
    let width = (to_fs - from_fs).max(1e-12) / bins as f64;
    let edges_fs = (0..=bins).map(|b| from_fs + b as f64 * width).collect();
    let mut counts = vec![0; bins];
    for r in records.iter().filter(|r| r.accepted) {
        let b = (((r.time_fs - from_fs) / width).floor() as usize).min(bins - 1);
        counts[b] += 1;
    }
    HopStats {
        parameters: params.iter().map(Param::label).collect(),
        pairs,
        histogram: Histogram { edges_fs, counts },
        records,
    }
}

/// CSV of every hop attempt.
pub fn records_csv(stats: &HopStats) -> String {
    let mut s = String::from("trajectory,time_fs,step,from,to,accepted,gap_ev,geometry_step");
    for p in &stats.parameters {
        s.push(',');
        s.push_str(p);
    }
    s.push('\n');
    for r in &stats.records {
        s.push_str(&format!(
            "{},{:.6},{},{},{},{},{:.8},{}",
            r.trajectory,
            r.time_fs,
            r.step,
            r.from,
            r.to,
            r.accepted,
            r.gap_ev,
            r.geometry_step.map_or(String::new(), |x| x.to_string())
        ));
        for g in &r.geometry {
            s.push_str(&format!(",{g:.6}"));
        }
        s.push('\n');
    }
    s
}
