//! The HDF5 readers on damaged files: a valid part file (two trajectories
//! with rows, hops, diagnostics and warnings) and a valid initial-conditions
//! file are written once to a temporary directory; each input flips bits
//! and/or truncates a copy, which is then read completely (`PartReader`:
//! open, summaries, read, read_prefix; `InitialConditions::read`).
//!
//! Input: byte 0 chooses the file (even: part, odd: initial conditions) and
//! whether to truncate; bytes 1–4 the truncation point; then (offset u32,
//! xor u8) pairs.
#![no_main]
use flipswarm::ensemble::h5::{PartReader, PartWriter};
use flipswarm::ensemble::record::{Hop, PartMeta, RowDiagnostics, Status, StepRow, TrajectoryHeader, WarningRow};
use flipswarm::dynamics::EndReason;
use libfuzzer_sys::fuzz_target;
use num_complex::Complex64;
use std::path::PathBuf;
use std::sync::OnceLock;

struct Files {
    dir: PathBuf,
    part: Vec<u8>,
    ics: Option<Vec<u8>>,
}

fn files() -> &'static Files {
    static F: OnceLock<Files> = OnceLock::new();
    F.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("flipswarm-fuzz-h5-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("valid.h5");
        let (n_dof, n_states) = (2, 3);
        let meta = PartMeta {
            config_toml: "title = \"fuzz\"\n".into(),
            program_version: "fuzz".into(),
            created: "2026-01-01T00:00:00Z".into(),
            n_states,
            n_dof,
            masses: vec![1.0, 2.0],
            slice: (0, 1),
            trajectories: vec![0, 1, 2],
            timestep_au: 0.5,
        };
        let mut w = PartWriter::create(&path, &meta).unwrap();
        for i in 0..2usize {
            w.begin(&TrajectoryHeader { index: i, q0: vec![0.1, 0.2], v0: vec![0.0, 0.01], initial_state: 1, seed: 7 }).unwrap();
            let rows: Vec<StepRow> = (0..20u64)
                .map(|k| StepRow {
                    step: k,
                    time: k as f64 * 0.5,
                    q: vec![k as f64, -(k as f64)],
                    v: vec![0.1, 0.2],
                    energies: vec![-1.0, -0.5, 0.0],
                    active: (k % 3) as u32,
                    amplitudes: vec![Complex64::new(0.5, 0.1); 3],
                    kinetic: 0.1,
                    potential: -0.5,
                    total: -0.4,
                })
                .collect();
            let diags: Vec<RowDiagnostics> = (0..20).map(|k| RowDiagnostics { iterations: k, response_iterations: -1, spin_squared: vec![0.0, 2.0, f64::NAN] }).collect();
            let hops = vec![Hop { step: 3, time: 1.5, from: 1, to: 0, accepted: true, gap: -0.5, kinetic_before: 0.1, kinetic_after: 0.6 }];
            let warns = vec![WarningRow { step: 4, text: "a warning".into() }];
            w.append_all(i, &rows, &diags, &hops, &warns).unwrap();
            if i == 0 {
                w.set_status(i, &Status::Finished(EndReason::TimeLimit)).unwrap();
            }
        }
        w.close().unwrap();
        let part = std::fs::read(&path).unwrap();
        let ics = std::env::var("FUZZ_INITIAL_CONDITIONS").ok().and_then(|p| std::fs::read(p).ok());
        Files { dir, part, ics }
    })
}

fuzz_target!(|data: &[u8]| {
    let f = files();
    if data.len() < 5 {
        return;
    }
    let original = match (data[0] % 2, &f.ics) {
        (1, Some(ics)) => ics,
        _ => &f.part,
    };
    let mut bytes = original.clone();
    for pair in data[5..].chunks_exact(5) {
        let off = u32::from_le_bytes(pair[..4].try_into().unwrap()) as usize % bytes.len();
        bytes[off] ^= pair[4].max(1);
    }
    if data[0] & 2 != 0 {
        let cut = u32::from_le_bytes(data[1..5].try_into().unwrap()) as usize % (bytes.len() + 1);
        bytes.truncate(cut);
    }
    let path = f.dir.join("damaged.h5");
    std::fs::write(&path, &bytes).unwrap();
    if std::ptr::eq(original, &f.part) {
        if let Ok(r) = PartReader::open(&path) {
            let _ = r.writer_state();
            for i in r.trajectory_indices() {
                let _ = r.summary(i);
                let _ = r.status(i);
                let _ = r.read(i);
                let _ = r.read_prefix(i, 5, 1);
            }
        }
    } else {
        let _ = flipswarm::sampling::files::InitialConditions::read(&path);
    }
});
