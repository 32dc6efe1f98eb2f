//! `flipswarm submit`: run an ensemble on a Slurm cluster as a job array.
//!
//! Every array task K of N continues (or starts) slice K/N of one run
//! directory with `flipswarm resume DIR --slice K/N`, so a task that is
//! requeued — after its pre-timeout signal, a node failure or preemption —
//! carries on from its checkpoints, and a finished slice costs nothing.
//! The batch script asks Slurm for SIGUSR1 a lead time before the limit
//! (`--signal=B:USR1@LEAD`), forwards it to the program (a `B:` signal
//! reaches only the batch shell), and when the program exits with code 3
//! (stopped, resumable) requeues its own task with `scontrol requeue`.
//! Output files are opened in append mode, so a requeue does not truncate
//! the log. A merge job depending on the whole array (`afterany`: it also runs when trajectories failed, and refuses half-written parts with a message) gathers the
//! part files into `DIR/merged.h5`.

use std::path::{Path, PathBuf};

use clap::Args;

use super::exit;
use crate::ensemble::runner;

/// Arguments of `flipswarm submit`.
#[derive(Debug, Args)]
pub struct SubmitArgs {
    /// Ensemble file (TOML).
    pub ensemble: PathBuf,
    /// Run directory shared by all tasks (on a file system every node sees).
    #[arg(short, long)]
    pub out: PathBuf,
    /// Number of array tasks (slices of the ensemble).
    #[arg(long)]
    pub tasks: usize,
    /// At most this many tasks run at once (array throttle, `%M`).
    #[arg(long, default_value_t = 20)]
    pub throttle: usize,
    /// Time limit per task, in Slurm's format (minutes, or [D-]HH:MM:SS).
    #[arg(long, default_value = "01:00:00")]
    pub time: String,
    /// Seconds before the time limit at which the task is told to
    /// checkpoint and stop (at least 60 s plus the time of one step and a
    /// checkpoint: Slurm delivers the signal up to about 30 s late).
    #[arg(long, default_value_t = 300)]
    pub signal_lead_s: u64,
    /// CPUs per task (the trajectories of a slice run on them in parallel).
    #[arg(long, default_value_t = 1)]
    pub cpus_per_task: usize,
    /// Memory per CPU in Slurm's format (e.g. 2G).
    #[arg(long)]
    pub mem_per_cpu: Option<String>,
    /// Slurm partition.
    #[arg(long)]
    pub partition: Option<String>,
    /// Slurm account.
    #[arg(long)]
    pub account: Option<String>,
    /// Extra `#SBATCH` options, verbatim (repeatable), e.g. --sbatch=--qos=short.
    #[arg(long = "sbatch", value_name = "OPTION")]
    pub sbatch_options: Vec<String>,
    /// Write the scripts but submit nothing.
    #[arg(long)]
    pub dry_run: bool,
    /// Do not submit the dependent merge job.
    #[arg(long)]
    pub no_merge: bool,
    /// Override a configuration key (repeatable), as for `run`.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub overrides: Vec<String>,
}

/// The scripts `submit` writes.
#[derive(Clone, Debug, PartialEq)]
pub struct Scripts {
    /// The job-array script.
    pub array: String,
    /// The merge script.
    pub merge: String,
}

fn shell_quote(s: &str) -> String {
    format!("'{}'", s.replace('\'', "'\\''"))
}

/// Seconds of a Slurm time specification (minutes; MM:SS; HH:MM:SS;
/// D-HH; D-HH:MM; D-HH:MM:SS).
pub fn slurm_seconds(spec: &str) -> Result<u64, String> {
    let bad = || format!("--time {spec:?}: not a Slurm time (minutes, HH:MM:SS or D-HH:MM:SS)");
    let (days, rest) = match spec.split_once('-') {
        Some((d, r)) => (d.parse::<u64>().map_err(|_| bad())?, r),
        None => (0, spec),
    };
    let parts: Result<Vec<u64>, _> = rest.split(':').map(|p| p.parse::<u64>()).collect();
    let parts = parts.map_err(|_| bad())?;
    let secs = match (spec.contains('-'), parts.as_slice()) {
        (false, [m]) => m * 60,
        (false, [m, s]) => m * 60 + s,
        (_, [h, m, s]) => h * 3600 + m * 60 + s,
        (true, [h]) => h * 3600,
        (true, [h, m]) => h * 3600 + m * 60,
        _ => return Err(bad()),
    };
    Ok(days * 86400 + secs)
}

/// The batch scripts for `args` (absolute paths inside).
pub fn scripts(args: &SubmitArgs, dir: &Path, program: &Path, name: &str) -> Scripts {
    let n = args.tasks;
    let slurm = dir.join("slurm");
    let mut head = vec![
        "#!/bin/bash".to_string(),
        format!("#SBATCH --job-name={name}"),
        format!("#SBATCH --array=0-{}%{}", n - 1, args.throttle.max(1)),
        format!("#SBATCH --time={}", args.time),
        format!("#SBATCH --signal=B:USR1@{}", args.signal_lead_s),
        "#SBATCH --requeue".to_string(),
        "#SBATCH --open-mode=append".to_string(),
        format!("#SBATCH --output={}/task-%a.log", slurm.display()),
        "#SBATCH --ntasks=1".to_string(),
        format!("#SBATCH --cpus-per-task={}", args.cpus_per_task),
    ];
    if let Some(m) = &args.mem_per_cpu {
        head.push(format!("#SBATCH --mem-per-cpu={m}"));
    }
    if let Some(p) = &args.partition {
        head.push(format!("#SBATCH --partition={p}"));
    }
    if let Some(a) = &args.account {
        head.push(format!("#SBATCH --account={a}"));
    }
    for o in &args.sbatch_options {
        head.push(format!("#SBATCH {o}"));
    }
    let body = format!(
        r#"
# Written by `flipswarm submit`: task K continues (or starts) slice K/{n} of
# the run directory; a requeued task resumes from its checkpoints.
set -u
program={program}
dir={dir}
slice="${{SLURM_ARRAY_TASK_ID}}/{n}"
task="${{SLURM_ARRAY_JOB_ID}}_${{SLURM_ARRAY_TASK_ID}}"
echo "flipswarm: task $task (slice $slice) on $(hostname) at $(date -u +%Y-%m-%dT%H:%M:%SZ), restart ${{SLURM_RESTART_COUNT:-0}}"
# Slurm signals only this shell (B:USR1): pass the request on. The program
# finishes its current steps, checkpoints and exits with code 3. The trap is
# set before the program starts, so an early signal is not lost either.
child=
stop=0
forward() {{ stop=1; [ -n "$child" ] && kill -USR1 "$child" 2>/dev/null; }}
trap forward USR1 TERM
"$program" resume "$dir" --slice "$slice" --threads "${{SLURM_CPUS_PER_TASK:-1}}" &
child=$!
[ "$stop" -eq 1 ] && kill -USR1 "$child" 2>/dev/null
code=0
while true; do
    wait "$child"
    code=$?
    # A trapped signal makes `wait` return early (128 + USR1 or TERM) while
    # the program still runs: wait again.
    kill -0 "$child" 2>/dev/null && continue
    if [ "$code" -eq 138 ] || [ "$code" -eq 143 ]; then
        # The program ended just as the signal came: collect its own code.
        # bash can lose it in this race; then requeue and let `resume` decide
        # (a finished slice ends at once, a stopped one continues).
        wait "$child" 2>/dev/null
        again=$?
        if [ "$again" -ge 0 ] && [ "$again" -lt 127 ]; then
            code=$again
        else
            echo "flipswarm: task $task: exit code lost in a signal race; treating it as stopped"
            code=3
        fi
    fi
    break
done
if [ "$code" -eq 3 ]; then
    echo "flipswarm: task $task stopped before its time limit; requeueing it"
    scontrol requeue "$task"
    sleep 60
fi
echo "flipswarm: task $task ended with code $code at $(date -u +%Y-%m-%dT%H:%M:%SZ)"
exit "$code"
"#,
        program = shell_quote(&program.display().to_string()),
        dir = shell_quote(&dir.display().to_string()),
    );
    let array = format!("{}\n{body}", head.join("\n"));
    let mut mhead = vec![
        "#!/bin/bash".to_string(),
        format!("#SBATCH --job-name={name}-merge"),
        "#SBATCH --time=00:30:00".to_string(),
        "#SBATCH --ntasks=1".to_string(),
        "#SBATCH --cpus-per-task=1".to_string(),
        "#SBATCH --open-mode=append".to_string(),
        format!("#SBATCH --output={}/merge.log", slurm.display()),
    ];
    if let Some(p) = &args.partition {
        mhead.push(format!("#SBATCH --partition={p}"));
    }
    if let Some(a) = &args.account {
        mhead.push(format!("#SBATCH --account={a}"));
    }
    let merge = format!(
        "{}\n\n# Written by `flipswarm submit`: gathers the part files once every task has ended\n# (and refuses, saying what is missing, if a slice did not finish).\nset -eu\n{} merge --require-complete {} -o {}\n",
        mhead.join("\n"),
        shell_quote(&program.display().to_string()),
        shell_quote(&dir.display().to_string()),
        shell_quote(&dir.join("merged.h5").display().to_string()),
    );
    Scripts { array, merge }
}

fn on_path(program: &str) -> bool {
    std::env::var_os("PATH")
        .is_some_and(|p| std::env::split_paths(&p).any(|d| d.join(program).is_file()))
}

fn sbatch(script: &Path, dependency: Option<&str>) -> Result<String, String> {
    let mut cmd = std::process::Command::new("sbatch");
    cmd.arg("--parsable");
    if let Some(d) = dependency {
        cmd.arg(format!("--dependency=afterany:{d}"));
    }
    let out = cmd
        .arg(script)
        .output()
        .map_err(|e| format!("cannot run sbatch: {e}"))?;
    if !out.status.success() {
        return Err(format!(
            "sbatch {} failed: {}",
            script.display(),
            String::from_utf8_lossy(&out.stderr).trim()
        ));
    }
    let id = String::from_utf8_lossy(&out.stdout)
        .trim()
        .split(';')
        .next()
        .unwrap_or("")
        .to_string();
    if id.is_empty() {
        return Err(format!("sbatch {} printed no job id", script.display()));
    }
    Ok(id)
}

/// Execute; returns the exit code.
pub fn execute(args: &SubmitArgs) -> i32 {
    let fail = |m: String| {
        eprintln!("error: {m}");
        exit::INPUT
    };
    if args.tasks == 0 {
        return fail("--tasks must be at least 1".into());
    }
    let limit = match slurm_seconds(&args.time) {
        Ok(s) => s,
        Err(e) => return fail(e),
    };
    if args.signal_lead_s < 60 || args.signal_lead_s >= limit {
        return fail(format!(
            "--signal-lead-s {}: must be at least 60 (Slurm delivers the signal up to ~30 s late) and below the time limit ({limit} s)",
            args.signal_lead_s
        ));
    }
    if !args.dry_run && !on_path("sbatch") {
        return fail("sbatch is not on PATH: is this a Slurm login node? (--dry-run writes the scripts without submitting)".into());
    }
    let cfg = match crate::config::load_file(&args.ensemble, &args.overrides) {
        Ok(c) => c,
        Err(e) => return fail(e.to_string()),
    };
    if args.tasks > cfg.trajectories {
        return fail(format!(
            "--tasks {}: the ensemble has only {} trajectories",
            args.tasks, cfg.trajectories
        ));
    }
    // Parts of another slicing, or a complete run, are refused before anything is written.
    if args.out.exists() {
        if let Ok(entries) = std::fs::read_dir(&args.out) {
            for e in entries.flatten() {
                let name = e.file_name().to_string_lossy().to_string();
                if name.starts_with("part-")
                    && name.ends_with(".h5")
                    && !name.ends_with(&format!("-of-{:04}.h5", args.tasks))
                {
                    return fail(format!(
                        "{}: holds part files of another number of slices ({name}); submit with the same --tasks or choose another directory",
                        args.out.display()
                    ));
                }
            }
        }
        let mut complete = 0;
        for k in 0..args.tasks {
            match runner::slice_progress(&args.out, k, args.tasks) {
                Ok(Some((done, total))) if done == total => complete += 1,
                Ok(_) => {}
                Err(e) => return fail(e.to_string()),
            }
        }
        if complete == args.tasks {
            return fail(format!(
                "{}: every trajectory of all {} slices has ended already; nothing to submit (merge with `flipswarm merge {} -o merged.h5`)",
                args.out.display(),
                args.tasks,
                args.out.display()
            ));
        }
    }
    if let Err(e) = runner::prepare(&cfg, &args.out) {
        return fail(e.to_string());
    }
    let dir = match args.out.canonicalize() {
        Ok(d) => d,
        Err(e) => return fail(format!("{}: {e}", args.out.display())),
    };
    let program = std::env::current_exe().unwrap_or_else(|_| PathBuf::from("flipswarm"));
    let stem = args
        .ensemble
        .file_stem()
        .map_or("ensemble".into(), |s| s.to_string_lossy().to_string());
    let name: String = format!("flipswarm-{stem}")
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '_'
            }
        })
        .collect();
    let s = scripts(args, &dir, &program, &name);
    let slurm = dir.join("slurm");
    if let Err(e) = std::fs::create_dir_all(&slurm) {
        return fail(format!("{}: {e}", slurm.display()));
    }
    let (array_path, merge_path) = (slurm.join("array.sbatch"), slurm.join("merge.sbatch"));
    for (p, text) in [(&array_path, &s.array), (&merge_path, &s.merge)] {
        if let Err(e) = std::fs::write(p, text) {
            eprintln!("error: {}: {e}", p.display());
            return exit::RUNTIME;
        }
    }
    println!(
        "{}: run directory ready; scripts {} and {}",
        dir.display(),
        array_path.display(),
        merge_path.display()
    );
    if args.dry_run {
        println!(
            "dry run: nothing submitted (submit with `sbatch {}`)",
            array_path.display()
        );
        return exit::OK;
    }
    let array_id = match sbatch(&array_path, None) {
        Ok(id) => id,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::RUNTIME;
        }
    };
    let merge_id = if args.no_merge {
        None
    } else {
        match sbatch(&merge_path, Some(&array_id)) {
            Ok(id) => Some(id),
            Err(e) => {
                eprintln!(
                    "error: the array {array_id} is submitted, but the merge job is not: {e}"
                );
                return exit::RUNTIME;
            }
        }
    };
    let record = serde_json::json!({"array": array_id, "merge": merge_id, "tasks": args.tasks, "submitted": crate::ensemble::h5::now_rfc3339()});
    let mut log = std::fs::read_to_string(slurm.join("jobs.jsonl")).unwrap_or_default();
    log.push_str(&format!("{record}\n"));
    if let Err(e) = std::fs::write(slurm.join("jobs.jsonl"), log) {
        eprintln!(
            "warning: cannot record the job ids in {}: {e}",
            slurm.display()
        );
    }
    println!(
        "submitted array job {array_id} ({} tasks, at most {} at once){}",
        args.tasks,
        args.throttle,
        merge_id.map_or(String::new(), |m| format!(" and merge job {m} after it"))
    );
    println!("follow it with `flipswarm status {}`", dir.display());
    exit::OK
}
