//! The `flipswarm` binary end to end: help texts, a tiny Tully-1 ensemble
//! (table, JSON, reproducibility over seeds and thread counts), population
//! curves, input errors (exit code 2, message naming file/line/key, nothing on
//! standard output, no panic) and failed trajectories (exit code 1).
//!
//! The exit codes and messages checked are the ones documented in
//! `src/cli/mod.rs` and `flipswarm --help`; each test runs in its own
//! temporary directory, removed afterwards. Ensembles are tiny (40
//! trajectories, ~1500 steps) so the file runs in about a second.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::atomic::{AtomicUsize, Ordering};

use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");

/// A small Tully-1 scattering ensemble (J. Chem. Phys. 93, 1061 (1990)), well
/// inside the interaction region's reach in 3000 a.u. of time at k = 20 a.u.
const TULLY1: &str = r#"title = "cli test: Tully 1"

[model]
kind = "tully-1"

[start]
sampling = "wigner"
position_bohr = -8.0
momentum_au = 20.0
width_bohr = 1.0
state = 0

[dynamics]
timestep_au = 2.0
duration_au = 3000.0
decoherence = "none"
exit_region_bohr = [-9.0, 9.0]

[swarm]
trajectories = 40
seed = 17
"#;

/// A temporary directory removed on drop.
struct TempDir(PathBuf);

impl TempDir {
    fn new(name: &str) -> Self {
        static COUNT: AtomicUsize = AtomicUsize::new(0);
        let n = COUNT.fetch_add(1, Ordering::Relaxed);
        let dir =
            std::env::temp_dir().join(format!("flipswarm-cli-{}-{name}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).expect("create temporary directory");
        Self(dir)
    }
    fn write(&self, name: &str, text: &str) -> PathBuf {
        let p = self.0.join(name);
        if let Some(parent) = p.parent() {
            std::fs::create_dir_all(parent).unwrap();
        }
        std::fs::write(&p, text).unwrap();
        p
    }
    fn path(&self, name: &str) -> PathBuf {
        self.0.join(name)
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

fn run(dir: &Path, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .current_dir(dir)
        .env_remove("FLIPSWARM_LOG")
        .output()
        .expect("the binary runs")
}

fn stdout(o: &Output) -> String {
    String::from_utf8(o.stdout.clone()).expect("UTF-8 stdout")
}

fn stderr(o: &Output) -> String {
    String::from_utf8(o.stderr.clone()).expect("UTF-8 stderr")
}

fn no_panic(o: &Output) {
    assert!(!stderr(o).contains("panicked"), "panic: {}", stderr(o));
}

/// 1-based line of the first line of `text` that starts with `prefix`.
fn line_of(text: &str, prefix: &str) -> usize {
    text.lines()
        .position(|l| l.starts_with(prefix))
        .expect("prefix present")
        + 1
}

/// Shows: the help texts exit 0 and document units and exit codes, `run --help`
/// its options and where the keys are listed, and `flipswarm keys` lists every
/// key of `config::SCHEMA` with its default. Source: `src/cli/mod.rs` (exit
/// codes), `src/config/mod.rs` (schema).
#[test]
fn help_and_keys_document_units_exit_codes_and_every_key() {
    let dir = TempDir::new("help");
    let top = run(&dir.0, &["--help"]);
    assert_eq!(top.status.code(), Some(0));
    let text = stdout(&top);
    for s in [
        "Units",
        "atomic units",
        "bohr",
        "hartree",
        "Exit codes",
        "0 success",
        "1 some trajectories failed",
        "2 bad usage",
        "4 runtime",
        "run",
        "keys",
    ] {
        assert!(text.contains(s), "--help does not mention {s:?}:\n{text}");
    }

    let sub = run(&dir.0, &["run", "--help"]);
    assert_eq!(sub.status.code(), Some(0));
    let text = stdout(&sub);
    for s in [
        "<ENSEMBLE>",
        "--set",
        "KEY=VALUE",
        "--threads",
        "--json",
        "--populations",
        "time in fs",
        "flipswarm keys",
    ] {
        assert!(
            text.contains(s),
            "run --help does not mention {s:?}:\n{text}"
        );
    }

    let keys = run(&dir.0, &["keys"]);
    assert_eq!(keys.status.code(), Some(0));
    let text = stdout(&keys);
    assert_eq!(
        text.lines().count(),
        flipswarm::config::SCHEMA.len(),
        "one line per key"
    );
    for k in flipswarm::config::SCHEMA {
        let line = text
            .lines()
            .find(|l| l.split_whitespace().next() == Some(k.path))
            .unwrap_or_else(|| panic!("`keys` lacks {}", k.path));
        assert!(
            line.contains(k.meaning) && line.contains(k.default),
            "{line}"
        );
    }
    // Units are in the key names and in the meanings.
    for s in ["_fs", "_au", "_bohr", "_ev", "hartree"] {
        assert!(text.contains(s), "keys lack unit {s}");
    }

    let version = run(&dir.0, &["--version"]);
    assert_eq!(version.status.code(), Some(0));
    assert!(stdout(&version).contains(env!("CARGO_PKG_VERSION")));
}

/// Regression test for a documentation bug found here: the config module
/// promises that `flipswarm run --help` shows the full list of keys.
#[test]
fn run_help_lists_every_key_as_documented() {
    let dir = TempDir::new("run-help-keys");
    let text = stdout(&run(&dir.0, &["run", "--help"]));
    for k in flipswarm::config::SCHEMA {
        assert!(text.contains(k.path), "run --help lacks {}", k.path);
    }
}

/// Shows: a small Tully-1 ensemble runs (exit 0) and prints the channel table
/// with a probability per channel and state. Source: `flipswarm run` docs.
#[test]
fn run_prints_the_channel_table() {
    let dir = TempDir::new("table");
    let ens = dir.write("ens.toml", TULLY1);
    let o = run(&dir.0, &["run", ens.to_str().unwrap(), "-q"]);
    no_panic(&o);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let text = stdout(&o);
    assert!(text.contains("cli test: Tully 1"), "{text}");
    assert!(
        text.contains("trajectories: 40 run, 40 finished, 0 failed"),
        "{text}"
    );
    assert!(
        text.contains("channel") && text.contains("probability"),
        "{text}"
    );
    for ch in ["reflected", "transmitted"] {
        for state in 0..2 {
            assert!(
                text.lines().any(|l| l
                    .split_whitespace()
                    .take(2)
                    .eq([ch.to_string(), state.to_string()])),
                "no row for {ch} state {state}:\n{text}"
            );
        }
    }
}

fn json_run(dir: &Path, ens: &Path, extra: &[&str]) -> (String, Value) {
    let mut args = vec!["run", ens.to_str().unwrap(), "--json", "-q"];
    args.extend_from_slice(extra);
    let o = run(dir, &args);
    no_panic(&o);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let text = stdout(&o);
    let v: Value =
        serde_json::from_str(&text).unwrap_or_else(|e| panic!("stdout is not JSON ({e}):\n{text}"));
    (text, v)
}

/// Shows: `--json` prints valid JSON (and only JSON) on stdout; the channel
/// probabilities sum to 1, the counts to the number of trajectories, and the
/// state fractions to 1. Source: the meaning of branching ratios.
#[test]
fn json_summary_is_consistent() {
    let dir = TempDir::new("json");
    let ens = dir.write("ens.toml", TULLY1);
    let (_, v) = json_run(&dir.0, &ens, &[]);
    assert_eq!(v["trajectories"], 40);
    assert_eq!(v["finished"], 40);
    assert_eq!(v["failed"].as_array().unwrap().len(), 0);
    let channels = v["channels"].as_array().expect("channels");
    assert!(!channels.is_empty());
    let p: f64 = channels
        .iter()
        .map(|c| c["probability"].as_f64().unwrap())
        .sum();
    let n: u64 = channels.iter().map(|c| c["count"].as_u64().unwrap()).sum();
    assert!((p - 1.0).abs() < 1e-12, "probabilities sum to {p}");
    assert_eq!(n, 40);
    for c in channels {
        let (p, count) = (
            c["probability"].as_f64().unwrap(),
            c["count"].as_u64().unwrap(),
        );
        assert!((p - count as f64 / 40.0).abs() < 1e-15, "{c}");
    }
    let f: f64 = v["state_fractions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x[0].as_f64().unwrap())
        .sum();
    assert!((f - 1.0).abs() < 1e-12);
    let pops: f64 = v["mean_populations"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .sum();
    assert!((pops - 1.0).abs() < 1e-9, "mean populations sum to {pops}");
}

/// Shows: results depend only on the seed: the same seed gives identical JSON,
/// one and two worker threads give identical JSON, and another seed gives a
/// different ensemble (so the seed is really used). Source: design rule of
/// reproducible ensembles (per-trajectory random streams).
#[test]
fn json_is_reproducible_across_runs_and_thread_counts() {
    let dir = TempDir::new("repro");
    let ens = dir.write("ens.toml", TULLY1);
    let (a, _) = json_run(&dir.0, &ens, &["--threads", "2"]);
    let (b, _) = json_run(&dir.0, &ens, &["--threads", "2"]);
    assert_eq!(a, b, "same seed, same threads");
    let (one, _) = json_run(&dir.0, &ens, &["--threads", "1"]);
    assert_eq!(a, one, "1 vs 2 threads");
    let (other, _) = json_run(&dir.0, &ens, &["--threads", "2", "--set", "swarm.seed=18"]);
    assert_ne!(a, other, "another seed must give another ensemble");
}

/// Checks a population CSV: header, row lengths, initial row, sums.
fn check_csv(text: &str, n_states: usize, start: usize) {
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().expect("header").split(',').collect();
    let mut want = vec!["time_fs".to_string()];
    want.extend((0..n_states).map(|k| format!("fraction_{k}")));
    want.extend((0..n_states).map(|k| format!("population_{k}")));
    assert_eq!(header, want);
    let rows: Vec<Vec<f64>> = lines
        .map(|l| l.split(',').map(|x| x.parse().expect("number")).collect())
        .collect();
    assert!(rows.len() > 2, "only {} rows", rows.len());
    for (r, row) in rows.iter().enumerate() {
        assert_eq!(row.len(), 1 + 2 * n_states, "row {r}");
        // Six decimals are printed: sums are 1 to within n·5e-7.
        let fractions: f64 = row[1..=n_states].iter().sum();
        let populations: f64 = row[1 + n_states..].iter().sum();
        assert!(
            (fractions - 1.0).abs() <= n_states as f64 * 5e-7 + 1e-12,
            "row {r}: fractions sum to {fractions}"
        );
        assert!(
            (populations - 1.0).abs() <= n_states as f64 * 5e-7 + 1e-9,
            "row {r}: populations sum to {populations}"
        );
        if r > 0 {
            assert!(row[0] > rows[r - 1][0], "time not increasing at row {r}");
        }
    }
    let first = &rows[0];
    assert_eq!(first[0], 0.0);
    for k in 0..n_states {
        let one = if k == start { 1.0 } else { 0.0 };
        assert_eq!(first[1 + k], one, "initial fraction of state {k}");
        assert_eq!(
            first[1 + n_states + k],
            one,
            "initial population of state {k}"
        );
    }
}

/// Shows: `--populations` writes a CSV with one fraction and one population
/// column per state, the initial row all on the start state, and fractions and
/// populations summing to 1 in every row (every trajectory is on one state;
/// Σ|c|² = 1); for Tully 1 from the upper state and for the three-state LVC
/// fixture from its top state. An existing file is refused (exit 2) and left
/// untouched. Source: `run --help` and the meaning of the columns.
#[test]
fn populations_csv_has_the_documented_layout_and_is_never_overwritten() {
    let dir = TempDir::new("pops");
    let ens = dir.write("ens.toml", TULLY1);
    let csv = dir.path("pops.csv");
    let o = run(
        &dir.0,
        &[
            "run",
            ens.to_str().unwrap(),
            "-q",
            "--set",
            "start.state=1",
            "--populations",
            csv.to_str().unwrap(),
        ],
    );
    no_panic(&o);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    check_csv(&std::fs::read_to_string(&csv).unwrap(), 2, 1);

    let lvc_model =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/models/three-state-four-mode.toml");
    let lvc = format!(
        "[model]\nkind = \"lvc\"\nfile = {:?}\n[start]\nsampling = \"wigner\"\nstate = 2\n[dynamics]\ntimestep_fs = 0.1\nduration_fs = 5.0\n[swarm]\ntrajectories = 8\nseed = 3\n",
        lvc_model.to_str().unwrap()
    );
    let lvc_ens = dir.write("lvc.toml", &lvc);
    let lvc_csv = dir.path("lvc.csv");
    let o = run(
        &dir.0,
        &[
            "run",
            lvc_ens.to_str().unwrap(),
            "-q",
            "--populations",
            lvc_csv.to_str().unwrap(),
        ],
    );
    no_panic(&o);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    check_csv(&std::fs::read_to_string(&lvc_csv).unwrap(), 3, 2);

    let taken = dir.write("taken.csv", "keep me\n");
    let o = run(
        &dir.0,
        &[
            "run",
            ens.to_str().unwrap(),
            "-q",
            "--populations",
            taken.to_str().unwrap(),
        ],
    );
    no_panic(&o);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stdout(&o).is_empty(),
        "nothing may be printed: {}",
        stdout(&o)
    );
    assert!(stderr(&o).contains("taken.csv"), "{}", stderr(&o));
    assert_eq!(std::fs::read_to_string(&taken).unwrap(), "keep me\n");
}

/// Runs and expects an input error: exit 2, empty stdout, no panic, and every
/// fragment in stderr.
fn input_error(dir: &Path, args: &[&str], says: &[&str]) {
    let o = run(dir, args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
    assert!(
        stdout(&o).is_empty(),
        "{args:?} printed on stdout: {}",
        stdout(&o)
    );
    no_panic(&o);
    for s in says {
        assert!(
            err.contains(s),
            "{args:?}: stderr {err:?} does not mention {s:?}"
        );
    }
}

/// Shows: input errors exit with code 2 before any work, print nothing on
/// stdout, do not panic, and name the file, line and key (or the `--set`
/// option). Source: exit codes in `flipswarm --help`, config module docs.
#[test]
fn input_errors_exit_2_and_name_file_line_and_key() {
    let dir = TempDir::new("errors");
    let ens = dir.write("ens.toml", TULLY1);
    let e = ens.to_str().unwrap();

    let missing = dir.path("no-such-ensemble.toml");
    input_error(
        &dir.0,
        &["run", missing.to_str().unwrap()],
        &["no-such-ensemble.toml", "cannot read"],
    );

    let typo = TULLY1.replace("timestep_au", "timestpe_au");
    let line = line_of(&typo, "timestpe_au");
    let bad = dir.write("typo.toml", &typo);
    input_error(
        &dir.0,
        &["run", bad.to_str().unwrap()],
        &[
            &format!("typo.toml:{line}"),
            "key `dynamics.timestpe_au`",
            "did you mean `dynamics.timestep_au`",
        ],
    );

    input_error(
        &dir.0,
        &["run", e, "--set", "dynamics.timestep_au"],
        &["--set", "dynamics.timestep_au", "key=value"],
    );
    input_error(
        &dir.0,
        &["run", e, "--set", "dynamics.timestep_au=-1"],
        &["--set", "key `dynamics.timestep_au`", "positive"],
    );
    input_error(
        &dir.0,
        &["run", e, "--set", "swarm.sead=3"],
        &["--set", "key `swarm.sead`", "swarm.seed"],
    );
    input_error(
        &dir.0,
        &["run", e, "--set", "model.kind=tully-4"],
        &["--set", "key `model.kind`", "tully-4"],
    );
    input_error(&dir.0, &["frobnicate"], &["frobnicate"]);
    input_error(&dir.0, &["run"], &["<ENSEMBLE>"]);
    input_error(
        &dir.0,
        &["run", e, "--threads", "two"],
        &["--threads", "two"],
    );

    // An LVC ensemble whose model file is missing, and one whose model file is
    // malformed: the ensemble key, its line, and the model's problem.
    let lvc = "title = \"lvc\"\n[model]\nkind = \"lvc\"\nfile = \"models/absent.toml\"\n[start]\n[dynamics]\ntimestep_fs = 0.1\nduration_fs = 1.0\n[swarm]\ntrajectories = 2\nseed = 1\n";
    let lvc_ens = dir.write("lvc.toml", lvc);
    input_error(
        &dir.0,
        &["run", lvc_ens.to_str().unwrap()],
        &[
            "lvc.toml:4",
            "key `model.file`",
            "absent.toml",
            "cannot read",
        ],
    );
    dir.write("models/absent.toml", "frequencies_ev = [0.1]\nvertical_ev = [0.0, 3.0]\n[[coupling]]\nstates = [1, 1]\nmode = 0\nvalue_ev = 0.1\n");
    input_error(
        &dir.0,
        &["run", lvc_ens.to_str().unwrap()],
        &[
            "lvc.toml:4",
            "key `model.file`",
            "[[coupling]] entry 0",
            "itself",
        ],
    );
}

/// Shows: when trajectories fail (energy-drift limit far below what a large
/// time step conserves) the run still completes, exits with code 1, and lists
/// the failed trajectories with step and reason, in the table and in JSON.
/// Source: exit codes in `flipswarm --help`.
#[test]
fn failed_trajectories_exit_1_and_are_listed_with_a_reason() {
    let dir = TempDir::new("failed");
    let ens = dir.write("ens.toml", TULLY1);
    let e = ens.to_str().unwrap();
    let strict = [
        "--set",
        "dynamics.max_energy_drift_ev=1e-12",
        "--set",
        "dynamics.timestep_au=20",
    ];
    let mut args = vec!["run", e, "-q"];
    args.extend_from_slice(&strict);
    let o = run(&dir.0, &args);
    no_panic(&o);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    let text = stdout(&o);
    let header = text
        .lines()
        .find(|l| l.starts_with("trajectories:"))
        .expect("summary line");
    let n_failed: usize = header
        .split(", ")
        .find(|s| s.ends_with("failed"))
        .and_then(|s| s.split_whitespace().next())
        .unwrap()
        .parse()
        .unwrap();
    assert!(n_failed > 0, "{text}");
    let listed: Vec<&str> = text
        .lines()
        .filter(|l| l.starts_with("failed: trajectory"))
        .collect();
    assert_eq!(listed.len(), n_failed.min(20), "{text}");
    for l in &listed {
        assert!(
            l.contains(" at step ") && l.contains("energy"),
            "no reason: {l}"
        );
    }

    args.push("--json");
    let o = run(&dir.0, &args);
    assert_eq!(o.status.code(), Some(1));
    let v: Value = serde_json::from_str(&stdout(&o)).expect("JSON even when trajectories fail");
    let failed = v["failed"].as_array().unwrap();
    assert_eq!(failed.len(), n_failed);
    assert_eq!(v["finished"].as_u64().unwrap() as usize + n_failed, 40);
    for f in failed {
        let (index, reason) = (f[0].as_u64().unwrap(), f[2].as_str().unwrap());
        assert!(index < 40 && reason.contains("drift"), "{f}");
    }
}
