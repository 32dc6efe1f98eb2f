//! HDF5 part files: exact round trips, truncation back to a checkpoint,
//! resuming, killed writers, merging, damaged files, self-description (units
//! and descriptions everywhere) and reading with h5py.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::{RwLock, RwLockReadGuard, RwLockWriteGuard};

use flipswarm::dynamics::EndReason;
use flipswarm::ensemble::h5::{
    merge, Counts, EnsembleError, PartReader, PartWriter, Phase, TrajectoryData, WriterState,
};
use flipswarm::ensemble::record::{
    Hop, PartMeta, RowDiagnostics, Status, StepRow, TrajectoryHeader, WarningRow,
};
use num_complex::Complex64;

const N_STATES: usize = 3;
const N_DOF: usize = 4;
/// Environment variable that turns `killed_writer_child` into the child process.
const CHILD_ENV: &str = "FLIPSWARM_H5_CHILD_PATH";

// ----------------------------------------------------------------------------
// Fixtures
// ----------------------------------------------------------------------------

/// Tests run on parallel threads; a child process inherits the descriptors
/// (and HDF5 file locks) of every file open at that moment. Tests that open
/// files hold this for reading, tests that start processes for writing.
static FORK: RwLock<()> = RwLock::new(());

fn files() -> RwLockReadGuard<'static, ()> {
    FORK.read().unwrap_or_else(|e| e.into_inner())
}

fn spawning() -> RwLockWriteGuard<'static, ()> {
    FORK.write().unwrap_or_else(|e| e.into_inner())
}

/// A fresh, empty directory for one test.
fn scratch(name: &str) -> PathBuf {
    let dir = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .join("ensemble_h5")
        .join(name);
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

fn meta(slice: (usize, usize), trajectories: Vec<usize>) -> PartMeta {
    PartMeta {
        config_toml:
            "[model]\nkind = \"tully_simple\"\n\n[run]\ntrajectories = 12\ntimestep_au = 0.5\n"
                .into(),
        program_version: "0.1.0".into(),
        created: "2024-05-01T12:00:00Z".into(),
        n_states: N_STATES,
        n_dof: N_DOF,
        masses: vec![2000.0, 1.5e4, 1.0e-300, 3.0e5 / 7.0], // invented; awkward bit patterns
        slice,
        trajectories,
        timestep_au: 0.5,
    }
}

/// Deterministic values with awkward bit patterns: random mantissas and
/// exponents, negative zero, subnormals.
struct Bits(u64);

impl Bits {
    fn next_u64(&mut self) -> u64 {
        // xorshift64*
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }

    fn f64(&mut self) -> f64 {
        let x = self.next_u64();
        match x % 16 {
            0 => -0.0,
            1 => f64::from_bits(x >> 20), // subnormal
            _ => {
                let v = f64::from_bits(x);
                if v.is_finite() {
                    v
                } else {
                    f64::from_bits(x & !(1 << 62))
                }
            }
        }
    }
}

fn header(index: usize) -> TrajectoryHeader {
    let mut b = Bits(0x9e37_79b9_7f4a_7c15 ^ index as u64);
    TrajectoryHeader {
        index,
        q0: (0..N_DOF).map(|_| b.f64()).collect(),
        v0: (0..N_DOF).map(|_| b.f64()).collect(),
        initial_state: index % N_STATES,
        seed: 0xdead_beef_0000 + index as u64,
    }
}

/// `n` rows of trajectory `index` starting at step `first`; `salt` changes the values.
fn rows(index: usize, first: u64, n: usize, salt: u64) -> Vec<StepRow> {
    let mut b = Bits(1 + index as u64 * 7919 + first * 104_729 + salt * 1_299_709);
    (0..n as u64)
        .map(|k| {
            let mut f = || b.f64();
            StepRow {
                step: first + k,
                time: 0.5 * (first + k) as f64,
                q: (0..N_DOF).map(|_| f()).collect(),
                v: (0..N_DOF).map(|_| f()).collect(),
                energies: (0..N_STATES).map(|_| f()).collect(),
                active: ((first + k) % N_STATES as u64) as u32,
                amplitudes: (0..N_STATES).map(|_| Complex64::new(f(), f())).collect(),
                kinetic: f(),
                potential: f(),
                total: -1.25 + 1e-9 * ((first + k) % 7) as f64,
            }
        })
        .collect()
}

fn hops(n: usize, first_step: u64) -> Vec<Hop> {
    let mut b = Bits(77 + first_step);
    (0..n as u64)
        .map(|k| Hop {
            step: first_step + 3 * k,
            time: 0.5 * (first_step + 3 * k) as f64,
            from: (k % 3) as usize,
            to: ((k + 1) % 3) as usize,
            accepted: k % 2 == 0,
            gap: b.f64(),
            kinetic_before: b.f64(),
            kinetic_after: b.f64(),
        })
        .collect()
}

/// Every f64 and integer of a row as bits, so −0.0 and 0.0 differ.
fn row_bits(r: &StepRow) -> Vec<u64> {
    let mut v = vec![
        r.step,
        r.time.to_bits(),
        u64::from(r.active),
        r.kinetic.to_bits(),
        r.potential.to_bits(),
        r.total.to_bits(),
    ];
    v.extend(
        r.q.iter()
            .chain(&r.v)
            .chain(&r.energies)
            .map(|x| x.to_bits()),
    );
    v.extend(
        r.amplitudes
            .iter()
            .flat_map(|z| [z.re.to_bits(), z.im.to_bits()]),
    );
    v
}

fn hop_bits(h: &Hop) -> Vec<u64> {
    vec![
        h.step,
        h.time.to_bits(),
        h.from as u64,
        h.to as u64,
        u64::from(h.accepted),
        h.gap.to_bits(),
        h.kinetic_before.to_bits(),
        h.kinetic_after.to_bits(),
    ]
}

fn assert_rows_exact(got: &[StepRow], want: &[StepRow]) {
    assert_eq!(got.len(), want.len(), "row count");
    for (k, (g, w)) in got.iter().zip(want).enumerate() {
        assert_eq!(row_bits(g), row_bits(w), "row {k} differs");
    }
}

fn assert_hops_exact(got: &[Hop], want: &[Hop]) {
    assert_eq!(got.len(), want.len(), "hop count");
    for (k, (g, w)) in got.iter().zip(want).enumerate() {
        assert_eq!(hop_bits(g), hop_bits(w), "hop {k} differs");
    }
}

/// Diagnostics of `n` rows of trajectory `index` (invented values): every
/// third row reports none (−1, NaN), the others iteration counts and <S²>.
fn diags(index: usize, n: usize) -> Vec<RowDiagnostics> {
    (0..n)
        .map(|k| {
            if k % 3 == 0 {
                RowDiagnostics::none(N_STATES)
            } else {
                RowDiagnostics {
                    iterations: (7 + k + index) as i32,
                    response_iterations: if k % 2 == 0 { -1 } else { (k % 11) as i32 },
                    spin_squared: (0..N_STATES)
                        .map(|s| {
                            if s == 1 {
                                f64::NAN
                            } else {
                                0.001 * k as f64 + s as f64 * 2.0
                            }
                        })
                        .collect(),
                }
            }
        })
        .collect()
}

/// A few warnings of trajectory `index`, with non-ASCII text.
fn warnings(index: usize) -> Vec<WarningRow> {
    (0..index % 3 + 1)
        .map(|k| WarningRow {
            step: 5 * k as u64 + 1,
            text: format!("solver stalled ({k}); ⟨S²⟩ = 2.1 for trajectory {index}"),
        })
        .collect()
}

fn assert_same_data(got: &TrajectoryData, want: &TrajectoryData) {
    assert_eq!(got.header, want.header);
    assert_rows_exact(&got.rows, &want.rows);
    assert_hops_exact(&got.hops, &want.hops);
    let bits = |d: &[RowDiagnostics]| d.iter().map(RowDiagnostics::bits).collect::<Vec<_>>();
    assert_eq!(
        bits(&got.diagnostics),
        bits(&want.diagnostics),
        "diagnostics differ"
    );
    assert_eq!(got.warnings, want.warnings, "warnings differ");
    assert_eq!((&got.status, got.phase), (&want.status, want.phase));
}

/// Writes a closed part holding `indices`, each with `n` rows (in two
/// batches) and a few hops, all finished; returns what was written.
fn write_part(
    path: &Path,
    slice: (usize, usize),
    indices: &[usize],
    n: usize,
) -> Vec<(TrajectoryHeader, Vec<StepRow>, Vec<Hop>)> {
    let mut w = PartWriter::create(path, &meta(slice, indices.to_vec())).unwrap();
    let mut out = Vec::new();
    for &i in indices {
        let h = header(i);
        w.begin(&h).unwrap();
        let r = rows(i, 0, n, 0);
        let hp = hops(i % 4 + 1, 1);
        let d = diags(i, n);
        w.append_all(i, &r[..n / 3], &d[..n / 3], &hp, &warnings(i))
            .unwrap();
        w.append_all(i, &r[n / 3..], &d[n / 3..], &[], &[]).unwrap();
        w.set_status(i, &Status::Finished(EndReason::TimeLimit))
            .unwrap();
        out.push((h, r, hp));
    }
    w.close().unwrap();
    out
}

fn message(e: EnsembleError) -> String {
    e.to_string()
}

// ----------------------------------------------------------------------------
// 1. Round trip
// ----------------------------------------------------------------------------

/// Shows that metadata, every row and hop, and every kind of status read back
/// exactly (bit for bit), with rows appended in uneven and empty batches and
/// trajectories interleaved; trajectories never begun have no group.
#[test]
fn round_trip_is_exact() {
    let _files = files();
    let dir = scratch("round_trip");
    let path = dir.join("part.h5");
    let m = meta((1, 3), vec![2, 5, 7, 11]);
    let mut w = PartWriter::create(&path, &m).unwrap();
    for i in [2, 5, 7] {
        w.begin(&header(i)).unwrap();
    }
    let mut expected: Vec<(usize, Vec<StepRow>, Vec<Hop>)> = vec![
        (2, vec![], vec![]),
        (5, vec![], vec![]),
        (7, vec![], vec![]),
    ];
    let batches = [3usize, 0, 17, 1, 300, 0, 44];
    let mut step = [0u64; 3];
    for (b, &n) in batches.iter().enumerate() {
        for (slot, (index, all_rows, all_hops)) in expected.iter_mut().enumerate() {
            let n = n + slot; // uneven across trajectories too
            let r = rows(*index, step[slot], n, b as u64);
            let h = if b % 2 == 0 {
                hops(b + slot, step[slot])
            } else {
                vec![]
            };
            w.append(*index, &r, &h).unwrap();
            step[slot] += n as u64;
            all_rows.extend(r);
            all_hops.extend(h);
            assert_eq!(
                w.counts(*index).unwrap(),
                (all_rows.len() as u64, all_hops.len() as u64)
            );
        }
    }
    w.set_status(2, &Status::Finished(EndReason::ExitHigh))
        .unwrap();
    let failure = Status::Failed {
        step: 42,
        reason: "total energy drifted by 3.1e-2 hartree (limit 1e-2)".into(),
    };
    w.set_status(5, &failure).unwrap();
    w.mark_stopped(7).unwrap();
    w.close().unwrap();

    let r = PartReader::open(&path).unwrap();
    assert_eq!(r.meta(), &m);
    assert_eq!(r.meta().masses[2].to_bits(), m.masses[2].to_bits());
    assert_eq!(r.writer_state(), WriterState::Closed);
    assert_eq!(r.trajectory_indices(), vec![2, 5, 7]);
    for (index, all_rows, all_hops) in &expected {
        let d = r.read(*index).unwrap();
        assert_eq!(d.header, header(*index));
        assert_eq!(
            d.header.q0.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
            header(*index)
                .q0
                .iter()
                .map(|x| x.to_bits())
                .collect::<Vec<_>>()
        );
        assert_rows_exact(&d.rows, all_rows);
        assert_hops_exact(&d.hops, all_hops);
        let s = r.summary(*index).unwrap();
        assert_eq!(
            (s.steps, s.hops),
            (all_rows.len() as u64, all_hops.len() as u64)
        );
        assert_eq!(
            s.last_time.map(f64::to_bits),
            all_rows.last().map(|x| x.time.to_bits())
        );
        assert_eq!(s.active_state, all_rows.last().map(|x| x.active));
        let e0 = all_rows[0].total;
        let drift = all_rows
            .iter()
            .map(|x| (x.total - e0).abs())
            .fold(0.0, f64::max);
        assert_eq!(s.max_energy_drift.to_bits(), drift.to_bits());
        assert!(s.max_energy_drift > 0.0);
    }
    let (d2, d5, d7) = (r.read(2).unwrap(), r.read(5).unwrap(), r.read(7).unwrap());
    assert_eq!(
        (d2.status, d2.phase),
        (Status::Finished(EndReason::ExitHigh), Phase::Finished)
    );
    assert_eq!(
        (d5.status.clone(), d5.phase),
        (failure.clone(), Phase::Failed)
    );
    assert_eq!((d7.status, d7.phase), (Status::Running, Phase::Stopped));
    assert_eq!(
        r.summary(5).unwrap().failure_reason.as_deref(),
        Some("total energy drifted by 3.1e-2 hartree (limit 1e-2)")
    );
    assert_eq!(r.summary(2).unwrap().failure_reason, None);
    let missing = message(r.read(11).unwrap_err());
    assert!(
        missing.contains("part.h5") && missing.contains("/trajectories/000011"),
        "{missing}"
    );
}

/// Shows that rows and hops that do not fit the file are refused before
/// anything is written, with messages naming the file and trajectory.
#[test]
fn bad_rows_are_refused_and_nothing_is_written() {
    let _files = files();
    let dir = scratch("bad_rows");
    let path = dir.join("part.h5");
    let mut w = PartWriter::create(&path, &meta((0, 1), vec![0, 1])).unwrap();
    w.begin(&header(0)).unwrap();
    let mut batch = rows(0, 0, 5, 0);
    batch[3].energies.pop();
    let e = message(w.append(0, &batch, &[]).unwrap_err());
    assert!(
        e.contains("part.h5")
            && e.contains("/trajectories/000000")
            && e.contains("row 3")
            && e.contains("energies"),
        "{e}"
    );
    let mut bad_hop = hops(1, 0);
    bad_hop[0].to = N_STATES;
    assert!(message(w.append(0, &rows(0, 0, 2, 0), &bad_hop).unwrap_err()).contains("hop 0"));
    assert_eq!(w.counts(0).unwrap(), (0, 0));
    assert!(message(w.append(1, &rows(1, 0, 1, 0), &[]).unwrap_err()).contains("begin it first"));
    assert!(message(w.begin(&header(9)).unwrap_err()).contains("not assigned to this part"));
    w.close().unwrap();
    let mut bad = meta((0, 1), vec![0]);
    bad.masses.pop();
    assert!(
        message(PartWriter::create(&dir.join("other.h5"), &bad).unwrap_err()).contains("masses")
    );
}

// ----------------------------------------------------------------------------
// 2. Truncate
// ----------------------------------------------------------------------------

/// Shows that truncating to a checkpoint discards exactly the later rows and
/// hops, and that rows appended afterwards follow the kept ones.
#[test]
fn truncate_discards_rows_after_a_checkpoint() {
    let _files = files();
    let dir = scratch("truncate");
    let path = dir.join("part.h5");
    let mut w = PartWriter::create(&path, &meta((0, 1), vec![3])).unwrap();
    w.begin(&header(3)).unwrap();
    let first = rows(3, 0, 100, 0);
    let first_hops = hops(6, 0);
    w.append(3, &first, &first_hops).unwrap();
    assert_eq!(w.counts(3).unwrap(), (100, 6));
    w.truncate(3, 60, 2).unwrap();
    assert_eq!(w.counts(3).unwrap(), (60, 2));
    let again = rows(3, 60, 40, 99);
    assert_ne!(
        row_bits(&again[0]),
        row_bits(&first[60]),
        "the new rows must differ from the discarded ones"
    );
    let again_hops = hops(3, 70);
    w.append(3, &again, &again_hops).unwrap();
    let e = message(w.truncate(3, 101, 0).unwrap_err());
    assert!(
        e.contains("cannot truncate to 101 rows") && e.contains("only 100"),
        "{e}"
    );
    w.close().unwrap();

    let d = PartReader::open(&path).unwrap().read(3).unwrap();
    let want: Vec<StepRow> = first[..60].iter().chain(&again).cloned().collect();
    assert_rows_exact(&d.rows, &want);
    let want_hops: Vec<Hop> = first_hops[..2].iter().chain(&again_hops).cloned().collect();
    assert_hops_exact(&d.hops, &want_hops);
}

// ----------------------------------------------------------------------------
// 3. Resume
// ----------------------------------------------------------------------------

/// Shows the resume path: a closed file reopened for writing keeps its data,
/// accepts the same header again (and refuses a different one), takes more
/// rows and closes again; `create` refuses to overwrite an existing file.
#[test]
fn open_existing_resumes_and_create_refuses_to_overwrite() {
    let _files = files();
    let dir = scratch("resume");
    let path = dir.join("part.h5");
    let m = meta((0, 2), vec![0, 4]);
    let mut w = PartWriter::create(&path, &m).unwrap();
    w.begin(&header(4)).unwrap();
    let a = rows(4, 0, 10, 0);
    w.append(4, &a, &hops(1, 2)).unwrap();
    w.mark_stopped(4).unwrap();
    w.close().unwrap();

    let (mut w, got) = PartWriter::open_existing(&path).unwrap();
    assert_eq!(got, m);
    assert_eq!(w.counts(4).unwrap(), (10, 1));
    let mut other = header(4);
    other.seed += 1;
    assert!(message(w.begin(&other).unwrap_err()).contains("different header"));
    w.begin(&header(4)).unwrap();
    let b = rows(4, 10, 5, 0);
    w.append(4, &b, &[]).unwrap();
    w.set_status(4, &Status::Finished(EndReason::ExitLow))
        .unwrap();
    w.close().unwrap();

    let r = PartReader::open(&path).unwrap();
    assert_eq!(r.writer_state(), WriterState::Closed);
    let d = r.read(4).unwrap();
    assert_rows_exact(&d.rows, &[a, b].concat());
    assert_hops_exact(&d.hops, &hops(1, 2));
    assert_eq!(d.status, Status::Finished(EndReason::ExitLow));
    drop(r);

    let before = std::fs::read(&path).unwrap();
    let e = PartWriter::create(&path, &m).unwrap_err();
    assert!(matches!(e, EnsembleError::Exists { .. }), "{e}");
    assert!(message(e).contains("part.h5"));
    assert_eq!(
        std::fs::read(&path).unwrap(),
        before,
        "the refused create must not touch the file"
    );
    let e = message(PartWriter::open_existing(&dir.join("absent.h5")).unwrap_err());
    assert!(e.contains("absent.h5") && e.contains("no such file"), "{e}");
}

// ----------------------------------------------------------------------------
// 4. Killed writers
// ----------------------------------------------------------------------------

/// Not a test by itself: the body of the child process started by
/// `killed_writer_is_detected`. Writes, flushes and aborts without closing.
#[test]
#[ignore = "child process of killed_writer_is_detected"]
fn killed_writer_child() {
    let path =
        PathBuf::from(std::env::var(CHILD_ENV).expect("run by killed_writer_is_detected only"));
    let mut w = PartWriter::create(&path, &meta((1, 2), vec![1, 3])).unwrap();
    w.begin(&header(1)).unwrap();
    w.append(1, &rows(1, 0, 50, 0), &hops(2, 0)).unwrap();
    w.flush().unwrap();
    std::process::abort();
}

/// Shows that a part whose writer was killed after a flush reads back with
/// `writer_state` "open" and its flushed rows, that `merge` refuses it naming
/// the file, and that reopening and closing it (the resume path) clears it.
#[test]
fn killed_writer_is_detected() {
    let dir = scratch("killed");
    let killed = dir.join("killed-part.h5");
    let guard = spawning();
    let status = Command::new(std::env::current_exe().unwrap())
        .args([
            "--ignored",
            "--exact",
            "killed_writer_child",
            "--test-threads=1",
        ])
        .env(CHILD_ENV, &killed)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .status()
        .unwrap();
    drop(guard);
    let _files = files();
    assert!(!status.success(), "the child must abort");
    assert!(killed.exists(), "the child did not write its file");

    let r = PartReader::open(&killed).unwrap();
    assert_eq!(r.writer_state(), WriterState::Open);
    assert_eq!(r.writer_state().as_str(), "open");
    let d = r.read(1).unwrap();
    assert_rows_exact(&d.rows, &rows(1, 0, 50, 0));
    assert_eq!((d.status, d.phase), (Status::Running, Phase::Running));
    drop(r);

    let good = dir.join("good-part.h5");
    write_part(&good, (0, 2), &[0, 2], 5);
    let out = dir.join("merged.h5");
    let e = merge(&[good.clone(), killed.clone()], &out).unwrap_err();
    assert!(matches!(e, EnsembleError::NotClosed { .. }), "{e}");
    let e = message(e);
    assert!(
        e.contains("killed-part.h5") && e.contains("writer_state"),
        "{e}"
    );
    assert!(!out.exists(), "a refused merge must not leave an output");

    // In-process variant: dropping a writer without close leaves "open" too.
    let dropped = dir.join("dropped.h5");
    let w = PartWriter::create(&dropped, &meta((0, 1), vec![0])).unwrap();
    drop(w);
    assert_eq!(
        PartReader::open(&dropped).unwrap().writer_state(),
        WriterState::Open
    );

    // Resume path: reopen, close cleanly; merge then accepts it.
    let (w, _) = PartWriter::open_existing(&killed).unwrap();
    w.close().unwrap();
    assert_eq!(
        PartReader::open(&killed).unwrap().writer_state(),
        WriterState::Closed
    );
    let report = merge(&[good, killed], &out).unwrap();
    assert_eq!((report.trajectories, report.rows), (3, 60));
}

// ----------------------------------------------------------------------------
// 5. Merge
// ----------------------------------------------------------------------------

/// Shows that two disjoint parts merge into a slice (0, 1) part holding
/// their union with identical data, and that merging refuses an existing
/// output, duplicate trajectories and parts of a different ensemble, naming
/// the index and both files.
#[test]
fn merge_copies_exactly_and_refuses_mismatches() {
    let _files = files();
    let dir = scratch("merge");
    let (a, b) = (dir.join("part-a.h5"), dir.join("part-b.h5"));
    write_part(&a, (0, 2), &[0, 2, 4], 40);
    // Part b: one finished, one failed, one stopped, one never begun.
    let mut w = PartWriter::create(&b, &meta((1, 2), vec![1, 3, 5, 7])).unwrap();
    for i in [1, 3, 5] {
        w.begin(&header(i)).unwrap();
        w.append(i, &rows(i, 0, 7 * i, 1), &hops(i, 0)).unwrap();
    }
    w.set_status(1, &Status::Finished(EndReason::ExitLow))
        .unwrap();
    w.set_status(
        3,
        &Status::Failed {
            step: 20,
            reason: "back end failed".into(),
        },
    )
    .unwrap();
    w.mark_stopped(5).unwrap();
    w.close().unwrap();

    let out = dir.join("merged.h5");
    let report = merge(&[a.clone(), b.clone()], &out).unwrap();
    assert_eq!((report.parts, report.trajectories), (2, 6));
    assert_eq!(report.rows, 3 * 40 + 7 * (1 + 3 + 5));
    assert_eq!(report.hops, (1 + 3 + 1) + (1 + 3 + 5));

    let (ra, rb, rm) = (
        PartReader::open(&a).unwrap(),
        PartReader::open(&b).unwrap(),
        PartReader::open(&out).unwrap(),
    );
    assert_eq!(rm.meta().slice, (0, 1));
    let created = rm.meta().created.as_bytes();
    assert!(
        created.len() == 20 && created[4] == b'-' && created[10] == b'T' && created[19] == b'Z',
        "{}",
        rm.meta().created
    );
    assert_eq!(rm.meta().trajectories, vec![0, 1, 2, 3, 4, 5, 7]);
    assert_eq!(rm.meta().config_toml, ra.meta().config_toml);
    assert_eq!(rm.writer_state(), WriterState::Closed);
    assert_eq!(rm.trajectory_indices(), vec![0, 1, 2, 3, 4, 5]);
    for (src, indices) in [(&ra, vec![0, 2, 4]), (&rb, vec![1, 3, 5])] {
        for i in indices {
            assert_same_data(&rm.read(i).unwrap(), &src.read(i).unwrap());
        }
    }
    assert_eq!(rm.read(5).unwrap().phase, Phase::Stopped);
    drop((ra, rb, rm));

    let e = merge(&[a.clone(), b.clone()], &out).unwrap_err();
    assert!(matches!(e, EnsembleError::Exists { .. }) && message(e).contains("merged.h5"));

    let dup = dir.join("part-dup.h5");
    write_part(&dup, (2, 3), &[2, 9], 3);
    let out2 = dir.join("merged-2.h5");
    let e = message(merge(&[a.clone(), dup], &out2).unwrap_err());
    assert!(
        e.contains("trajectory 2") && e.contains("part-a.h5") && e.contains("part-dup.h5"),
        "{e}"
    );
    assert!(!out2.exists());

    let other_cfg = dir.join("part-other-config.h5");
    let mut m = meta((1, 2), vec![1]);
    m.config_toml.push_str("seed = 3\n");
    PartWriter::create(&other_cfg, &m).unwrap().close().unwrap();
    let e = message(merge(&[a.clone(), other_cfg], &out2).unwrap_err());
    assert!(
        e.contains("part-a.h5") && e.contains("part-other-config.h5") && e.contains("config_toml"),
        "{e}"
    );

    let other_dof = dir.join("part-other-dof.h5");
    let mut m = meta((1, 2), vec![1]);
    m.n_dof = 2;
    m.masses.truncate(2);
    PartWriter::create(&other_dof, &m).unwrap().close().unwrap();
    let e = message(merge(&[a, other_dof], &out2).unwrap_err());
    assert!(
        e.contains("part-other-dof.h5") && e.contains("n_dof (4 vs 2)"),
        "{e}"
    );
    assert!(!out2.exists());
}

// ----------------------------------------------------------------------------
// 6. Damaged files
// ----------------------------------------------------------------------------

/// Opens and reads everything; the first error, if any.
fn read_everything(path: &Path) -> Result<Vec<TrajectoryData>, EnsembleError> {
    let r = PartReader::open(path)?;
    let mut out = Vec::new();
    for i in r.trajectory_indices() {
        r.summary(i)?;
        out.push(r.read(i)?);
    }
    Ok(out)
}

/// Shows that truncated files (cut at 50 %, 10 %, 0 bytes) and files with
/// damaged bytes give errors naming the file instead of panics or wrong data:
/// a flipped data block is caught by the checksum and reported with its
/// dataset, a flipped superblock at open; bytes flipped in the middle either
/// give an error or leave the data intact (unused space).
#[test]
fn damaged_files_give_errors() {
    let _files = files();
    let dir = scratch("damaged");
    let good = dir.join("good.h5");
    let written = write_part(&good, (0, 1), &[0, 1], 200);
    let bytes = std::fs::read(&good).unwrap();
    let original = read_everything(&good).unwrap();
    assert_eq!(original.len(), 2);

    for (name, len) in [
        ("cut-50.h5", bytes.len() / 2),
        ("cut-10.h5", bytes.len() / 10),
        ("cut-0.h5", 0),
    ] {
        let p = dir.join(name);
        std::fs::write(&p, &bytes[..len]).unwrap();
        let e = message(read_everything(&p).expect_err(name));
        assert!(e.contains(name), "{e}");
    }

    // A data block: find the stored bytes of a known coordinate and flip them.
    let needle = written[1].1[150].q[2].to_le_bytes();
    let at = bytes
        .windows(8)
        .position(|w| w == needle)
        .expect("the value is stored verbatim");
    let p = dir.join("flipped-data.h5");
    let mut damaged = bytes.clone();
    damaged[at + 3] ^= 0x5a;
    std::fs::write(&p, &damaged).unwrap();
    let e = message(read_everything(&p).expect_err("checksum must catch the flip"));
    assert!(
        e.contains("flipped-data.h5") && e.contains("/trajectories/000001/positions"),
        "{e}"
    );

    // The superblock (checksummed).
    let p = dir.join("flipped-superblock.h5");
    let mut damaged = bytes.clone();
    damaged[20] ^= 0xff;
    std::fs::write(&p, &damaged).unwrap();
    assert!(message(PartReader::open(&p).unwrap_err()).contains("flipped-superblock.h5"));

    // The middle of the file: an error, or (unused space) the same data.
    let p = dir.join("flipped-middle.h5");
    let mut damaged = bytes.clone();
    let mid = bytes.len() / 2;
    for b in &mut damaged[mid..mid + 64] {
        *b ^= 0xff;
    }
    std::fs::write(&p, &damaged).unwrap();
    match read_everything(&p) {
        Err(e) => assert!(message(e).contains("flipped-middle.h5")),
        Ok(data) => {
            for (g, w) in data.iter().zip(&original) {
                assert_same_data(g, w);
            }
        }
    }

    let not_hdf5 = dir.join("notes.h5");
    std::fs::write(&not_hdf5, b"this is not an HDF5 file\n").unwrap();
    assert!(message(PartReader::open(&not_hdf5).unwrap_err()).contains("notes.h5"));
}

// ----------------------------------------------------------------------------
// 7. Self-description
// ----------------------------------------------------------------------------

/// Visits every group below `g`, calling `f` on every dataset.
fn walk(g: &hdf5::Group, f: &mut dyn FnMut(&hdf5::Dataset)) {
    for ds in g.datasets().unwrap() {
        f(&ds);
    }
    for sub in g.groups().unwrap() {
        walk(&sub, f);
    }
}

fn str_attr(loc: &hdf5::Location, name: &str) -> Option<String> {
    let a = loc.attr(name).ok()?;
    a.read_scalar::<hdf5::types::VarLenUnicode>()
        .ok()
        .map(|s| s.as_str().to_string())
}

fn unit_of_seen(seen: &[(String, String)], n: &str) -> String {
    seen.iter()
        .find(|(name, _)| name == n)
        .map(|(_, u)| u.clone())
        .unwrap_or_else(|| panic!("{n} missing"))
}

/// Shows that every dataset of a written file (walked, not listed by hand)
/// has non-empty `units` and `description` string attributes, and that the
/// root names the format and its units.
#[test]
fn every_dataset_has_units_and_description() {
    let _files = files();
    let dir = scratch("described");
    let path = dir.join("part.h5");
    write_part(&path, (0, 1), &[0, 1], 10);
    let file = hdf5::File::open(&path).unwrap();
    let mut seen = Vec::new();
    walk(&file, &mut |ds| {
        let name = ds.name();
        let units = str_attr(ds, "units").unwrap_or_else(|| panic!("{name}: no units"));
        let description =
            str_attr(ds, "description").unwrap_or_else(|| panic!("{name}: no description"));
        assert!(
            !units.is_empty() && description.len() > 10,
            "{name}: units {units:?}, description {description:?}"
        );
        // Every trajectory group is a copy of one built once per writer:
        // each copy keeps the chunking and the checksum filter.
        if name.starts_with("/trajectories/") && !name.ends_with("warnings/text") {
            assert!(ds.chunk().is_some(), "{name}: not chunked");
            assert!(
                ds.filters().contains(&hdf5::filters::Filter::Fletcher32),
                "{name}: no Fletcher-32 checksum ({:?})",
                ds.filters()
            );
        }
        seen.push((name, units));
    });
    // 2 at the root; per trajectory 2 initial + 10 per-step + 3 diagnostics
    // + 8 hop + 2 warning datasets.
    assert_eq!(seen.len(), 2 + 2 * (2 + 10 + 3 + 8 + 2), "{seen:?}");
    assert_eq!(
        unit_of_seen(&seen, "/trajectories/000001/spin_squared"),
        "hbar^2"
    );
    assert_eq!(
        unit_of_seen(&seen, "/trajectories/000001/solver_iterations"),
        "1"
    );
    let unit_of = |n: &str| {
        seen.iter()
            .find(|(name, _)| name == n)
            .map(|(_, u)| u.clone())
            .unwrap()
    };
    assert_eq!(unit_of("/trajectories/000001/energies"), "hartree");
    assert_eq!(unit_of("/trajectories/000001/time"), "a.u. of time");
    assert_eq!(unit_of("/masses"), "electron masses");
    assert!(unit_of("/trajectories/000000/positions").starts_with("bohr"));
    assert_eq!(
        str_attr(&file, "format").as_deref(),
        Some("flipswarm-ensemble")
    );
    assert!(str_attr(&file, "units_convention")
        .unwrap()
        .contains("hartree"));
    assert_eq!(str_attr(&file, "writer_state").as_deref(), Some("closed"));
}

// ----------------------------------------------------------------------------
// 8. h5py
// ----------------------------------------------------------------------------

/// 64-bit FNV-1a over little-endian bytes (the Python script computes the
/// same). Offset basis and prime: the published FNV parameters (common practice).
fn fnv1a(values: impl IntoIterator<Item = [u8; 8]>) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for bytes in values {
        for b in bytes {
            h ^= u64::from(b);
            h = h.wrapping_mul(0x0000_0100_0000_01b3);
        }
    }
    h
}

/// Shows that h5py reads a part file without our code: the script checks
/// root attributes, dtypes (float64, complex128, uint32, uint64, uint8),
/// shapes and units, and prints checksums of one trajectory's raw bytes and
/// its last row, which must equal what was written.
#[test]
fn python_h5py_reads_the_file() {
    let dir = scratch("python");
    let path = dir.join("part.h5");
    let _guard = spawning();
    let written = write_part(&path, (0, 1), &[3, 8], 37);
    let (h, r, hp) = &written[1];
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/python/read_part.py");
    let out = Command::new("python3")
        .arg(&script)
        .arg(&path)
        .arg("8")
        .output()
        .unwrap_or_else(|e| {
            panic!("cannot run python3 ({e}): install Python 3 with h5py (pip install h5py numpy)")
        });
    let stderr = String::from_utf8_lossy(&out.stderr);
    if out.status.code() == Some(3) {
        panic!("h5py is not importable: install it with `pip install h5py numpy` ({stderr})");
    }
    assert!(out.status.success(), "read_part.py failed:\n{stderr}");
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();

    assert_eq!(v["n_states"], N_STATES);
    assert_eq!(v["n_dof"], N_DOF);
    assert_eq!(v["trajectories"], serde_json::json!([3, 8]));
    assert_eq!(v["status"], "finished");
    assert_eq!(v["end_reason"], "time_limit");
    assert_eq!(v["seed"], h.seed);
    assert_eq!(v["steps"], r.len());
    assert_eq!(v["hops"], hp.len());
    let f64s = |f: &dyn Fn(&StepRow) -> Vec<f64>| fnv1a(r.iter().flat_map(f).map(f64::to_le_bytes));
    let checks = [
        ("time", f64s(&|x| vec![x.time])),
        ("positions", f64s(&|x| x.q.clone())),
        ("velocities", f64s(&|x| x.v.clone())),
        ("energies", f64s(&|x| x.energies.clone())),
        (
            "amplitudes",
            f64s(&|x| x.amplitudes.iter().flat_map(|z| [z.re, z.im]).collect()),
        ),
        ("total_energy", f64s(&|x| vec![x.total])),
        ("step", fnv1a(r.iter().map(|x| x.step.to_le_bytes()))),
        (
            "hops/energy_gap",
            fnv1a(hp.iter().map(|x| x.gap.to_le_bytes())),
        ),
    ];
    for (name, want) in checks {
        assert_eq!(
            v["fnv1a"][name].as_str(),
            Some(format!("{want:016x}").as_str()),
            "checksum of {name}"
        );
    }
    let last = r.last().unwrap();
    let floats = |key: &str| {
        v[key]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap().to_bits())
            .collect::<Vec<_>>()
    };
    assert_eq!(
        floats("last_positions"),
        last.q.iter().map(|x| x.to_bits()).collect::<Vec<_>>()
    );
    let amps: Vec<u64> = last
        .amplitudes
        .iter()
        .flat_map(|z| [z.re.to_bits(), z.im.to_bits()])
        .collect();
    assert_eq!(floats("last_amplitudes_re_im"), amps);
    assert_eq!(
        v["active_state"],
        serde_json::json!(r.iter().map(|x| x.active).collect::<Vec<_>>())
    );
    assert_eq!(
        v["accepted"],
        serde_json::json!(hp.iter().map(|x| u8::from(x.accepted)).collect::<Vec<_>>())
    );
    // The diagnostics datasets as h5py sees them.
    let d = diags(8, r.len());
    assert_eq!(
        v["solver_iterations"],
        serde_json::json!(d.iter().map(|x| x.iterations).collect::<Vec<_>>())
    );
    let nans: usize = d
        .iter()
        .map(|x| x.spin_squared.iter().filter(|s| s.is_nan()).count())
        .sum();
    assert_eq!(v["spin_squared_nan"], nans);
    let w: Vec<serde_json::Value> = warnings(8)
        .iter()
        .map(|x| serde_json::json!([x.step, x.text]))
        .collect();
    assert_eq!(v["warnings"], serde_json::Value::Array(w));
}

/// Shows that back-end diagnostics and warnings round-trip exactly through
/// append, truncation to a checkpoint and prefix reading, and that rows
/// appended without diagnostics read back as "none" (−1, NaN). Our own
/// format: no outside source.
#[test]
fn diagnostics_round_trip_truncate_and_prefix() {
    let _guard = files();
    let path = scratch("diagnostics").join("part.h5");
    let mut w = PartWriter::create(&path, &meta((0, 1), vec![2])).unwrap();
    w.begin(&header(2)).unwrap();
    let (r, d, wr) = (rows(2, 0, 40, 3), diags(2, 40), warnings(2));
    w.append_all(2, &r[..25], &d[..25], &[], &wr[..1]).unwrap();
    w.append_all(2, &r[25..], &d[25..], &[], &wr[1..]).unwrap();
    assert_eq!(
        w.all_counts(2).unwrap(),
        Counts {
            rows: 40,
            hops: 0,
            warnings: wr.len() as u64
        }
    );
    // Mismatched diagnostics are refused before anything is written.
    let e = message(
        w.append_all(2, &rows(2, 40, 2, 0), &d[..1], &[], &[])
            .unwrap_err(),
    );
    assert!(e.contains("1 diagnostics for 2 rows"), "{e}");
    let mut bad = diags(2, 2);
    bad[1].spin_squared.pop();
    let e = message(
        w.append_all(2, &rows(2, 40, 2, 0), &bad, &[], &[])
            .unwrap_err(),
    );
    assert!(e.contains("<S^2> values"), "{e}");
    w.truncate_all(
        2,
        Counts {
            rows: 30,
            hops: 0,
            warnings: 1,
        },
    )
    .unwrap();
    w.append(2, &rows(2, 30, 5, 9), &[]).unwrap();
    w.set_status(2, &Status::Finished(EndReason::TimeLimit))
        .unwrap();
    w.close().unwrap();
    let reader = PartReader::open(&path).unwrap();
    let data = reader.read(2).unwrap();
    let mut want_d = d[..30].to_vec();
    want_d.extend((0..5).map(|_| RowDiagnostics::none(N_STATES)));
    let bits = |d: &[RowDiagnostics]| d.iter().map(RowDiagnostics::bits).collect::<Vec<_>>();
    assert_eq!(bits(&data.diagnostics), bits(&want_d));
    assert_eq!(data.warnings, wr[..1].to_vec());
    let prefix = reader
        .read_prefix_all(
            2,
            Counts {
                rows: 12,
                hops: 0,
                warnings: 1,
            },
        )
        .unwrap();
    assert_eq!(bits(&prefix.diagnostics), bits(&d[..12]));
    assert_eq!(prefix.warnings, wr[..1].to_vec());
}

/// A part file open for writing in this process is not inherited by a
/// program this process starts (its descriptor is close-on-exec), so the
/// child cannot hold the writer's flock(2) lock after the writer closes.
/// Source: POSIX `FD_CLOEXEC` semantics; the child lists its own open files
/// through /proc/self/fd.
#[test]
fn part_files_open_for_writing_are_not_inherited_by_children() {
    let _files = files();
    let dir = scratch("cloexec");
    let path = dir.join("part.h5");
    let w = PartWriter::create(&path, &meta((0, 1), vec![0])).unwrap();
    let listing = |p: &Path| {
        let out = Command::new("sh")
            .arg("-c")
            .arg("for f in /proc/self/fd/*; do readlink \"$f\"; done")
            .output()
            .unwrap();
        let text = String::from_utf8_lossy(&out.stdout).to_string();
        let target = p.canonicalize().unwrap();
        text.lines().any(|l| Path::new(l) == target)
    };
    assert!(!listing(&path), "a child inherited the writer's descriptor");
    drop(w);
    let (w, _) = PartWriter::open_existing(&path).unwrap();
    assert!(
        !listing(&path),
        "a child inherited the reopened writer's descriptor"
    );
    drop(w);
    // The check itself can see an inherited file: one opened without the flag.
    let plain = std::fs::File::open(&path).unwrap();
    let fd = std::os::fd::AsRawFd::as_raw_fd(&plain);
    // SAFETY: clears close-on-exec on our own open descriptor.
    unsafe { libc::fcntl(fd, libc::F_SETFD, 0) };
    assert!(
        listing(&path),
        "the listing cannot see inherited descriptors"
    );
}
