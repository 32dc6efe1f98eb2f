//! The end-of-run summary: branching ratios with standard errors for 1D
//! scattering models, final state fractions and quantum populations, failures.

use serde::Serialize;

use super::Outcome;
use crate::config::{ModelSpec, RunConfig};
use crate::dynamics::{EndReason, Status};

/// Where a trajectory ended.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Channel {
    /// Left at the low side (reflection).
    Reflected,
    /// Left at the high side (transmission).
    Transmitted,
    /// Still inside when the time ran out.
    Inside,
}

/// A fraction of trajectories with its binomial standard error.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ChannelEstimate {
    /// Channel.
    pub channel: Channel,
    /// Final active state.
    pub state: usize,
    /// Fraction of the finished trajectories.
    pub probability: f64,
    /// sqrt(p(1−p)/N).
    pub standard_error: f64,
    /// Number of trajectories.
    pub count: usize,
}

/// What `flipswarm run` prints.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Summary {
    /// Ensemble title.
    pub title: String,
    /// Trajectories asked for.
    pub trajectories: usize,
    /// Trajectories that finished normally.
    pub finished: usize,
    /// Failed trajectories: (index, step, reason).
    pub failed: Vec<(usize, u64, String)>,
    /// Channel probabilities (1D models); empty otherwise.
    pub channels: Vec<ChannelEstimate>,
    /// Fraction of finished trajectories on each state at the end, with standard errors.
    pub state_fractions: Vec<(f64, f64)>,
    /// Mean |c_j|² at the end over finished trajectories.
    pub mean_populations: Vec<f64>,
    /// Accepted and frustrated hops.
    pub hops_accepted: usize,
    /// Frustrated hop attempts.
    pub hops_frustrated: usize,
    /// Largest total-energy drift of any finished trajectory (hartree).
    pub max_energy_drift: f64,
}

fn estimate(count: usize, n: usize) -> (f64, f64) {
    if n == 0 {
        return (0.0, 0.0);
    }
    let p = count as f64 / n as f64;
    (p, (p * (1.0 - p) / n as f64).sqrt())
}

impl Summary {
    /// Summarise outcomes of an ensemble.
    pub fn new(cfg: &RunConfig, outcomes: &[Outcome]) -> Self {
        let n_states = cfg.model.n_states();
        let ok: Vec<&Outcome> = outcomes
            .iter()
            .filter(|o| matches!(o.status, Status::Finished(_)))
            .collect();
        let failed = outcomes
            .iter()
            .filter_map(|o| match &o.status {
                Status::Failed { step, reason } => Some((o.index, *step, reason.clone())),
                _ => None,
            })
            .collect();
        let n = ok.len();
        let mut channels = Vec::new();
        if !matches!(cfg.model, ModelSpec::Lvc { .. }) && cfg.settings.exit_region.is_some() {
            for channel in [Channel::Reflected, Channel::Transmitted, Channel::Inside] {
                for state in 0..n_states {
                    let count = ok
                        .iter()
                        .filter(|o| o.active == state && channel_of(&o.status) == Some(channel))
                        .count();
                    if channel == Channel::Inside && count == 0 {
                        continue;
                    }
                    let (probability, standard_error) = estimate(count, n);
                    channels.push(ChannelEstimate {
                        channel,
                        state,
                        probability,
                        standard_error,
                        count,
                    });
                }
            }
        }
        let state_fractions = (0..n_states)
            .map(|s| estimate(ok.iter().filter(|o| o.active == s).count(), n))
            .collect();
        let mean_populations = (0..n_states)
            .map(|s| {
                if n == 0 {
                    0.0
                } else {
                    ok.iter().map(|o| o.populations[s]).sum::<f64>() / n as f64
                }
            })
            .collect();
        let hops = outcomes.iter().flat_map(|o| o.hops.iter());
        let (acc, fru) = hops.fold(
            (0, 0),
            |(a, f), h| if h.accepted { (a + 1, f) } else { (a, f + 1) },
        );
        Self {
            title: cfg.title.clone(),
            trajectories: outcomes.len(),
            finished: n,
            failed,
            channels,
            state_fractions,
            mean_populations,
            hops_accepted: acc,
            hops_frustrated: fru,
            max_energy_drift: ok.iter().map(|o| o.max_drift).fold(0.0, f64::max),
        }
    }

    /// The probability of one channel and state (0 when absent).
    pub fn channel(&self, channel: Channel, state: usize) -> Option<&ChannelEstimate> {
        self.channels
            .iter()
            .find(|c| c.channel == channel && c.state == state)
    }

    /// Human-readable table.
    pub fn to_text(&self) -> String {
        use std::fmt::Write;
        let mut s = String::new();
        let ev = crate::units::hartree_to_ev(self.max_energy_drift);
        if !self.title.is_empty() {
            let _ = writeln!(s, "{}", self.title);
        }
        let _ = writeln!(
            s,
            "trajectories: {} run, {} finished, {} failed",
            self.trajectories,
            self.finished,
            self.failed.len()
        );
        if !self.channels.is_empty() {
            let _ = writeln!(s, "\n  channel      state  probability  std. error  count");
            for c in &self.channels {
                let name = match c.channel {
                    Channel::Reflected => "reflected",
                    Channel::Transmitted => "transmitted",
                    Channel::Inside => "inside",
                };
                let _ = writeln!(
                    s,
                    "  {name:<11}  {:>5}  {:>11.4}  {:>10.4}  {:>5}",
                    c.state, c.probability, c.standard_error, c.count
                );
            }
        }
        let _ = writeln!(s, "\n  state  fraction on state  std. error  mean |c|²");
        for (k, ((p, e), c)) in self
            .state_fractions
            .iter()
            .zip(&self.mean_populations)
            .enumerate()
        {
            let _ = writeln!(s, "  {k:>5}  {p:>17.4}  {e:>10.4}  {c:>9.4}");
        }
        let _ = writeln!(
            s,
            "\nhops: {} accepted, {} frustrated; largest energy drift {:.2e} hartree ({:.2e} eV)",
            self.hops_accepted, self.hops_frustrated, self.max_energy_drift, ev
        );
        for (i, step, reason) in self.failed.iter().take(20) {
            let _ = writeln!(s, "failed: trajectory {i} at step {step}: {reason}");
        }
        if self.failed.len() > 20 {
            let _ = writeln!(s, "failed: … and {} more", self.failed.len() - 20);
        }
        s
    }
}

fn channel_of(status: &Status) -> Option<Channel> {
    match status {
        Status::Finished(EndReason::ExitLow) => Some(Channel::Reflected),
        Status::Finished(EndReason::ExitHigh) => Some(Channel::Transmitted),
        Status::Finished(_) => Some(Channel::Inside),
        _ => None,
    }
}

/// Ensemble-averaged population curves.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PopulationCurves {
    /// Times (a.u.).
    pub times: Vec<f64>,
    /// Fraction of trajectories on each state: `fractions[t][state]`.
    pub fractions: Vec<Vec<f64>>,
    /// Mean |c|² of each state: `populations[t][state]`.
    pub populations: Vec<Vec<f64>>,
    /// Trajectories contributing.
    pub trajectories: usize,
}

impl PopulationCurves {
    /// Average the recorded series of the finished trajectories; a trajectory
    /// that ended before the others (left a 1D interaction region) keeps its
    /// last values.
    pub fn new(cfg: &RunConfig, outcomes: &[Outcome], record_every: u64) -> Self {
        let n_states = cfg.model.n_states();
        let ok: Vec<&Outcome> = outcomes
            .iter()
            .filter(|o| matches!(o.status, Status::Finished(_)) && !o.series.is_empty())
            .collect();
        let len = ok.iter().map(|o| o.series.len()).max().unwrap_or(0);
        let mut fractions = vec![vec![0.0; n_states]; len];
        let mut populations = vec![vec![0.0; n_states]; len];
        let w = 1.0 / ok.len().max(1) as f64;
        for o in &ok {
            for t in 0..len {
                let (active, pops) = &o.series[t.min(o.series.len() - 1)];
                fractions[t][*active] += w;
                for (p, x) in populations[t].iter_mut().zip(pops) {
                    *p += w * x;
                }
            }
        }
        let times = (0..len)
            .map(|t| t as f64 * record_every as f64 * cfg.settings.dt)
            .collect();
        Self {
            times,
            fractions,
            populations,
            trajectories: ok.len(),
        }
    }

    /// CSV text: time in fs, then fraction and mean |c|² per state.
    pub fn to_csv(&self) -> String {
        let n = self.fractions.first().map_or(0, Vec::len);
        let mut s = String::from("time_fs");
        for k in 0..n {
            s.push_str(&format!(",fraction_{k}"));
        }
        for k in 0..n {
            s.push_str(&format!(",population_{k}"));
        }
        s.push('\n');
        for (t, time) in self.times.iter().enumerate() {
            s.push_str(&format!("{:.6}", crate::units::au_to_fs(*time)));
            for x in self.fractions[t].iter().chain(&self.populations[t]) {
                s.push_str(&format!(",{x:.6}"));
            }
            s.push('\n');
        }
        s
    }
}
