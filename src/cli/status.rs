//! `flipswarm status`: progress of a run directory, slice by slice, with
//! the state of its Slurm jobs when `squeue` can see them.

use std::path::PathBuf;

use clap::Args;

use super::exit;
use crate::ensemble::runner;

/// Arguments of `flipswarm status`.
#[derive(Debug, Args)]
pub struct StatusArgs {
    /// Run directory (as given to `submit --out` or `run --out`).
    pub dir: PathBuf,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// Slice count of the part files in `dir` (from their names).
fn slices(dir: &std::path::Path) -> Option<usize> {
    for e in std::fs::read_dir(dir).ok()?.flatten() {
        let name = e.file_name().to_string_lossy().to_string();
        if let Some(n) = name
            .strip_prefix("part-")
            .and_then(|r| r.strip_suffix(".h5"))
            .and_then(|r| r.split_once("-of-"))
            .and_then(|(_, n)| n.parse().ok())
        {
            return Some(n);
        }
    }
    None
}

/// State of each array task of job `id` from `squeue` (task → state).
fn squeue(id: &str) -> Option<Vec<(String, String)>> {
    let out = std::process::Command::new("squeue")
        .args(["-h", "-r", "-j", id, "-o", "%i %T %r"])
        .output()
        .ok()?;
    if !out.status.success() {
        return None;
    }
    Some(
        String::from_utf8_lossy(&out.stdout)
            .lines()
            .filter_map(|l| {
                let mut it = l.split_whitespace();
                Some((
                    it.next()?.to_string(),
                    format!("{} {}", it.next()?, it.next().unwrap_or(""))
                        .trim()
                        .to_string(),
                ))
            })
            .collect(),
    )
}

/// Execute; returns the exit code.
pub fn execute(args: &StatusArgs) -> i32 {
    if !args.dir.join("run.toml").exists() {
        eprintln!(
            "error: {}: not a run directory (no run.toml)",
            args.dir.display()
        );
        return exit::INPUT;
    }
    let jobs_text = std::fs::read_to_string(args.dir.join("slurm/jobs.jsonl")).unwrap_or_default();
    let last_job: Option<serde_json::Value> = jobs_text
        .lines()
        .rev()
        .find_map(|l| serde_json::from_str(l).ok());
    let n = last_job
        .as_ref()
        .and_then(|j| j["tasks"].as_u64())
        .map(|t| t as usize)
        .or_else(|| slices(&args.dir))
        .unwrap_or(1);
    let array = last_job
        .as_ref()
        .and_then(|j| j["array"].as_str().map(str::to_string));
    let queue = array.as_deref().and_then(squeue).unwrap_or_default();
    let mut rows = Vec::new();
    let (mut ended_all, mut total_all) = (0, 0);
    for k in 0..n {
        let progress = match runner::slice_progress(&args.dir, k, n) {
            Ok(p) => p,
            Err(e) => {
                eprintln!("error: {e}");
                return exit::RUNTIME;
            }
        };
        let slice_total = crate::ensemble::runner::load_run_config(&args.dir)
            .map(|c| runner::slice_indices(c.trajectories, k, n).len())
            .unwrap_or(0);
        let (ended, total) = progress.unwrap_or((0, slice_total));
        ended_all += ended;
        total_all += total;
        let task = array.as_ref().map(|a| format!("{a}_{k}"));
        let state = task
            .as_ref()
            .and_then(|t| queue.iter().find(|(id, _)| id == t).map(|(_, s)| s.clone()))
            .unwrap_or_else(|| {
                if progress.is_none() {
                    "not started".into()
                } else if ended == total {
                    "done".into()
                } else {
                    "not queued (resume or resubmit)".into()
                }
            });
        rows.push((k, ended, total, task, state));
    }
    if args.json {
        let v: Vec<serde_json::Value> = rows
            .iter()
            .map(|(k, e, t, task, s)| serde_json::json!({"slice": k, "ended": e, "trajectories": t, "job": task, "state": s}))
            .collect();
        println!(
            "{}",
            serde_json::json!({"dir": args.dir, "slices": v, "ended": ended_all, "trajectories": total_all, "array_job": array})
        );
        return exit::OK;
    }
    println!(
        "{}: {ended_all} of {total_all} trajectories ended{}",
        args.dir.display(),
        array
            .as_ref()
            .map_or(String::new(), |a| format!(" (array job {a})"))
    );
    println!("  {:>5}  {:>12}  {:<14} state", "slice", "ended", "job");
    for (k, e, t, task, s) in rows {
        println!(
            "  {k:>5}  {:>12}  {:<14} {s}",
            format!("{e}/{t}"),
            task.unwrap_or_else(|| "-".into())
        );
    }
    if args.dir.join("merged.h5").exists() {
        println!("merged: {}", args.dir.join("merged.h5").display());
    }
    exit::OK
}
