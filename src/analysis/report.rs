//! The whole analysis of an ensemble as one value: text table, JSON, CSV
//! files and figures.

use std::path::{Path, PathBuf};

use serde::Serialize;

use super::data::{Ensemble, Traj};
use super::geometry::Param;
use super::hops::{self, HopStats};
use super::kinetics::{self, FitReport, Model};
use super::plot::{self, Band, Chart, Line};
use super::populations::{Ended, Grid, Populations};
use super::{input, AnalysisError};
use crate::dynamics::Status;
use crate::units;

/// What to analyse and how.
#[derive(Clone, Debug)]
pub struct Options {
    /// Policy for trajectories that ended before the others.
    pub ended: Ended,
    /// Start of the time window (fs).
    pub from_fs: Option<f64>,
    /// End of the time window (fs).
    pub to_fs: Option<f64>,
    /// States to report (all when `None`).
    pub states: Option<Vec<usize>>,
    /// Kinetic models to fit.
    pub fits: Vec<Model>,
    /// Bootstrap resamples.
    pub resamples: usize,
    /// Bootstrap seed.
    pub seed: u64,
    /// Geometric parameters at hops.
    pub params: Vec<Param>,
    /// Bins of the hop-time histogram.
    pub bins: usize,
}

impl Default for Options {
    fn default() -> Self {
        Self {
            ended: Ended::Hold,
            from_fs: None,
            to_fs: None,
            states: None,
            fits: Vec::new(),
            resamples: 1000,
            seed: 1,
            params: Vec::new(),
            bins: 40,
        }
    }
}

/// A failed trajectory.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Failed {
    /// Trajectory.
    pub trajectory: usize,
    /// Step at which it failed.
    pub step: u64,
    /// Why.
    pub reason: String,
}

/// Fraction on a state at one time.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct StateFraction {
    /// State.
    pub state: usize,
    /// Fraction of trajectories.
    pub fraction: f64,
    /// 95 % Wilson interval, lower end.
    pub lower95: f64,
    /// 95 % Wilson interval, upper end.
    pub upper95: f64,
    /// Mean |c|².
    pub mean_population: f64,
}

/// Energy conservation over the trajectories used.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct EnergyStats {
    /// Mean over trajectories of max |E_tot(t) − E_tot(0)| (eV).
    pub mean_max_drift_ev: f64,
    /// Largest max |E_tot(t) − E_tot(0)| (eV).
    pub max_drift_ev: f64,
    /// Trajectory with the largest drift.
    pub worst_trajectory: Option<usize>,
    /// (trajectory, max drift in eV) of every trajectory used.
    #[serde(skip)]
    pub per_trajectory: Vec<(usize, f64)>,
}

/// The analysis.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Analysis {
    /// Files read.
    pub files: Vec<PathBuf>,
    /// Electronic states.
    pub n_states: usize,
    /// Trajectories read (with data).
    pub trajectories_read: usize,
    /// Trajectories in the populations (not failed).
    pub trajectories_used: usize,
    /// Trajectories listed in the files but never started.
    pub trajectories_pending: usize,
    /// Trajectories still running (unfinished runs): counted while they have rows.
    pub trajectories_unfinished: usize,
    /// Failed trajectories (left out).
    pub failed: Vec<Failed>,
    /// Policy for trajectories that ended early.
    pub ended_policy: Ended,
    /// Rows every this many steps.
    pub record_every_steps: u64,
    /// Time step (fs).
    pub timestep_fs: f64,
    /// The time window analysed (fs), as the first and last grid times in it.
    pub window_fs: (f64, f64),
    /// Fractions at the last time of the window.
    pub final_time_fs: f64,
    /// Trajectories counted at the last time of the window.
    pub final_trajectories: usize,
    /// Fractions on each reported state at the last time.
    pub final_fractions: Vec<StateFraction>,
    /// Kinetic fits.
    pub fits: Vec<FitReport>,
    /// Hops.
    pub hops: HopStats,
    /// Energy conservation.
    pub energy: EnergyStats,
    /// Population curves (written as CSV, not in the JSON summary).
    #[serde(skip)]
    pub populations: Populations,
}

/// Analyse `ens`.
pub fn analyse(ens: &Ensemble, opts: &Options) -> Result<Analysis, AnalysisError> {
    let states: Vec<usize> = match &opts.states {
        Some(s) => {
            for &x in s {
                if x >= ens.n_states {
                    return input(format!(
                        "--states: state {x} does not exist (the ensemble has {} states, 0 to {})",
                        ens.n_states,
                        ens.n_states - 1
                    ));
                }
            }
            s.clone()
        }
        None => (0..ens.n_states).collect(),
    };
    for p in &opts.params {
        p.check(ens.n_dof)?;
    }
    let grid = Grid::new(ens, opts.ended);
    if grid.occ.is_empty() {
        return input(format!(
            "{}: no trajectory can be analysed: all {} failed or have no rows",
            super::data::file_list(&ens.files),
            ens.trajs.len()
        ));
    }
    let t_end = *grid.times_fs.last().unwrap();
    let from = opts.from_fs.unwrap_or(0.0);
    let to = opts.to_fs.unwrap_or(t_end);
    if !(from.is_finite() && to.is_finite())
        || (opts.from_fs.is_some() && opts.to_fs.is_some() && from > to)
    {
        return input(format!(
            "--from-fs {from} / --to-fs {to}: not a time window (need from ≤ to)"
        ));
    }
    let lo = grid.times_fs.iter().position(|&t| t >= from - 1e-9);
    let hi = grid.times_fs.iter().rposition(|&t| t <= to + 1e-9);
    let window = match (lo, hi) {
        (Some(a), Some(b)) if a <= b => a..b + 1,
        _ => return input(format!("--from-fs/--to-fs: the window {from} to {to} fs lies outside the data, which span 0 to {t_end:.4} fs")),
    };
    let populations = Populations::new(&grid, window.clone(), &states);
    let last = populations.times_fs.len() - 1;
    let final_fractions = states
        .iter()
        .enumerate()
        .map(|(j, &s)| StateFraction {
            state: s,
            fraction: populations.fraction[last][j],
            lower95: populations.lower[last][j],
            upper95: populations.upper[last][j],
            mean_population: populations.mean_population[last][j],
        })
        .collect();
    let mut fits = Vec::new();
    for m in &opts.fits {
        fits.push(kinetics::fit(
            &grid,
            window.clone(),
            m,
            opts.resamples,
            opts.seed,
        )?);
    }
    let window_fs = (grid.times_fs[window.start], grid.times_fs[window.end - 1]);
    let hops = hops::hop_stats(
        ens,
        window_fs.0,
        window_fs.1,
        &states,
        &opts.params,
        opts.bins,
    );
    let used: Vec<&Traj> = ens.trajs.iter().filter(|t| !t.failed()).collect();
    let per_trajectory: Vec<(usize, f64)> = used
        .iter()
        .map(|t| (t.index, units::hartree_to_ev(t.max_energy_drift())))
        .collect();
    let worst = per_trajectory
        .iter()
        .copied()
        .max_by(|a, b| a.1.total_cmp(&b.1));
    let energy = EnergyStats {
        mean_max_drift_ev: per_trajectory.iter().map(|x| x.1).sum::<f64>()
            / per_trajectory.len().max(1) as f64,
        max_drift_ev: worst.map_or(0.0, |w| w.1),
        worst_trajectory: worst.map(|w| w.0),
        per_trajectory,
    };
    let failed = ens
        .trajs
        .iter()
        .filter_map(|t| match &t.status {
            Status::Failed { step, reason } => Some(Failed {
                trajectory: t.index,
                step: *step,
                reason: reason.clone(),
            }),
            _ => None,
        })
        .collect();
    Ok(Analysis {
        files: ens.files.clone(),
        n_states: ens.n_states,
        trajectories_read: ens.trajs.len(),
        trajectories_used: grid.occ.len(),
        trajectories_pending: ens.pending,
        trajectories_unfinished: ens
            .trajs
            .iter()
            .filter(|t| matches!(t.status, Status::Running))
            .count(),
        failed,
        ended_policy: opts.ended,
        record_every_steps: ens.record_every,
        timestep_fs: units::au_to_fs(ens.timestep_au),
        window_fs,
        final_time_fs: populations.times_fs[last],
        final_trajectories: populations.used[last],
        final_fractions,
        fits,
        hops,
        energy,
        populations,
    })
}

fn fmt_ci(v: f64, lo: f64, hi: f64) -> String {
    format!("{v:.4} [{lo:.4}, {hi:.4}]")
}

impl Analysis {
    /// The terminal summary.
    pub fn to_text(&self) -> String {
        use std::fmt::Write;
        let mut s = String::new();
        let _ = writeln!(s, "ensemble: {}", super::data::file_list(&self.files));
        let _ = writeln!(
            s,
            "trajectories: {} read, {} used, {} failed (left out), {} unfinished, {} never started; ended early: {}",
            self.trajectories_read,
            self.trajectories_used,
            self.failed.len(),
            self.trajectories_unfinished,
            self.trajectories_pending,
            match self.ended_policy {
                Ended::Hold => "hold their last state",
                Ended::Drop => "dropped from the count",
            }
        );
        let _ = writeln!(
            s,
            "window: {:.3} to {:.3} fs; rows every {} steps of {:.4} fs",
            self.window_fs.0, self.window_fs.1, self.record_every_steps, self.timestep_fs
        );
        let _ = writeln!(
            s,
            "\nat {:.3} fs ({} trajectories):",
            self.final_time_fs, self.final_trajectories
        );
        let _ = writeln!(s, "  state  fraction [95% Wilson]       mean |c|²");
        for f in &self.final_fractions {
            let _ = writeln!(
                s,
                "  {:>5}  {:<26}  {:>9.4}",
                f.state,
                fmt_ci(f.fraction, f.lower95, f.upper95),
                f.mean_population
            );
        }
        if !self.fits.is_empty() {
            let _ = writeln!(
                s,
                "\nkinetic fits (95% bootstrap intervals over trajectories):"
            );
            for f in &self.fits {
                let ps: Vec<String> = f
                    .parameters
                    .iter()
                    .map(|p| {
                        format!(
                            "{} = {:.3} [{:.3}, {:.3}]",
                            p.name, p.value, p.lower95, p.upper95
                        )
                    })
                    .collect();
                let _ = writeln!(
                    s,
                    "  {}: {}; residual RMS {:.4}, R² {:.4}; {} resamples ({} failed){}",
                    f.description,
                    ps.join(", "),
                    f.residual_rms,
                    f.r_squared,
                    f.resamples,
                    f.resamples_failed,
                    if f.converged {
                        ""
                    } else {
                        "; point fit did not converge"
                    }
                );
            }
        }
        let _ = writeln!(s, "\nhops in the window:");
        let _ = writeln!(
            s,
            "  from  to  accepted  frustrated  mean |gap| (eV){}",
            self.hops
                .parameters
                .iter()
                .map(|p| format!("  {p}"))
                .collect::<String>()
        );
        for p in &self.hops.pairs {
            let g: String = p
                .mean_geometry
                .iter()
                .zip(&self.hops.parameters)
                .map(|(v, l)| format!("  {v:>w$.3}", w = l.len()))
                .collect();
            let _ = writeln!(
                s,
                "  {:>4}  {:>2}  {:>8}  {:>10}  {:>15.4}{g}",
                p.from, p.to, p.accepted, p.frustrated, p.mean_abs_gap_ev
            );
        }
        if self.hops.pairs.is_empty() {
            let _ = writeln!(s, "  none");
        }
        let _ = writeln!(
            s,
            "\nenergy conservation: max |E_tot(t) − E_tot(0)| per trajectory: mean {:.3e} eV, largest {:.3e} eV{}",
            self.energy.mean_max_drift_ev,
            self.energy.max_drift_ev,
            self.energy.worst_trajectory.map_or(String::new(), |w| format!(" (trajectory {w})"))
        );
        for f in self.failed.iter().take(20) {
            let _ = writeln!(
                s,
                "failed: trajectory {} at step {}: {}",
                f.trajectory, f.step, f.reason
            );
        }
        if self.failed.len() > 20 {
            let _ = writeln!(s, "failed: … and {} more", self.failed.len() - 20);
        }
        s
    }

    /// CSV of the fitted curves beside the data.
    pub fn fits_csv(&self) -> String {
        let mut s = String::from("time_fs");
        for (i, f) in self.fits.iter().enumerate() {
            for st in f.model.states() {
                s.push_str(&format!(",fit{i}_state{st}"));
            }
        }
        s.push('\n');
        for (k, t) in self.populations.times_fs.iter().enumerate() {
            s.push_str(&format!("{t:.6}"));
            for f in &self.fits {
                for c in &f.curves {
                    s.push_str(&format!(",{:.6}", c[k]));
                }
            }
            s.push('\n');
        }
        s
    }

    /// CSV of the hop counts per pair.
    pub fn pairs_csv(&self) -> String {
        let mut s = String::from("from,to,accepted,frustrated,mean_abs_gap_ev,sd_gap_ev");
        for p in &self.hops.parameters {
            s.push_str(&format!(",mean_{p}"));
        }
        s.push('\n');
        for p in &self.hops.pairs {
            s.push_str(&format!(
                "{},{},{},{},{:.6},{:.6}",
                p.from, p.to, p.accepted, p.frustrated, p.mean_abs_gap_ev, p.sd_gap_ev
            ));
            for g in &p.mean_geometry {
                s.push_str(&format!(",{g:.6}"));
            }
            s.push('\n');
        }
        s
    }

    /// CSV of the hop-time histogram.
    pub fn histogram_csv(&self) -> String {
        let h = &self.hops.histogram;
        let mut s = String::from("bin_start_fs,bin_end_fs,accepted_hops\n");
        for (b, c) in h.counts.iter().enumerate() {
            s.push_str(&format!(
                "{:.6},{:.6},{c}\n",
                h.edges_fs[b],
                h.edges_fs[b + 1]
            ));
        }
        s
    }

    /// CSV of the energy drift of every trajectory.
    pub fn drift_csv(&self) -> String {
        let mut s = String::from("trajectory,max_abs_total_energy_change_ev\n");
        for (i, d) in &self.energy.per_trajectory {
            s.push_str(&format!("{i},{d:.6e}\n"));
        }
        s
    }

    /// Populations chart: fractions with Wilson bands, mean |c|² dashed, fits.
    pub fn populations_chart(&self) -> Chart {
        let p = &self.populations;
        let mut c = Chart {
            title: "Populations".into(),
            x_label: "time (fs)".into(),
            y_label: "population".into(),
            y_range: Some((-0.02, 1.02)),
            ..Chart::default()
        };
        for (j, &st) in p.states.iter().enumerate() {
            c.bands.push(Band {
                x: p.times_fs.clone(),
                lower: p.lower.iter().map(|r| r[j]).collect(),
                upper: p.upper.iter().map(|r| r[j]).collect(),
                colour: st,
            });
            c.lines.push(Line {
                label: format!("state {st}: fraction (95% band)"),
                points: p
                    .times_fs
                    .iter()
                    .zip(&p.fraction)
                    .map(|(t, r)| (*t, r[j]))
                    .collect(),
                colour: st,
                dashed: false,
                width: 2,
            });
            c.lines.push(Line {
                label: format!("state {st}: mean |c|²"),
                points: p
                    .times_fs
                    .iter()
                    .zip(&p.mean_population)
                    .map(|(t, r)| (*t, r[j]))
                    .collect(),
                colour: st,
                dashed: true,
                width: 1,
            });
        }
        for (i, f) in self.fits.iter().enumerate() {
            // Black for the first fit, then colours unlikely to be states' (few models have 5+ states).
            let colour = [7, 5, 4, 6][i % 4];
            let taus: Vec<String> = f
                .parameters
                .iter()
                .map(|e| {
                    format!(
                        "{} = {:.1} fs",
                        e.name.trim_end_matches("_fs").replace("tau", "τ"),
                        e.value
                    )
                })
                .collect();
            for j in 0..f.model.states().len() {
                let label = if j == 0 {
                    format!("fit, {}: {}", f.description, taus.join(", "))
                } else {
                    String::new()
                };
                c.lines.push(Line {
                    label,
                    points: p
                        .times_fs
                        .iter()
                        .copied()
                        .zip(f.curves[j].iter().copied())
                        .collect(),
                    colour,
                    dashed: true,
                    width: 2,
                });
            }
        }
        c
    }

    /// Hop-time histogram chart.
    pub fn histogram_chart(&self) -> Chart {
        let h = &self.hops.histogram;
        Chart {
            title: "Accepted hops".into(),
            x_label: "time (fs)".into(),
            y_label: "hops per bin".into(),
            bars: h
                .counts
                .iter()
                .enumerate()
                .map(|(b, &n)| (h.edges_fs[b], h.edges_fs[b + 1], n as f64))
                .collect(),
            bars_label: format!(
                "accepted hops ({:.2} fs bins)",
                h.edges_fs.get(1).map_or(0.0, |e| e - h.edges_fs[0])
            ),
            y_range: Some((
                0.0,
                h.counts.iter().copied().max().unwrap_or(0).max(1) as f64 * 1.15,
            )),
            y_integer: true,
            ..Chart::default()
        }
    }
}

/// Energies against time of one trajectory (read with its energies kept).
pub fn energy_chart(t: &Traj, n_states: usize) -> Chart {
    let per = n_states + 2;
    let rows = t.steps.len();
    let time: Vec<f64> = t.times.iter().map(|x| units::au_to_fs(*x)).collect();
    let mut c = Chart {
        title: format!("Trajectory {}", t.index),
        x_label: "time (fs)".into(),
        y_label: "energy (eV)".into(),
        ..Chart::default()
    };
    if t.energies.len() != rows * per {
        return c;
    }
    for s in 0..n_states {
        c.lines.push(Line {
            label: format!("state {s}"),
            points: (0..rows)
                .map(|r| (time[r], units::hartree_to_ev(t.energies[r * per + s])))
                .collect(),
            colour: s,
            dashed: false,
            width: 1,
        });
    }
    c.lines.push(Line {
        label: "active state (potential)".into(),
        points: (0..rows)
            .map(|r| {
                (
                    time[r],
                    units::hartree_to_ev(t.energies[r * per + n_states + 1]),
                )
            })
            .collect(),
        colour: 7,
        dashed: true,
        width: 2,
    });
    c.lines.push(Line {
        label: "total".into(),
        points: (0..rows)
            .map(|r| (time[r], units::hartree_to_ev(t.total[r])))
            .collect(),
        colour: 7,
        dashed: false,
        width: 2,
    });
    c.lines.push(Line {
        label: "kinetic".into(),
        points: (0..rows)
            .map(|r| {
                (
                    time[r],
                    units::hartree_to_ev(t.energies[r * per + n_states]),
                )
            })
            .collect(),
        colour: 5,
        dashed: true,
        width: 1,
    });
    c
}

/// The output files of an analysis in `dir` (the energy plot only with a trajectory).
pub fn output_files(dir: &Path, trajectory: Option<usize>) -> Vec<PathBuf> {
    let mut names: Vec<String> = [
        "summary.json",
        "summary.txt",
        "populations.csv",
        "fits.csv",
        "hops.csv",
        "hop_pairs.csv",
        "hop_times.csv",
        "energy_drift.csv",
        "populations.svg",
        "populations.png",
        "hop_times.svg",
        "hop_times.png",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    if let Some(i) = trajectory {
        names.push(format!("energy_trajectory_{i}.svg"));
        names.push(format!("energy_trajectory_{i}.png"));
    }
    names.into_iter().map(|n| dir.join(n)).collect()
}

/// Write every output into `dir`, refusing existing files unless `force`.
pub fn write_all(
    a: &Analysis,
    energy_of: Option<&Traj>,
    dir: &Path,
    size: (u32, u32),
    force: bool,
) -> Result<Vec<PathBuf>, AnalysisError> {
    if dir.exists() && !dir.is_dir() {
        return input(format!(
            "--out {}: exists and is not a directory",
            dir.display()
        ));
    }
    let files = output_files(dir, energy_of.map(|t| t.index));
    if !force {
        if let Some(f) = files.iter().find(|f| f.exists()) {
            return input(format!("{}: exists; refusing to overwrite it (use --force, or choose another --out directory)", f.display()));
        }
    }
    std::fs::create_dir_all(dir).map_err(|e| {
        AnalysisError::Output(format!(
            "{}: cannot create the directory: {e}",
            dir.display()
        ))
    })?;
    let w = |name: &str, text: String| -> Result<(), AnalysisError> {
        let p = dir.join(name);
        std::fs::write(&p, text)
            .map_err(|e| AnalysisError::Output(format!("{}: cannot write: {e}", p.display())))
    };
    let json = serde_json::to_string_pretty(a)
        .map_err(|e| AnalysisError::Output(format!("summary.json: {e}")))?;
    w("summary.json", json + "\n")?;
    w("summary.txt", a.to_text())?;
    w("populations.csv", a.populations.to_csv())?;
    w("fits.csv", a.fits_csv())?;
    w("hops.csv", hops::records_csv(&a.hops))?;
    w("hop_pairs.csv", a.pairs_csv())?;
    w("hop_times.csv", a.histogram_csv())?;
    w("energy_drift.csv", a.drift_csv())?;
    plot::write(&a.populations_chart(), &dir.join("populations"), size)?;
    plot::write(&a.histogram_chart(), &dir.join("hop_times"), size)?;
    if let Some(t) = energy_of {
        plot::write(
            &energy_chart(t, a.n_states),
            &dir.join(format!("energy_trajectory_{}", t.index)),
            size,
        )?;
    }
    Ok(files)
}
