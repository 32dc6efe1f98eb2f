//! A run saved to a directory reports exactly what the same run reports in
//! memory (the file is the result), and the run directory is self-contained.

mod common;

use std::path::PathBuf;
use std::process::Command;

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");

fn scratch(name: &str) -> PathBuf {
    common::scratch("rundir", name)
}

fn json(args: &[&str]) -> serde_json::Value {
    let out = Command::new(BIN).args(args).output().unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// Tully model 1 (J. Chem. Phys. 93, 1061 (1990)): the branching ratios
/// computed from the part file equal the in-memory ones, for every row
/// cadence (rows are a record, not an input to the physics).
#[test]
fn saved_run_summary_equals_in_memory_summary() {
    let dir = scratch("tully");
    let ens = "ensembles/tully-1.toml";
    let set = [
        "--set",
        "swarm.trajectories=120",
        "--set",
        "output.record_every_steps=7",
    ];
    let mut a = vec!["-q", "run", ens, "--json"];
    a.extend(set);
    let memory = json(&a);
    let out = dir.join("run");
    let mut b = vec!["-q", "run", ens, "--json", "-o", out.to_str().unwrap()];
    b.extend(set);
    let saved = json(&b);
    let s = &saved["summary"];
    for key in [
        "channels",
        "state_fractions",
        "mean_populations",
        "hops_accepted",
        "hops_frustrated",
        "finished",
        "trajectories",
    ] {
        assert_eq!(s[key], memory[key], "summary field {key} differs");
    }
    assert_eq!(saved["finished"], 120);
    // The summary reads only each trajectory's course (steps, active
    // states, amplitudes, total energies, hops): the same outcome, field for
    // field, as from the whole trajectory.
    let r = flipswarm::ensemble::h5::PartReader::open(&out.join("part-0000-of-0001.h5")).unwrap();
    let mut hops = 0;
    for i in r.trajectory_indices() {
        let whole = flipswarm::swarm::Outcome::from_data(&r.read(i).unwrap());
        let course = flipswarm::swarm::Outcome::from_course(&r.read_course(i).unwrap());
        assert_eq!(course, whole, "trajectory {i}");
        assert!(
            whole.series.len() > 100,
            "trajectory {i}: {} rows",
            whole.series.len()
        );
        hops += whole.hops.len();
    }
    assert!(hops > 0, "the comparison covers hop attempts");
    let _ = std::fs::remove_dir_all(&dir);
}

/// An LVC run directory carries its own copy of the model file, so it can be
/// moved and resumed elsewhere.
#[test]
fn lvc_run_directory_is_self_contained() {
    let dir = scratch("lvc");
    let out = dir.join("run");
    let o = out.to_str().unwrap();
    json(&[
        "-q",
        "run",
        "ensembles/three-state-cone.toml",
        "--json",
        "-o",
        o,
        "--set",
        "swarm.trajectories=4",
        "--set",
        "dynamics.duration_fs=5",
    ]);
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
    let args = [
        "-q",
        "run",
        "ensembles/tully-1.toml",
        "-o",
        o,
        "--set",
        "swarm.trajectories=3",
    ];
    assert_eq!(
        Command::new(BIN).args(args).output().unwrap().status.code(),
        Some(0)
    );
    let before = std::fs::read(out.join("part-0000-of-0001.h5")).unwrap();
    let second = Command::new(BIN).args(args).output().unwrap();
    assert_eq!(second.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&second.stderr).contains("already holds a run"));
    assert_eq!(
        std::fs::read(out.join("part-0000-of-0001.h5")).unwrap(),
        before
    );
    let _ = std::fs::remove_dir_all(&dir);
}

/// `export --format csv` writes one row per recorded step with energies in
/// eV (CODATA 2018 hartree) and populations that sum to 1.
#[test]
fn export_csv_has_one_row_per_recorded_step() {
    let dir = scratch("export-csv");
    let out = dir.join("run");
    let o = out.to_str().unwrap();
    json(&[
        "-q",
        "run",
        "ensembles/tully-1.toml",
        "--json",
        "-o",
        o,
        "--set",
        "swarm.trajectories=3",
    ]);
    let csv = dir.join("t.csv");
    let st = Command::new(BIN)
        .args(["export", o, "-t", "1", "-o", csv.to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(
        st.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&st.stderr)
    );
    let text = std::fs::read_to_string(&csv).unwrap();
    let reader =
        flipswarm::ensemble::h5::PartReader::open(&out.join("part-0000-of-0001.h5")).unwrap();
    let data = reader.read(1).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines.len(), data.rows.len() + 1);
    let header: Vec<&str> = lines[0].split(',').collect();
    let pop0 = header.iter().position(|h| *h == "population_0").unwrap();
    let tot = header.iter().position(|h| *h == "total_ev").unwrap();
    for (line, row) in lines[1..].iter().zip(&data.rows) {
        let f: Vec<f64> = line.split(',').map(|x| x.parse().unwrap()).collect();
        assert!((f[pop0] + f[pop0 + 1] - 1.0).abs() < 1e-9);
        assert!((f[tot] - row.total * flipswarm::units::HARTREE_IN_EV).abs() < 1e-12);
    }
    // An existing output file is refused.
    let again = Command::new(BIN)
        .args(["export", o, "-t", "1", "-o", csv.to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(again.status.code(), Some(2));
    let _ = std::fs::remove_dir_all(&dir);
}

/// `export --format xyz` writes extended-XYZ frames readable by our own XYZ
/// reader, with positions converted to Å (CODATA 2018 bohr); a wrong element
/// count is refused with the numbers in the message.
#[test]
fn export_xyz_round_trips_through_the_reader() {
    use flipswarm::ensemble::h5::PartWriter;
    use flipswarm::ensemble::record::{PartMeta, StepRow, TrajectoryHeader};
    use num_complex::Complex64;
    let dir = scratch("export-xyz");
    let part = dir.join("p.h5");
    let meta = PartMeta {
        config_toml: String::new(),
        program_version: "test".into(),
        created: "2026-12-01T00:00:00Z".into(),
        n_states: 2,
        n_dof: 6,
        masses: vec![1837.0; 6],
        slice: (0, 1),
        trajectories: vec![0],
        timestep_au: 10.0,
    };
    let mut w = PartWriter::create(&part, &meta).unwrap();
    w.begin(&TrajectoryHeader {
        index: 0,
        q0: vec![0.0; 6],
        v0: vec![0.0; 6],
        initial_state: 1,
        seed: 1,
    })
    .unwrap();
    let rows: Vec<StepRow> = (0..4)
        .map(|k| StepRow {
            step: k,
            time: 10.0 * k as f64,
            q: vec![0.0, 0.0, 0.0, 0.0, 0.0, 1.4 + 0.1 * k as f64],
            v: vec![0.0; 6],
            energies: vec![-1.1, -0.7],
            active: 1,
            amplitudes: vec![Complex64::new(0.6, 0.0), Complex64::new(0.0, 0.8)],
            kinetic: 0.0,
            potential: -0.7,
            total: -0.7,
        })
        .collect();
    w.append(0, &rows, &[]).unwrap();
    w.close().unwrap();
    let xyz = dir.join("t.xyz");
    let st = Command::new(BIN)
        .args([
            "export",
            part.to_str().unwrap(),
            "-t",
            "0",
            "--format",
            "xyz",
            "--elements",
            "H,H",
            "-o",
            xyz.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(
        st.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&st.stderr)
    );
    let frames = flipswarm::chem::xyz::read_extxyz_file(&xyz).unwrap();
    assert_eq!(frames.len(), 4);
    for (k, (frame, props)) in frames.iter().enumerate() {
        let d = frame.molecule.distance_bohr(0, 1).unwrap();
        assert!((d - (1.4 + 0.1 * k as f64)).abs() < 1e-9, "frame {k}: {d}");
        assert_eq!(props.get_i64("step"), Some(k as i64));
    }
    let bad = Command::new(BIN)
        .args([
            "export",
            part.to_str().unwrap(),
            "-t",
            "0",
            "--format",
            "xyz",
            "--elements",
            "H,H,O",
            "-o",
            dir.join("b.xyz").to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(bad.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&bad.stderr).contains("3 atoms"),
        "{}",
        String::from_utf8_lossy(&bad.stderr)
    );
    let _ = std::fs::remove_dir_all(&dir);
}

/// A run whose part file could not fit on its file system is refused before
/// anything is written, with the estimate in the message (the estimate is
/// an upper bound: rows × bytes per row, checked against a real file here).
#[test]
fn runs_that_cannot_fit_on_disk_are_refused_up_front() {
    let dir = scratch("disk");
    let out = dir.join("huge");
    let st = Command::new(BIN)
        .args([
            "-q",
            "run",
            "ensembles/three-state-cone.toml",
            "-o",
            out.to_str().unwrap(),
            "--set",
            "swarm.trajectories=10000000",
            "--set",
            "dynamics.duration_fs=100000",
        ])
        .output()
        .unwrap();
    assert_eq!(st.status.code(), Some(2));
    let err = String::from_utf8_lossy(&st.stderr);
    assert!(
        err.contains("would need about") && err.contains("free"),
        "{err}"
    );
    assert!(!out.exists(), "nothing may be created");
    // The estimate bounds a real file from above, within a factor of 3.
    let small = dir.join("small");
    json(&[
        "-q",
        "run",
        "ensembles/three-state-cone.toml",
        "--json",
        "-o",
        small.to_str().unwrap(),
        "--set",
        "swarm.trajectories=20",
    ]);
    let cfg = flipswarm::config::load_file(
        std::path::Path::new("ensembles/three-state-cone.toml"),
        &["swarm.trajectories=20".into()],
    )
    .unwrap();
    let estimate = flipswarm::ensemble::runner::estimated_bytes(&cfg, (0, 1)) as f64;
    let actual = std::fs::metadata(small.join("part-0000-of-0001.h5"))
        .unwrap()
        .len() as f64;
    assert!(
        estimate >= actual && estimate < 3.0 * actual,
        "estimate {estimate} vs actual {actual}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}

fn all_rows(part: &std::path::Path) -> Vec<(usize, Vec<u64>)> {
    let r = flipswarm::ensemble::h5::PartReader::open(part).unwrap();
    r.trajectory_indices()
        .into_iter()
        .map(|i| {
            let d = r.read(i).unwrap();
            let bits = d
                .rows
                .iter()
                .flat_map(|row| {
                    row.q
                        .iter()
                        .chain(&row.v)
                        .chain(&row.energies)
                        .map(|x| x.to_bits())
                        .chain([row.step, row.active as u64])
                })
                .collect();
            (i, bits)
        })
        .collect()
}

/// Two slices run into the same directory and merged equal one unsliced run,
/// bit for bit (each trajectory's streams depend only on seed and index).
#[test]
fn slices_merge_into_the_unsliced_run() {
    let dir = scratch("slices");
    let one = dir.join("one");
    let two = dir.join("two");
    let set = [
        "--set",
        "swarm.trajectories=9",
        "--set",
        "dynamics.duration_fs=8",
    ];
    let ens = "ensembles/three-state-cone.toml";
    let mut a = vec!["-q", "run", ens, "-o", one.to_str().unwrap()];
    a.extend(set);
    assert_eq!(
        Command::new(BIN).args(&a).output().unwrap().status.code(),
        Some(0)
    );
    for k in ["0/2", "1/2"] {
        let mut b = vec!["-q", "run", ens, "-o", two.to_str().unwrap(), "--slice", k];
        b.extend(set);
        let out = Command::new(BIN).args(&b).output().unwrap();
        assert_eq!(
            out.status.code(),
            Some(0),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let merged = dir.join("merged.h5");
    let out = Command::new(BIN)
        .args([
            "merge",
            two.to_str().unwrap(),
            "-o",
            merged.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(
        all_rows(&merged),
        all_rows(&one.join("part-0000-of-0001.h5"))
    );
    // With the second slice's part left out, a merge says what is missing
    // (a warning; with --require-complete a refusal that writes nothing).
    let half = dir.join("half.h5");
    let p0 = two.join("part-0000-of-0002.h5");
    let out = Command::new(BIN)
        .args(["merge", p0.to_str().unwrap(), "-o", half.to_str().unwrap()])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(0), "{err}");
    assert!(
        err.contains("warning: the run is incomplete")
            && err.contains("slice(s) [1] of 2 have no part file"),
        "{err}"
    );
    let strict = dir.join("strict.h5");
    let out = Command::new(BIN)
        .args([
            "merge",
            "--require-complete",
            p0.to_str().unwrap(),
            "-o",
            strict.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(4), "{err}");
    assert!(
        err.contains("error: the run is incomplete") && err.contains("nothing written"),
        "{err}"
    );
    assert!(!strict.exists());
    let out = Command::new(BIN)
        .args([
            "merge",
            "--require-complete",
            two.to_str().unwrap(),
            "-o",
            strict.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let _ = std::fs::remove_dir_all(&dir);
}

/// A run stopped before its part file existed, and a part file that cannot be
/// read at all, are both resumed by computing the slice again — with the same
/// result — and the unreadable file is kept aside, not deleted.
#[test]
fn resume_copes_with_missing_and_unreadable_part_files() {
    let dir = scratch("unreadable");
    let reference = dir.join("ref");
    let set = [
        "--set",
        "swarm.trajectories=4",
        "--set",
        "dynamics.duration_fs=5",
    ];
    let mut a = vec![
        "-q",
        "run",
        "ensembles/three-state-cone.toml",
        "-o",
        reference.to_str().unwrap(),
    ];
    a.extend(set);
    assert_eq!(
        Command::new(BIN).args(&a).output().unwrap().status.code(),
        Some(0)
    );
    let want = all_rows(&reference.join("part-0000-of-0001.h5"));
    // Only run.toml and the model copy: stopped before anything was written.
    let early = dir.join("early");
    std::fs::create_dir_all(&early).unwrap();
    for f in ["run.toml", "lvc-model.toml"] {
        std::fs::copy(reference.join(f), early.join(f)).unwrap();
    }
    let out = Command::new(BIN)
        .args(["-q", "resume", early.to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(all_rows(&early.join("part-0000-of-0001.h5")), want);
    // A part file of garbage.
    std::fs::write(
        early.join("part-0000-of-0001.h5"),
        b"not an HDF5 file at all",
    )
    .unwrap();
    let out = Command::new(BIN)
        .args(["resume", early.to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(String::from_utf8_lossy(&out.stderr).contains("computing slice 0/1 again"));
    assert_eq!(all_rows(&early.join("part-0000-of-0001.h5")), want);
    let kept = std::fs::read_dir(&early)
        .unwrap()
        .flatten()
        .any(|e| e.file_name().to_string_lossy().contains(".unreadable-"));
    assert!(kept, "the unreadable file must be kept aside");
    let _ = std::fs::remove_dir_all(&dir);
}
