//! Reading part files into compact per-trajectory series.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::{input, AnalysisError};
use crate::dynamics::{Hop, Status};
use crate::ensemble::h5::PartReader;

/// One trajectory, as much of it as the analysis needs (atomic units).
#[derive(Clone, Debug, PartialEq)]
pub struct Traj {
    /// Index in the ensemble.
    pub index: usize,
    /// Final status.
    pub status: Status,
    /// Step numbers of the recorded rows (ascending).
    pub steps: Vec<u64>,
    /// Times of the rows (a.u.).
    pub times: Vec<f64>,
    /// Active state of each row.
    pub active: Vec<u32>,
    /// |c|² of each row, `n_states` per row.
    pub pops: Vec<f64>,
    /// Total energy of each row (hartree).
    pub total: Vec<f64>,
    /// Coordinates of each row, `n_dof` per row (empty unless asked for).
    pub q: Vec<f64>,
    /// Adiabatic energies, kinetic and potential energy of each row
    /// (`n_states + 2` per row; empty unless asked for).
    pub energies: Vec<f64>,
    /// Hop attempts.
    pub hops: Vec<Hop>,
}

impl Traj {
    /// Largest |E_tot(t) − E_tot(0)| over the rows (hartree).
    pub fn max_energy_drift(&self) -> f64 {
        let e0 = self.total.first().copied().unwrap_or(0.0);
        self.total
            .iter()
            .map(|e| (e - e0).abs())
            .fold(0.0, f64::max)
    }

    /// Whether the trajectory failed.
    pub fn failed(&self) -> bool {
        matches!(self.status, Status::Failed { .. })
    }
}

/// An ensemble read from one or more part files.
#[derive(Clone, Debug, PartialEq)]
pub struct Ensemble {
    /// The files read.
    pub files: Vec<PathBuf>,
    /// Electronic states.
    pub n_states: usize,
    /// Nuclear coordinates.
    pub n_dof: usize,
    /// Time step (a.u.).
    pub timestep_au: f64,
    /// Rows are written every this many steps.
    pub record_every: u64,
    /// Trajectories in the files but never started (no data).
    pub pending: usize,
    /// The trajectories, by ascending index.
    pub trajs: Vec<Traj>,
}

/// What to read besides populations, energies and hops.
#[derive(Clone, Debug, Default)]
pub struct LoadOptions {
    /// Keep coordinates (for geometric parameters at hops).
    pub keep_q: bool,
    /// Keep the adiabatic energies of this trajectory (for the energy plot).
    pub energies_of: Option<usize>,
    /// Read only these trajectories (ensemble indices); all when `None`.
    pub only: Option<Vec<usize>>,
}

/// Part files of the given paths (files, or run directories holding `*.h5`).
pub fn part_files(paths: &[PathBuf]) -> Result<Vec<PathBuf>, AnalysisError> {
    let mut files = Vec::new();
    for p in paths {
        if !p.exists() {
            return input(format!("{}: no such file or directory", p.display()));
        }
        match crate::cli::inspect::part_files(p) {
            Ok(f) => files.extend(f),
            Err(e) => return input(e),
        }
    }
    Ok(files)
}

/// Read the ensemble held by `paths`.
pub fn load(paths: &[PathBuf], opts: &LoadOptions) -> Result<Ensemble, AnalysisError> {
    let files = part_files(paths)?;
    let mut first: Option<(PathBuf, usize, usize, f64)> = None;
    let mut trajs: BTreeMap<usize, (Traj, PathBuf)> = BTreeMap::new();
    let mut pending = 0;
    for file in &files {
        tracing::info!("reading {}", file.display());
        let reader = PartReader::open(file).map_err(|e| AnalysisError::Input(e.to_string()))?;
        if reader.writer_state() == crate::ensemble::h5::WriterState::Open {
            tracing::warn!("{}: its writer never closed it (still running, or killed): unfinished trajectories count only while they have rows", file.display());
        }
        let meta = reader.meta().clone();
        if meta.n_states == 0 {
            return input(format!(
                "{}: the file declares 0 electronic states",
                file.display()
            ));
        }
        match &first {
            None => first = Some((file.clone(), meta.n_states, meta.n_dof, meta.timestep_au)),
            Some((f0, ns, nd, dt)) => {
                let what = if *ns != meta.n_states {
                    Some(format!(
                        "{} electronic states, but {} has {}",
                        meta.n_states,
                        f0.display(),
                        ns
                    ))
                } else if *nd != meta.n_dof {
                    Some(format!(
                        "{} nuclear coordinates, but {} has {}",
                        meta.n_dof,
                        f0.display(),
                        nd
                    ))
                } else if dt.to_bits() != meta.timestep_au.to_bits() {
                    Some(format!(
                        "time step {} a.u., but {} has {} a.u.",
                        meta.timestep_au,
                        f0.display(),
                        dt
                    ))
                } else {
                    None
                };
                if let Some(w) = what {
                    return input(format!(
                        "{}: has {w}: these are not parts of one ensemble",
                        file.display()
                    ));
                }
            }
        }
        let present = reader.trajectory_indices();
        pending += meta
            .trajectories
            .iter()
            .filter(|i| !present.contains(i))
            .count();
        for i in present {
            if let Some(only) = &opts.only {
                if !only.contains(&i) {
                    continue;
                }
            }
            if let Some((_, other)) = trajs.get(&i) {
                return input(format!(
                    "trajectory {i} is in both {} and {}",
                    other.display(),
                    file.display()
                ));
            }
            let d = reader
                .read(i)
                .map_err(|e| AnalysisError::Input(e.to_string()))?;
            let keep_e = opts.energies_of == Some(i);
            let mut t = Traj {
                index: i,
                status: d.status.clone(),
                steps: Vec::with_capacity(d.rows.len()),
                times: Vec::with_capacity(d.rows.len()),
                active: Vec::with_capacity(d.rows.len()),
                pops: Vec::with_capacity(d.rows.len() * meta.n_states),
                total: Vec::with_capacity(d.rows.len()),
                q: Vec::new(),
                energies: Vec::new(),
                hops: d.hops.clone(),
            };
            for r in &d.rows {
                if r.active as usize >= meta.n_states || r.amplitudes.len() != meta.n_states {
                    return input(format!(
                        "{}: trajectory {i}, step {}: active state {} and {} amplitudes do not fit the file's {} states",
                        file.display(),
                        r.step,
                        r.active,
                        r.amplitudes.len(),
                        meta.n_states
                    ));
                }
                if t.steps.last().is_some_and(|&p| p > r.step) {
                    return input(format!(
                        "{}: trajectory {i}: row steps go backwards at step {}",
                        file.display(),
                        r.step
                    ));
                }
                t.steps.push(r.step);
                t.times.push(r.time);
                t.active.push(r.active);
                t.pops.extend(r.amplitudes.iter().map(|c| c.norm_sqr()));
                t.total.push(r.total);
                if opts.keep_q {
                    t.q.extend_from_slice(&r.q);
                }
                if keep_e {
                    t.energies.extend_from_slice(&r.energies);
                    t.energies.push(r.kinetic);
                    t.energies.push(r.potential);
                }
            }
            trajs.insert(i, (t, file.clone()));
        }
    }
    let Some((_, n_states, n_dof, timestep_au)) = first else {
        return input("no part files given");
    };
    let trajs: Vec<Traj> = trajs.into_values().map(|(t, _)| t).collect();
    if trajs.is_empty() {
        let names: Vec<String> = files.iter().map(|f| f.display().to_string()).collect();
        return input(format!(
            "{}: the ensemble is empty: no trajectory has any data{}",
            names.join(", "),
            if opts.only.is_some() {
                " among those chosen with --trajectories"
            } else {
                ""
            }
        ));
    }
    let record_every = infer_record_every(&trajs);
    tracing::info!(
        "{} trajectories, {} states, rows every {} steps",
        trajs.len(),
        n_states,
        record_every
    );
    Ok(Ensemble {
        files,
        n_states,
        n_dof,
        timestep_au,
        record_every,
        pending,
        trajs,
    })
}

/// The row cadence: the greatest common divisor of the recorded steps (the
/// last row of a trajectory is always written, whatever its step, so it is
/// left out when there are others).
pub fn infer_record_every(trajs: &[Traj]) -> u64 {
    fn gcd(a: u64, b: u64) -> u64 {
        if b == 0 {
            a
        } else {
            gcd(b, a % b)
        }
    }
    let mut g = 0;
    for t in trajs {
        let n = t.steps.len();
        let body = if n > 1 {
            &t.steps[..n - 1]
        } else {
            &t.steps[..]
        };
        for &s in body {
            g = gcd(g, s);
        }
        if g == 1 {
            return 1;
        }
    }
    if g == 0 {
        1
    } else {
        g
    }
}

/// Display helper for file lists.
pub fn file_list(files: &[PathBuf]) -> String {
    files
        .iter()
        .map(|f: &PathBuf| Path::new(f).display().to_string())
        .collect::<Vec<_>>()
        .join(", ")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn t(steps: Vec<u64>) -> Traj {
        Traj {
            index: 0,
            status: Status::Running,
            steps,
            times: vec![],
            active: vec![],
            pops: vec![],
            total: vec![],
            q: vec![],
            energies: vec![],
            hops: vec![],
        }
    }

    /// The cadence is the gcd of the recorded steps, leaving out each last row
    /// (always written): rows 0, 6, 12, 15 → 6. From the writer's rule.
    #[test]
    fn record_every_ignores_last_rows() {
        assert_eq!(
            infer_record_every(&[t(vec![0, 6, 12, 15]), t(vec![0, 6, 7])]),
            6
        );
        assert_eq!(infer_record_every(&[t(vec![0, 4, 6, 8])]), 2);
        assert_eq!(infer_record_every(&[t(vec![0])]), 1);
    }
}
