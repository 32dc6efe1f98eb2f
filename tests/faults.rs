//! Faults that must never lose or corrupt data: back-end diagnostics and
//! warnings recorded per step, non-finite numbers from a back end (a typed
//! failure of that trajectory with its step, nothing non-finite stored), a
//! write error in the middle of a run (the disk-full case, injected through
//! `FLIPSWARM_INJECT_WRITE_FAILURE`) that stops the run resumably, and the
//! disk estimate made before a run. References: the project's exact-restart
//! design (an uninterrupted run of the same ensemble; no outside source) and
//! the diagnostics the test back end itself reports (recomputed here from
//! the stored geometry).

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Arc;

use flipswarm::config::{load_str, RunConfig};
use flipswarm::dynamics::Status;
use flipswarm::electronic::{
    Backend, BackendError, BackendInfo, Diagnostics, Request, Results, Snapshot,
};
use flipswarm::ensemble::h5::{
    Counts, PartReader, PartWriter, TrajectoryData, WriterState, INJECT_WRITE_FAILURE,
};
use flipswarm::ensemble::record::RowDiagnostics;
use flipswarm::ensemble::runner;
use flipswarm::swarm;

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");

/// A made-up two-mode, three-state LVC model with a cone (our own scenario).
const MODEL: &str = "frequencies_ev = [0.10, 0.15]\nvertical_ev = [0.0, 4.0, 4.3]\n\
[[gradient]]\nstate = 1\nmode = 0\nvalue_ev = -0.12\n[[gradient]]\nstate = 2\nmode = 0\nvalue_ev = 0.12\n\
[[coupling]]\nstates = [1, 2]\nmode = 1\nvalue_ev = 0.08\n[[coupling]]\nstates = [0, 1]\nmode = 1\nvalue_ev = 0.01\n";

fn ensemble(trajectories: usize, duration_fs: f64, record_every: u64) -> String {
    format!(
        "title = \"fault test\"\n[model]\nkind = \"lvc\"\nfile = \"model.toml\"\n[start]\nsampling = \"wigner\"\nstate = 2\n\
[dynamics]\ntimestep_fs = 0.05\nduration_fs = {duration_fs}\ndecoherence = \"energy-based\"\n\
[output]\nrecord_every_steps = {record_every}\ncheckpoint_every_steps = 40\n[swarm]\ntrajectories = {trajectories}\nseed = 4242\n"
    )
}

struct Scratch(PathBuf);

impl Scratch {
    fn new(name: &str, trajectories: usize, duration_fs: f64, record_every: u64) -> Self {
        static N: AtomicUsize = AtomicUsize::new(0);
        let dir = std::env::temp_dir().join(format!(
            "flipswarm-faults-{}-{name}-{}",
            std::process::id(),
            N.fetch_add(1, Ordering::Relaxed)
        ));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::write(dir.join("model.toml"), MODEL).unwrap();
        std::fs::write(
            dir.join("ens.toml"),
            ensemble(trajectories, duration_fs, record_every),
        )
        .unwrap();
        Self(dir)
    }
    fn cfg(&self) -> RunConfig {
        load_str(
            &std::fs::read_to_string(self.0.join("ens.toml")).unwrap(),
            "ens.toml",
            &self.0,
            &[],
        )
        .unwrap()
    }
    fn ens(&self) -> String {
        self.0.join("ens.toml").to_str().unwrap().to_string()
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// The tests of this file run one at a time: HDF5 locks files with
/// flock(2), and a child process spawned by one test inherits the
/// descriptors another test has open in this process, keeping that file
/// locked until the child exits.
fn serial() -> std::sync::MutexGuard<'static, ()> {
    static LOCK: std::sync::Mutex<()> = std::sync::Mutex::new(());
    LOCK.lock().unwrap_or_else(|e| e.into_inner())
}

fn part(dir: &Path) -> PathBuf {
    dir.join(runner::part_name(0, 1))
}

/// The diagnostics the test back end reports at geometry `q` (invented
/// numbers, a pure function of the coordinates so exact restart holds):
/// "SCF" iterations 1–13 from the coordinates' bits, "response" iterations
/// only for odd counts, <S²> per state with state 1 unavailable (NaN), and a
/// warning whenever the count is 7.
fn diagnostics_at(q: &[f64], n_states: usize) -> Diagnostics {
    let h = q.iter().fold(0xcbf2_9ce4_8422_2325u64, |h, x| {
        (h ^ x.to_bits()).wrapping_mul(0x0100_0000_01b3)
    });
    let it = (h % 13) as u32 + 1;
    Diagnostics {
        iterations: Some(it),
        response_iterations: (it % 2 == 1).then_some(3 * it),
        spin_squared: Some(
            (0..n_states)
                .map(|k| {
                    if k == 1 {
                        f64::NAN
                    } else {
                        0.5 * k as f64 + 1e-3 * it as f64
                    }
                })
                .collect(),
        ),
        warnings: if it == 7 {
            vec![format!(
                "slow convergence: {it} iterations at q0 = {:.6}",
                q[0]
            )]
        } else {
            vec![]
        },
    }
}

/// Wraps a model back end and adds [`diagnostics_at`].
struct Diagnosed {
    inner: Box<dyn Backend>,
    results: Results,
}

impl Backend for Diagnosed {
    fn info(&self) -> BackendInfo {
        self.inner.info()
    }
    fn compute(&mut self, q: &[f64], request: &Request) -> Result<&Results, BackendError> {
        self.results = self.inner.compute(q, request)?.clone();
        self.results.diagnostics = diagnostics_at(q, self.results.energies.len());
        Ok(&self.results)
    }
    fn snapshot(&self) -> Snapshot {
        self.inner.snapshot()
    }
    fn restore(&mut self, s: &Snapshot) -> Result<(), BackendError> {
        self.inner.restore(s)
    }
}

fn run_in_process(
    cfg: &RunConfig,
    dir: &Path,
    factory: &runner::BackendFactory,
) -> runner::RunReport {
    let opts = runner::Options {
        threads: 2,
        stop: Arc::new(AtomicBool::new(false)),
        factory,
        progress_bar: false,
    };
    runner::start(cfg, dir, (0, 1), &opts).unwrap()
}

fn read_all(p: &Path) -> Vec<TrajectoryData> {
    let r = PartReader::open(p).unwrap();
    r.trajectory_indices()
        .into_iter()
        .map(|i| r.read(i).unwrap())
        .collect()
}

/// Shows that every recorded row carries exactly the diagnostics the back
/// end reported at that row's geometry (iterations, −1 for "none", <S²>
/// with NaN for "not available"), and that warnings are kept for every
/// step — also for the steps a coarser `record_every` does not record.
#[test]
fn backend_diagnostics_and_warnings_are_recorded_per_step() {
    let _serial = serial();
    let s = Scratch::new("diag", 4, 40.0, 1);
    let cfg = s.cfg();
    let model = cfg.model.clone();
    let factory = move |_: usize| -> Box<dyn Backend> {
        Box::new(Diagnosed {
            inner: swarm::make_backend(&model),
            results: Results::default(),
        })
    };
    let dir = s.0.join("every");
    let report = run_in_process(&cfg, &dir, &factory);
    assert_eq!(report.finished, 4);
    let all = read_all(&part(&dir));
    let mut warned_steps = 0;
    for t in &all {
        assert_eq!(t.diagnostics.len(), t.rows.len());
        for (row, d) in t.rows.iter().zip(&t.diagnostics) {
            let want = RowDiagnostics::from_backend(&diagnostics_at(&row.q, 3), 3);
            assert_eq!(
                d.bits(),
                want.bits(),
                "trajectory {} step {}",
                t.header.index,
                row.step
            );
            assert!(d.iterations >= 1 && d.iterations <= 13);
            assert_eq!(
                d.response_iterations == -1,
                d.iterations % 2 == 0,
                "−1 exactly when the back end reports none"
            );
            assert!(d.spin_squared[1].is_nan() && d.spin_squared[0].is_finite());
        }
        // With a row at every step, the warnings are exactly the rows whose geometry warns.
        let want: Vec<u64> = t
            .rows
            .iter()
            .filter(|r| !diagnostics_at(&r.q, 3).warnings.is_empty())
            .map(|r| r.step)
            .collect();
        let got: Vec<u64> = t.warnings.iter().map(|w| w.step).collect();
        assert_eq!(got, want, "trajectory {} warning steps", t.header.index);
        warned_steps += got.len();
    }
    assert!(warned_steps > 0, "the scenario must produce warnings");
    // Every 7th row only: the same trajectories, the same warnings (every step's).
    let s7 = Scratch::new("diag7", 4, 40.0, 7);
    let cfg7 = s7.cfg();
    let dir7 = s7.0.join("sparse");
    run_in_process(&cfg7, &dir7, &factory);
    let sparse = read_all(&part(&dir7));
    for (a, b) in sparse.iter().zip(&all) {
        assert_eq!(a.warnings, b.warnings, "trajectory {}", a.header.index);
        assert!(a.rows.len() < b.rows.len() / 5);
    }
}

/// A back end that returns a bad number at step `at` (its call with
/// overlaps for that step; 0 = the call at the initial geometry).
struct Poison {
    inner: Box<dyn Backend>,
    steps: usize,
    first: bool,
    at: usize,
    what: &'static str,
    results: Results,
}

impl Backend for Poison {
    fn info(&self) -> BackendInfo {
        self.inner.info()
    }
    fn compute(&mut self, q: &[f64], request: &Request) -> Result<&Results, BackendError> {
        let step_call = request.overlaps;
        if step_call {
            self.steps += 1;
        }
        if self.what == "no-couplings" {
            self.results = self.inner.compute(q, request)?.clone();
            if request.couplings {
                self.results.couplings = None;
            }
            return Ok(&self.results);
        }
        let hit = if self.at == 0 {
            std::mem::replace(&mut self.first, false)
        } else {
            step_call && self.steps == self.at
        };
        self.results = self.inner.compute(q, request)?.clone();
        if hit {
            match self.what {
                "gradient-nan" => self.results.gradients[0].1[1] = f64::NAN,
                "gradient-inf" => self.results.gradients[0].1[0] = f64::NEG_INFINITY,
                "energy-inf" => self.results.energies[2] = f64::INFINITY,
                "gradient-huge" => self.results.gradients[0].1[0] = f64::MAX,
                // State 2 leaves the tracked space: its overlap column keeps
                // 20 % of its norm (an intruder state took the rest).
                "overlap-lost" => {
                    let s = self.results.overlaps.as_mut().expect("overlaps requested");
                    s.column_mut(2).scale_mut(0.2);
                }
                _ => unreachable!(),
            }
        }
        Ok(&self.results)
    }
    fn snapshot(&self) -> Snapshot {
        self.inner.snapshot()
    }
    fn restore(&mut self, s: &Snapshot) -> Result<(), BackendError> {
        self.inner.restore(s)
    }
}

/// Back ends of the ensemble's model; trajectory `victim` gets a [`Poison`]
/// wrapper doing `what` at step call `at`.
fn poisoned(
    model: flipswarm::config::ModelSpec,
    victim: usize,
    at: usize,
    what: &'static str,
) -> impl Fn(usize) -> Box<dyn Backend> + Send + Sync {
    move |i: usize| -> Box<dyn Backend> {
        let inner = swarm::make_backend(&model);
        if i == victim {
            Box::new(Poison {
                inner,
                steps: 0,
                first: true,
                at,
                what,
                results: Results::default(),
            })
        } else {
            inner
        }
    }
}

/// Numerical faults: NaN or infinite gradients and energies (a finite
/// gradient so large that the velocities overflow, and an overlap matrix
/// whose |det| says a tracked state left the space) fail exactly that
/// trajectory, typed as `Status::Failed` with the last good step and a
/// reason naming the bad step; every stored number stays finite; the call
/// at the initial geometry fails at step 0. The others finish.
#[test]
fn non_finite_numbers_fail_the_trajectory_with_its_step() {
    let _serial = serial();
    for (what, at, step, needle) in [
        ("gradient-nan", 20, 19, "gradient component 1 = NaN"),
        ("gradient-inf", 10, 9, "gradient component 0 = -inf"),
        ("energy-inf", 30, 29, "energy of state 2 = inf"),
        ("gradient-huge", 15, 14, "non-finite velocity 0"),
        (
            "overlap-lost",
            25,
            24,
            "state tracking lost: |det| of the overlap between steps is 0.200",
        ),
        ("gradient-nan", 0, 0, "initial geometry"),
    ] {
        let s = Scratch::new("poison", 3, 10.0, 1);
        let cfg = s.cfg();
        let model = cfg.model.clone();
        let factory = poisoned(model, 2, at, what);
        let dir = s.0.join("run");
        let report = run_in_process(&cfg, &dir, &factory);
        assert_eq!((report.finished, report.failed), (2, 1), "{what}");
        let data = PartReader::open(&part(&dir)).unwrap().read(2).unwrap();
        match &data.status {
            Status::Failed { step: got, reason } => {
                assert_eq!(*got, step, "{what}: {reason}");
                assert!(reason.contains(needle), "{what}: {reason}");
                if step > 0 {
                    assert!(
                        reason.contains(&format!("step {}", step + 1)),
                        "{what}: {reason}"
                    );
                }
            }
            other => panic!("{what}: status {other:?}"),
        }
        for row in &data.rows {
            let all = row.q.iter().chain(&row.v).chain(&row.energies).chain([
                &row.kinetic,
                &row.potential,
                &row.total,
            ]);
            assert!(
                all.copied().all(f64::is_finite),
                "{what}: non-finite value stored at step {}",
                row.step
            );
        }
        assert_eq!(
            data.rows.last().map(|r| r.step),
            if step > 0 { Some(step) } else { None },
            "{what}"
        );
    }
}

/// A back end that answers a hop attempt without the coupling vectors it
/// was asked for: that trajectory fails at the hop's step with a message
/// naming the hop (formerly a panic of the engine); the others finish.
#[test]
fn missing_coupling_vectors_at_a_hop_fail_the_trajectory() {
    let _serial = serial();
    let s = Scratch::new("nocouplings", 3, 100.0, 10);
    let cfg = s.cfg();
    let model = cfg.model.clone();
    let factory = poisoned(model, 1, 0, "no-couplings");
    let dir = s.0.join("run");
    let report = run_in_process(&cfg, &dir, &factory);
    assert_eq!((report.finished, report.failed), (2, 1));
    let data = PartReader::open(&part(&dir)).unwrap().read(1).unwrap();
    let Status::Failed { step, reason } = &data.status else {
        panic!("status {:?}", data.status)
    };
    assert!(
        reason.contains("did not return the coupling vectors requested for a hop")
            && reason.contains(&format!("at step {step}")),
        "{reason}"
    );
    assert!(data.hops.is_empty() && *step > 0, "{reason}");
}

fn spawn_run(args: &[&str], inject: Option<u64>) -> (Option<i32>, String) {
    let mut c = Command::new(BIN);
    c.args(args);
    match inject {
        Some(n) => c.env(INJECT_WRITE_FAILURE, n.to_string()),
        None => c.env_remove(INJECT_WRITE_FAILURE),
    };
    let out = c.output().expect("start flipswarm");
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn assert_identical(got: &Path, want: &Path) {
    let (g, w) = (read_all(got), read_all(want));
    assert_eq!(g.len(), w.len());
    for (a, b) in g.iter().zip(&w) {
        let rows = |t: &TrajectoryData| -> Vec<Vec<u64>> {
            t.rows
                .iter()
                .zip(&t.diagnostics)
                .map(|(r, d)| {
                    let mut v = vec![r.step, r.time.to_bits(), r.active as u64, r.total.to_bits()];
                    v.extend(
                        r.q.iter()
                            .chain(&r.v)
                            .chain(&r.energies)
                            .map(|x| x.to_bits()),
                    );
                    v.extend(
                        r.amplitudes
                            .iter()
                            .flat_map(|c| [c.re.to_bits(), c.im.to_bits()]),
                    );
                    v.extend(d.bits());
                    v
                })
                .collect()
        };
        assert_eq!(a.header, b.header);
        assert_eq!(rows(a), rows(b), "trajectory {}", a.header.index);
        assert_eq!(
            (&a.hops, &a.warnings, &a.status),
            (&b.hops, &b.warnings, &b.status),
            "trajectory {}",
            a.header.index
        );
    }
    assert_eq!(
        PartReader::open(got).unwrap().writer_state(),
        WriterState::Closed
    );
}

/// Disk full, simulated: the Nth dataset write of the writer fails (ENOSPC).
/// The run stops with the runtime exit code and a message naming the file
/// and how to continue, leaves a part file that resume can use, and
/// `flipswarm resume` (no failure now) completes it to exactly the result
/// of a run that never failed — for a failure in the first write, early,
/// and late in the run.
#[test]
fn injected_write_failure_stops_resumably_and_resume_is_identical() {
    let _serial = serial();
    let s = Scratch::new("diskfull", 6, 150.0, 2);
    let reference = s.0.join("reference");
    let (code, err) = spawn_run(
        &[
            "-q",
            "run",
            &s.ens(),
            "-o",
            reference.to_str().unwrap(),
            "--threads",
            "2",
        ],
        None,
    );
    assert_eq!(code, Some(0), "{err}");
    for n in [0u64, 40, 400] {
        let dir = s.0.join(format!("full-{n}"));
        let d = dir.to_str().unwrap();
        let (code, err) = spawn_run(&["-q", "run", &s.ens(), "-o", d, "--threads", "2"], Some(n));
        assert_eq!(code, Some(4), "N = {n}: {err}");
        assert!(
            err.contains("No space left on device") && err.contains(INJECT_WRITE_FAILURE),
            "N = {n}: {err}"
        );
        assert!(
            err.contains(&format!("flipswarm resume {d}")),
            "N = {n}: the message must say how to continue: {err}"
        );
        assert!(
            err.contains(part(&dir).to_str().unwrap()),
            "N = {n}: the message must name the file: {err}"
        );
        let r = PartReader::open(&part(&dir)).unwrap();
        assert_eq!(
            r.writer_state(),
            WriterState::Open,
            "N = {n}: a failed writer must not mark its file closed"
        );
        drop(r);
        let (code, err) = spawn_run(&["-q", "resume", d], None);
        assert_eq!(code, Some(0), "N = {n}: resume: {err}");
        assert_identical(&part(&dir), &part(&reference));
    }
}

/// A kill can leave a chunk half written: its Fletcher-32 checksum then
/// fails on reading. Simulated deterministically: a run stopped after a
/// fixed number of back-end calls (as by SIGTERM: checkpoints on disk), its
/// file then marked "open" as a killed writer leaves it, and one byte of a
/// trajectory's positions flipped inside the rows its checkpoint vouches
/// for. Resume must not give up on the run: that trajectory is recomputed
/// from its start, the others continue from their checkpoints, and the
/// result equals the uninterrupted run bit for bit.
#[test]
fn a_chunk_with_a_bad_checksum_is_recomputed_on_resume() {
    let _serial = serial();
    let s = Scratch::new("checksum", 4, 150.0, 1);
    let cfg = s.cfg();
    let reference = s.0.join("reference");
    let model = cfg.model.clone();
    let plain = move |_: usize| -> Box<dyn Backend> { swarm::make_backend(&model) };
    assert_eq!(run_in_process(&cfg, &reference, &plain).finished, 4);

    let dir = s.0.join("damaged");
    let stop = Arc::new(AtomicBool::new(false));
    let (model, st, n) = (
        cfg.model.clone(),
        stop.clone(),
        Arc::new(AtomicUsize::new(0)),
    );
    let stopping = move |_: usize| -> Box<dyn Backend> {
        Box::new(StopAfter {
            inner: swarm::make_backend(&model),
            stop: st.clone(),
            calls: n.clone(),
            after: 6000,
        })
    };
    let opts = runner::Options {
        threads: 2,
        stop: stop.clone(),
        factory: &stopping,
        progress_bar: false,
    };
    let report = runner::start(&cfg, &dir, (0, 1), &opts).unwrap();
    assert!(report.stopped > 0, "the run must stop part-way");
    let file = part(&dir);
    let victim = PartReader::open(&file).unwrap().trajectory_indices()[1];
    // A writer that never closes leaves `writer_state` = "open", as a killed one does.
    drop(PartWriter::open_existing(&file).unwrap());
    // The bytes of one early position value (unique to this trajectory and step).
    let t = PartReader::open(&part(&reference))
        .unwrap()
        .read(victim)
        .unwrap();
    let x = t.rows[3].q[0].to_le_bytes();
    let mut bytes = std::fs::read(&file).unwrap();
    let at: Vec<usize> = bytes
        .windows(8)
        .enumerate()
        .filter(|(_, w)| *w == x)
        .map(|(i, _)| i)
        .collect();
    assert_eq!(at.len(), 1, "the value must occur once in the file");
    bytes[at[0] + 3] ^= 0x10;
    std::fs::write(&file, &bytes).unwrap();
    let r = PartReader::open(&file).unwrap();
    assert_eq!(r.writer_state(), WriterState::Open);
    let e = r
        .read_prefix_all(
            victim,
            Counts {
                rows: 10,
                hops: 0,
                warnings: 0,
            },
        )
        .unwrap_err()
        .to_string();
    assert!(e.contains("Fletcher32") || e.contains("checksum"), "{e}");
    drop(r);
    let (code, err) = spawn_run(&["resume", dir.to_str().unwrap()], None);
    assert_eq!(code, Some(0), "resume: {err}");
    assert!(
        err.contains(&format!("trajectory {victim}:"))
            && err.contains("recomputing it from its start"),
        "{err}"
    );
    assert!(err.contains("from checkpoints"), "{err}");
    assert_identical(&file, &part(&reference));
}

/// Sets the stop flag after a fixed number of back-end calls (a
/// deterministic stand-in for SIGTERM).
struct StopAfter {
    inner: Box<dyn Backend>,
    stop: Arc<AtomicBool>,
    calls: Arc<AtomicUsize>,
    after: usize,
}

impl Backend for StopAfter {
    fn info(&self) -> BackendInfo {
        self.inner.info()
    }
    fn compute(&mut self, q: &[f64], request: &Request) -> Result<&Results, BackendError> {
        if self.calls.fetch_add(1, Ordering::Relaxed) + 1 == self.after {
            self.stop.store(true, Ordering::Relaxed);
        }
        self.inner.compute(q, request)
    }
    fn snapshot(&self) -> Snapshot {
        self.inner.snapshot()
    }
    fn restore(&mut self, s: &Snapshot) -> Result<(), BackendError> {
        self.inner.restore(s)
    }
}

/// The disk estimate (steps × trajectories × datasets) bounds a real part
/// file from above within a factor of 3, and a run that would not fit is
/// refused before anything is written, with the estimate and its parts in
/// the message.
#[test]
fn disk_estimate_bounds_the_file_and_refuses_what_cannot_fit() {
    let _serial = serial();
    let s = Scratch::new("estimate", 5, 60.0, 1);
    let cfg = s.cfg();
    let est = runner::disk_estimate(&cfg, (0, 1));
    assert_eq!((est.trajectories, est.datasets), (5, 13));
    assert_eq!(
        est.rows_per_trajectory,
        1200 + 2,
        "60 fs / 0.05 fs steps, one row each, plus the end points"
    );
    let dir = s.0.join("small");
    let model = cfg.model.clone();
    let factory = move |_: usize| swarm::make_backend(&model);
    run_in_process(&cfg, &dir, &factory);
    let actual = std::fs::metadata(part(&dir)).unwrap().len() as f64;
    assert!(
        est.part_bytes as f64 >= actual && (est.part_bytes as f64) < 3.0 * actual,
        "estimate {} vs actual {actual}",
        est.part_bytes
    );
    let out = s.0.join("huge");
    let (code, err) = spawn_run(
        &[
            "-q",
            "run",
            &s.ens(),
            "-o",
            out.to_str().unwrap(),
            "--set",
            "swarm.trajectories=10000000",
            "--set",
            "dynamics.duration_fs=200000",
        ],
        None,
    );
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("would need about") && err.contains("are free"),
        "{err}"
    );
    assert!(
        err.contains("10000000 trajectories × 4000002 rows × 13 datasets"),
        "{err}"
    );
    assert!(!out.exists(), "nothing may be created");
}
