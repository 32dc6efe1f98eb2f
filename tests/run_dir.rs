//! A run saved to a directory reports exactly what the same run reports in
//! memory (the file is the result), and the run directory is self-contained.

use std::path::PathBuf;
use std::process::Command;

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");

fn scratch(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("flipswarm-rundir-{}-{name}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

fn json(args: &[&str]) -> serde_json::Value {
    let out = Command::new(BIN).args(args).output().unwrap();
    assert_eq!(out.status.code(), Some(0), "{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap()
}

/// Tully model 1 (J. Chem. Phys. 93, 1061 (1990)): the branching ratios
/// computed from the part file equal the in-memory ones, for every row
/// cadence (rows are a record, not an input to the physics).
#[test]
fn saved_run_summary_equals_in_memory_summary() {
    let dir = scratch("tully");
    let ens = "ensembles/tully-1.toml";
    let set = ["--set", "swarm.trajectories=120", "--set", "output.record_every_steps=7"];
    let mut a = vec!["-q", "run", ens, "--json"];
    a.extend(set);
    let memory = json(&a);
    let out = dir.join("run");
    let mut b = vec!["-q", "run", ens, "--json", "-o", out.to_str().unwrap()];
    b.extend(set);
    let saved = json(&b);
    let s = &saved["summary"];
    for key in ["channels", "state_fractions", "mean_populations", "hops_accepted", "hops_frustrated", "finished", "trajectories"] {
        assert_eq!(s[key], memory[key], "summary field {key} differs");
    }
    assert_eq!(saved["finished"], 120);
    let _ = std::fs::remove_dir_all(&dir);
}

/// An LVC run directory carries its own copy of the model file, so it can be
/// moved and resumed elsewhere.
#[test]
fn lvc_run_directory_is_self_contained() {
    let dir = scratch("lvc");
    let out = dir.join("run");
    let o = out.to_str().unwrap();
    json(&["-q", "run", "ensembles/three-state-cone.toml", "--json", "-o", o, "--set", "swarm.trajectories=4", "--set", "dynamics.duration_fs=5"]);
    let moved = dir.join("moved");
    std::fs::rename(&out, &moved).unwrap();
    let toml = std::fs::read_to_string(moved.join("run.toml")).unwrap();
    assert!(toml.contains("lvc-model.toml"), "{toml}");
    // Resuming a complete run is a no-op that still succeeds from the new place.
    let r = json(&["-q", "resume", moved.to_str().unwrap(), "--json"]);
    assert_eq!(r["finished"], 4);
    let _ = std::fs::remove_dir_all(&dir);
}

/// An existing run directory is never overwritten.
#[test]
fn existing_run_directory_is_refused() {
    let dir = scratch("twice");
    let out = dir.join("run");
    let o = out.to_str().unwrap();
    let args = ["-q", "run", "ensembles/tully-1.toml", "-o", o, "--set", "swarm.trajectories=3"];
    assert_eq!(Command::new(BIN).args(args).output().unwrap().status.code(), Some(0));
    let before = std::fs::read(out.join("part-0000-of-0001.h5")).unwrap();
    let second = Command::new(BIN).args(args).output().unwrap();
    assert_eq!(second.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&second.stderr).contains("already holds a run"));
    assert_eq!(std::fs::read(out.join("part-0000-of-0001.h5")).unwrap(), before);
    let _ = std::fs::remove_dir_all(&dir);
}
