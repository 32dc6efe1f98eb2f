//! Cluster runs with Slurm job arrays (`flipswarm submit`, `status`).
//!
//! Sources: Slurm's documented sbatch options (`--array=0-N%M`,
//! `--signal=B:USR1@T`, `--requeue`, `--open-mode=append`; common practice)
//! and, for the end-to-end test, bit-for-bit identity with an uninterrupted
//! local run of the same ensemble (exact restart, our own invariant).
//!
//! The end-to-end test starts a single-node Slurm on localhost with
//! `scripts/lib/slurm-local.sh` (Debian's slurmctld, slurmd, munge; root
//! needed). Where that is impossible it prints a SKIPPED line saying why.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use flipswarm::ensemble::h5::{PartReader, WriterState};

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");
const ROOT: &str = env!("CARGO_MANIFEST_DIR");

fn scratch(name: &str) -> PathBuf {
    common::scratch("slurm", name)
}

fn ensemble(dir: &Path, trajectories: usize, duration_fs: f64) -> PathBuf {
    std::fs::copy(
        format!("{ROOT}/ensembles/models/three-state-cone.toml"),
        dir.join("model.toml"),
    )
    .unwrap();
    let text = format!(
        "[model]\nkind = \"lvc\"\nfile = \"model.toml\"\n[start]\nsampling = \"wigner\"\nstate = 2\n[dynamics]\ntimestep_fs = 0.1\nduration_fs = {duration_fs}\n[output]\ncheckpoint_every_steps = 50\n[swarm]\ntrajectories = {trajectories}\nseed = 77\n"
    );
    let p = dir.join("ens.toml");
    std::fs::write(&p, text).unwrap();
    p
}

fn flipswarm(dir: &Path, args: &[&str], env: &[(&str, &str)]) -> (i32, String, String) {
    let mut c = Command::new(BIN);
    c.current_dir(dir).args(args).env("FLIPSWARM_LOG", "warn");
    for (k, v) in env {
        c.env(k, v);
    }
    let out = c.output().unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

// The options that matter in the generated scripts (Slurm's sbatch options).
#[test]
fn generated_scripts_carry_the_options_that_matter() {
    let d = scratch("dry");
    let ens = ensemble(&d, 40, 1.0);
    let (c, out, err) = flipswarm(
        &d,
        &[
            "submit",
            ens.to_str().unwrap(),
            "-o",
            "run",
            "--tasks",
            "8",
            "--throttle",
            "3",
            "--time",
            "00:30:00",
            "--signal-lead-s",
            "240",
            "--partition",
            "short",
            "--account",
            "chem",
            "--cpus-per-task",
            "2",
            "--sbatch=--qos=low",
            "--dry-run",
        ],
        &[],
    );
    assert_eq!(c, 0, "{err}");
    assert!(out.contains("dry run: nothing submitted"), "{out}");
    let run = d.join("run").canonicalize().unwrap();
    let array = std::fs::read_to_string(run.join("slurm/array.sbatch")).unwrap();
    for want in [
        "#SBATCH --array=0-7%3".to_string(),
        "#SBATCH --time=00:30:00".to_string(),
        "#SBATCH --signal=B:USR1@240".to_string(),
        "#SBATCH --requeue".to_string(),
        "#SBATCH --open-mode=append".to_string(),
        format!("#SBATCH --output={}/slurm/task-%a.log", run.display()),
        "#SBATCH --cpus-per-task=2".to_string(),
        "#SBATCH --partition=short".to_string(),
        "#SBATCH --account=chem".to_string(),
        "#SBATCH --qos=low".to_string(),
        "resume \"$dir\" --slice \"$slice\"".to_string(),
        "trap forward USR1 TERM".to_string(),
        "scontrol requeue \"$task\"".to_string(),
    ] {
        assert!(
            array.contains(&want),
            "array script lacks {want:?}:\n{array}"
        );
    }
    let merge = std::fs::read_to_string(run.join("slurm/merge.sbatch")).unwrap();
    assert!(
        merge.contains(" merge ") && merge.contains("merged.h5"),
        "{merge}"
    );
    // The run directory is ready for the tasks: run.toml and the model copy.
    assert!(run.join("run.toml").exists() && run.join("lvc-model.toml").exists());
    // status before anything ran
    let (c, out, err) = flipswarm(&d, &["status", "run"], &[]);
    assert_eq!(c, 0, "{err}");
    assert!(
        out.contains("0 of 40 trajectories ended") && out.contains("not started"),
        "{out}"
    );
}

#[test]
fn bad_submissions_submit_nothing() {
    let d = scratch("bad");
    let ens = ensemble(&d, 8, 0.5);
    // No sbatch on PATH.
    let (c, _, err) = flipswarm(
        &d,
        &["submit", ens.to_str().unwrap(), "-o", "run", "--tasks", "2"],
        &[("PATH", "/nonexistent")],
    );
    assert_eq!(c, 2, "{err}");
    assert!(err.contains("sbatch is not on PATH"), "{err}");
    assert!(!d.join("run").exists(), "nothing may be written");
    // Bad time, lead and task count.
    for (args, text) in [
        (vec!["--tasks", "2", "--time", "soon"], "not a Slurm time"),
        (
            vec!["--tasks", "2", "--time", "2", "--signal-lead-s", "30"],
            "at least 60",
        ),
        (
            vec!["--tasks", "2", "--time", "1", "--signal-lead-s", "90"],
            "below the time limit",
        ),
        (vec!["--tasks", "9"], "only 8 trajectories"),
    ] {
        let mut a = vec!["submit", ens.to_str().unwrap(), "-o", "run", "--dry-run"];
        a.extend(args);
        let (c, _, err) = flipswarm(&d, &a, &[]);
        assert!(c == 2 && err.contains(text), "{a:?}: {err}");
    }
    // An ensemble that is already complete.
    let (c, _, err) = flipswarm(
        &d,
        &["run", ens.to_str().unwrap(), "-o", "done", "--slice", "0/2"],
        &[],
    );
    assert_eq!(c, 0, "{err}");
    let (c, _, err) = flipswarm(
        &d,
        &["run", ens.to_str().unwrap(), "-o", "done", "--slice", "1/2"],
        &[],
    );
    assert_eq!(c, 0, "{err}");
    let (c, _, err) = flipswarm(
        &d,
        &[
            "submit",
            ens.to_str().unwrap(),
            "-o",
            "done",
            "--tasks",
            "2",
            "--dry-run",
        ],
        &[],
    );
    assert_eq!(c, 2, "{err}");
    assert!(
        err.contains("has ended already; nothing to submit"),
        "{err}"
    );
    assert!(!d.join("done/slurm").exists(), "nothing may be written");
    // Parts of another slicing.
    let (c, _, err) = flipswarm(
        &d,
        &[
            "submit",
            ens.to_str().unwrap(),
            "-o",
            "done",
            "--tasks",
            "4",
            "--dry-run",
        ],
        &[],
    );
    assert!(c == 2 && err.contains("another number of slices"), "{err}");
}

/// Stops the daemons when dropped (also when the test fails).
struct LocalSlurm {
    dir: PathBuf,
}

impl Drop for LocalSlurm {
    fn drop(&mut self) {
        let _ = Command::new("bash")
            .arg(format!("{ROOT}/scripts/lib/slurm-local.sh"))
            .arg("stop")
            .arg(&self.dir)
            .status();
    }
}

// End to end on a real single-node Slurm: an array of 4 tasks with a short
// time limit and a pre-timeout signal (plus the same signal delivered once
// per task with scancel, so the path runs on fast machines too) →
// checkpoint → requeue → resume, a dependent merge, and the merged ensemble
// bit-for-bit equal to an uninterrupted local run.
#[test]
fn job_array_with_time_limits_matches_a_local_run() {
    let d = scratch("e2e");
    let sdir = d.join("slurm-daemons");
    let start = Command::new("bash")
        .arg(format!("{ROOT}/scripts/lib/slurm-local.sh"))
        .arg("start")
        .arg(&sdir)
        .output()
        .unwrap();
    if !start.status.success() {
        eprintln!(
            "SKIPPED job_array_with_time_limits_matches_a_local_run: a local Slurm could not be started here (exit {:?}): {}",
            start.status.code(),
            String::from_utf8_lossy(&start.stderr).trim()
        );
        return;
    }
    let _guard = LocalSlurm { dir: sdir.clone() };
    let conf = sdir.join("slurm.conf");
    let conf = conf.to_str().unwrap();
    // 4 slices of ~15 s each when the two cores are shared by all four (on
    // this machine, idle); the test's own signal comes 3 s into each task's
    // first run and Slurm's ~10 s after each start (±30 s), so every task is
    // interrupted at least once even on a faster machine.
    let ens = ensemble(&d, 800, 360.0);
    let (c, _, err) = flipswarm(
        &d,
        &[
            "run",
            ens.to_str().unwrap(),
            "-o",
            "local",
            "--threads",
            "2",
        ],
        &[],
    );
    assert_eq!(c, 0, "{err}");
    let (c, out, err) = flipswarm(
        &d,
        &[
            "submit",
            ens.to_str().unwrap(),
            "-o",
            "cluster",
            "--tasks",
            "4",
            "--time",
            "2",
            "--signal-lead-s",
            "110",
        ],
        &[("SLURM_CONF", conf)],
    );
    assert_eq!(c, 0, "{err}");
    assert!(out.contains("submitted array job"), "{out}");
    let run = d.join("cluster");
    let deadline = Instant::now() + Duration::from_secs(900);
    let mut signalled: Vec<String> = Vec::new();
    // When each requeued task was first seen waiting for its begin time.
    let mut waiting: std::collections::HashMap<String, Instant> = std::collections::HashMap::new();
    loop {
        let q = Command::new("squeue")
            .args(["-h", "-r", "-o", "%i %T %r %M"])
            .env("SLURM_CONF", conf)
            .output()
            .unwrap();
        let q = String::from_utf8_lossy(&q.stdout).to_string();
        for line in q.lines() {
            let f: Vec<&str> = line.split_whitespace().collect();
            // A requeued task waits for the scheduler's requeue delay (about
            // two minutes); the test moves its start time to now to stay short.
            // Not at once: a task started within milliseconds of its requeue
            // can be killed by Slurm ("job credential revoked") while the
            // old instance is still being cleaned up.
            if f.len() >= 3 && f[1] == "PENDING" && f[2] == "BeginTime" {
                let since = *waiting.entry(f[0].to_string()).or_insert_with(Instant::now);
                if since.elapsed() >= Duration::from_secs(3) {
                    let _ = Command::new("scontrol")
                        .args(["update", &format!("JobId={}", f[0]), "StartTime=now"])
                        .env("SLURM_CONF", conf)
                        .output();
                    waiting.remove(f[0]);
                }
            } else if f.len() >= 2 && f[1] == "RUNNING" {
                waiting.remove(f[0]);
            }
            // Slurm checks signal times on a coarse interval, so on a fast
            // machine a slice may end before its pre-timeout signal. To
            // exercise the path on every machine, each task also gets the
            // same signal once, 3 s into its first run, the way Slurm
            // delivers a job signal at once (`scancel --batch --signal`).
            if f.len() >= 4
                && f[1] == "RUNNING"
                && f[0].contains('_')
                && !signalled.iter().any(|s| s == f[0])
            {
                let secs: u64 = f[3]
                    .rsplit(':')
                    .enumerate()
                    .map(|(i, x)| x.parse::<u64>().unwrap_or(0) * 60u64.pow(i as u32))
                    .sum();
                if secs >= 3 {
                    let _ = Command::new("scancel")
                        .args(["--batch", "--signal=USR1", f[0]])
                        .env("SLURM_CONF", conf)
                        .output();
                    signalled.push(f[0].to_string());
                }
            }
        }
        // Done when the queue is empty after the merge job has run (it
        // refuses, writing nothing, if a slice did not finish).
        let merge_log = run.join("slurm/merge.log");
        if q.trim().is_empty() && (run.join("merged.h5").exists() || merge_log.exists()) {
            let logs: String = (0..4)
                .map(|k| {
                    std::fs::read_to_string(run.join(format!("slurm/task-{k}.log")))
                        .unwrap_or_default()
                })
                .collect::<Vec<_>>()
                .join("\n----\n");
            assert!(
                run.join("merged.h5").exists(),
                "the merge job wrote nothing:\n{}\ntask logs:\n{logs}",
                std::fs::read_to_string(&merge_log).unwrap_or_default()
            );
            break;
        }
        assert!(
            Instant::now() < deadline,
            "the array did not finish in 15 minutes; queue:\n{q}"
        );
        std::thread::sleep(Duration::from_secs(1));
    }
    // Every task was interrupted and requeued at least once in total.
    let mut restarts = 0;
    for k in 0..4 {
        let log = std::fs::read_to_string(run.join(format!("slurm/task-{k}.log"))).unwrap();
        restarts += log.matches("requeueing it").count();
        assert!(
            log.contains("ended with code 0"),
            "task {k} did not end cleanly:\n{log}"
        );
    }
    eprintln!("{restarts} signal → checkpoint → requeue → resume cycles");
    assert!(
        restarts >= 1,
        "no task was stopped and requeued; the test did not exercise the requeue path"
    );
    let (c, out, err) = flipswarm(&d, &["status", "cluster"], &[("SLURM_CONF", conf)]);
    assert_eq!(c, 0, "{err}");
    assert!(out.contains("800 of 800 trajectories ended"), "{out}");
    // Bit for bit against the local run.
    let got = common::read_all(&run.join("merged.h5"));
    let want = common::read_all(&d.join("local/part-0000-of-0001.h5"));
    assert_eq!(got.len(), want.len());
    for (a, b) in got.iter().zip(&want) {
        assert_eq!(a.header, b.header, "trajectory {}", b.header.index);
        assert_eq!(a.rows, b.rows, "trajectory {} rows", b.header.index);
        assert_eq!(a.hops, b.hops, "trajectory {} hops", b.header.index);
        assert_eq!(a.status, b.status, "trajectory {} status", b.header.index);
    }
    assert_eq!(
        PartReader::open(&run.join("merged.h5"))
            .unwrap()
            .writer_state(),
        WriterState::Closed
    );
}

/// The task script's exit-code handling when the pre-timeout signal and the
/// program's own exit coincide: the program (a stand-in script) signals the
/// task shell with USR1 and exits with the "stopped, resumable" code 3 at
/// once, so the shell's `wait` is interrupted by the trap just as the
/// program ends. The task must still see code 3, requeue itself and report
/// it (before the fix it reported 138, the signal, and did not requeue; and
/// a signal that came before the shell had set its trap killed the task).
/// Source: bash's documented `wait` semantics (a trapped signal makes `wait`
/// return a status above 128); no Slurm needed (fake `scontrol`, `sleep`).
#[test]
fn task_script_keeps_the_exit_code_when_a_signal_coincides_with_the_exit() {
    let d = scratch("race");
    let ens = ensemble(&d, 8, 1.0);
    let (c, _, err) = flipswarm(
        &d,
        &[
            "submit",
            ens.to_str().unwrap(),
            "-o",
            "run",
            "--tasks",
            "2",
            "--dry-run",
        ],
        &[],
    );
    assert_eq!(c, 0, "{err}");
    let array = std::fs::read_to_string(d.join("run/slurm/array.sbatch")).unwrap();
    let bin = d.join("bin");
    std::fs::create_dir_all(&bin).unwrap();
    let write_exe = |name: &str, text: &str| {
        use std::os::unix::fs::PermissionsExt;
        let p = bin.join(name);
        std::fs::write(&p, text).unwrap();
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o755)).unwrap();
        p
    };
    // Like the real program, the stand-in takes USR1 as "stop gracefully".
    let fake = write_exe(
        "program",
        "#!/bin/bash\ntrap '' USR1\nkill -USR1 $PPID\nexit 3\n",
    );
    write_exe(
        "scontrol",
        &format!(
            "#!/bin/bash\necho \"$@\" >> {}\n",
            d.join("scontrol.log").display()
        ),
    );
    write_exe("sleep", "#!/bin/bash\nexit 0\n");
    let script: String = array
        .lines()
        .map(|l| {
            if l.starts_with("program=") {
                format!("program='{}'", fake.display())
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n");
    let path = format!(
        "{}:{}",
        bin.display(),
        std::env::var("PATH").unwrap_or_default()
    );
    for attempt in 0..20 {
        let out = Command::new("bash")
            .arg("-c")
            .arg(&script)
            .env("PATH", &path)
            .env("SLURM_ARRAY_TASK_ID", "1")
            .env("SLURM_ARRAY_JOB_ID", "77")
            .env("SLURM_CPUS_PER_TASK", "1")
            .output()
            .unwrap();
        let text = String::from_utf8_lossy(&out.stdout);
        assert_eq!(out.status.code(), Some(3), "attempt {attempt}: {text}");
        assert!(
            text.contains("requeueing it") && text.contains("ended with code 3"),
            "attempt {attempt}: {text}"
        );
    }
    let requeued = std::fs::read_to_string(d.join("scontrol.log")).unwrap();
    assert_eq!(
        requeued.lines().filter(|l| *l == "requeue 77_1").count(),
        20,
        "{requeued}"
    );
}
