//! `flipswarm inspect`.

use std::path::{Path, PathBuf};

use clap::Args;

use super::exit;
use crate::ensemble::h5::{PartReader, Phase, WriterState};
use crate::units;

/// Arguments of `flipswarm inspect`.
#[derive(Debug, Args)]
pub struct InspectArgs {
    /// Run directories or part files.
    #[arg(required = true)]
    pub paths: Vec<PathBuf>,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// Part files of a run directory, or the file itself.
pub fn part_files(path: &Path) -> Result<Vec<PathBuf>, String> {
    if path.is_file() {
        return Ok(vec![path.to_path_buf()]);
    }
    let entries = std::fs::read_dir(path).map_err(|e| format!("{}: {e}", path.display()))?;
    let mut parts: Vec<PathBuf> = entries
        .flatten()
        .map(|e| e.path())
        // Part files only: a run directory also holds a copy of its
        // initial-conditions file.
        .filter(|p| {
            p.extension().is_some_and(|x| x == "h5")
                && p.file_name()
                    .is_some_and(|n| n.to_string_lossy().starts_with("part-"))
        })
        .collect();
    parts.sort();
    if parts.is_empty() {
        return Err(format!(
            "{}: no part files (part-*.h5) here",
            path.display()
        ));
    }
    Ok(parts)
}

/// Execute; returns the exit code.
pub fn execute(args: &InspectArgs) -> i32 {
    let mut files = Vec::new();
    for p in &args.paths {
        match part_files(p) {
            Ok(f) => files.extend(f),
            Err(e) => {
                eprintln!("error: {e}");
                return exit::INPUT;
            }
        }
    }
    let mut json_parts = Vec::new();
    let mut totals = [0usize; 5];
    let mut unreadable = 0;
    for file in &files {
        // Probed in a child first: a damaged file gets a message, not a crash.
        if let Err(e) = crate::ensemble::h5::probe_in_child(file, false) {
            eprintln!("error: {e}");
            unreadable += 1;
            continue;
        }
        let reader = match PartReader::open(file) {
            Ok(r) => r,
            Err(e) => {
                eprintln!("error: {e}");
                unreadable += 1;
                continue;
            }
        };
        let half_written = reader.writer_state() == WriterState::Open;
        let meta = reader.meta();
        if !args.json {
            println!(
                "{} (slice {}/{}, {} trajectories, {} states)",
                file.display(),
                meta.slice.0,
                meta.slice.1,
                meta.trajectories.len(),
                meta.n_states
            );
            if half_written {
                println!("  warning: the writer never closed this file (still running, or killed): resume the run before merging it");
            }
            println!(
                "  {:>7}  {:<9} {:>8} {:>12} {:>6} {:>12}  reason",
                "traj", "status", "rows", "time (fs)", "state", "drift (eV)"
            );
        }
        let present = reader.trajectory_indices();
        let mut rows = Vec::new();
        for &i in &meta.trajectories {
            if !present.contains(&i) {
                totals[0] += 1;
                rows.push(serde_json::json!({"index": i, "status": "pending"}));
                if !args.json {
                    println!("  {i:>7}  {:<9}", "pending");
                }
                continue;
            }
            let s = match reader.summary(i) {
                Ok(s) => s,
                Err(e) => {
                    eprintln!("error: {e}");
                    unreadable += 1;
                    continue;
                }
            };
            totals[match s.phase {
                Phase::Pending => 0,
                Phase::Running => 1,
                Phase::Stopped => 2,
                Phase::Finished => 3,
                Phase::Failed => 4,
            }] += 1;
            let time_fs = s.last_time.map(units::au_to_fs);
            let drift_ev = units::hartree_to_ev(s.max_energy_drift);
            let mut reason = s.failure_reason.clone().unwrap_or_default();
            if s.warnings > 0 {
                // Back-end warnings (the table `warnings` of the trajectory group).
                let sep = if reason.is_empty() { "" } else { "; " };
                reason = format!("{reason}{sep}{} back-end warning(s)", s.warnings);
            }
            if !args.json {
                let t = time_fs.map_or("-".into(), |t| format!("{t:.3}"));
                let a = s.active_state.map_or("-".into(), |a| a.to_string());
                println!(
                    "  {i:>7}  {:<9} {:>8} {t:>12} {a:>6} {drift_ev:>12.3e}  {reason}",
                    s.phase.as_str(),
                    s.steps
                );
            }
            rows.push(serde_json::json!({
                "index": i, "status": s.phase.as_str(), "rows": s.steps, "hops": s.hops,
                "time_fs": time_fs, "active_state": s.active_state, "max_energy_drift_ev": drift_ev,
                "failure_reason": s.failure_reason,
                "backend_warnings": s.warnings, "max_solver_iterations": s.max_solver_iterations,
            }));
        }
        json_parts.push(serde_json::json!({
            "file": file, "writer_state": reader.writer_state().as_str(), "slice": [meta.slice.0, meta.slice.1], "trajectories": rows,
        }));
    }
    let names = ["pending", "running", "stopped", "finished", "failed"];
    if args.json {
        let t: serde_json::Map<String, serde_json::Value> = names
            .iter()
            .zip(totals)
            .map(|(n, c)| (n.to_string(), c.into()))
            .collect();
        println!(
            "{}",
            serde_json::json!({"parts": json_parts, "totals": t, "unreadable": unreadable})
        );
    } else {
        let t: Vec<String> = names
            .iter()
            .zip(totals)
            .map(|(n, c)| format!("{c} {n}"))
            .collect();
        println!("total: {}", t.join(", "));
    }
    if unreadable > 0 {
        exit::RUNTIME
    } else {
        exit::OK
    }
}
