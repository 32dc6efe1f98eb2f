//! Engine throughput, printed, never asserted (`scripts/bench`).
//!
//! Each workload is timed beside a reference run made in the same process on
//! the same trajectories: plain velocity Verlet on one adiabatic surface of
//! the same back end (one back-end call per step, no amplitudes, no hops).
//! The ratio is the cost of the surface-hopping machinery over that floor.

use std::path::Path;
use std::time::Instant;

use flipswarm::config::{load_str, RunConfig};
use flipswarm::dynamics::verlet;
use flipswarm::electronic::Request;
use flipswarm::swarm;

fn tully_config(trajectories: usize) -> RunConfig {
    let text = format!(
        r#"[model]
kind = "tully-1"
[start]
sampling = "wigner"
position_bohr = -15.0
momentum_au = 20.0
width_bohr = 1.0
[dynamics]
timestep_au = 1.0
duration_au = 4000.0
decoherence = "energy-based"
exit_region_bohr = [-15.5, 15.5]
[swarm]
trajectories = {trajectories}
seed = 1
"#
    );
    load_str(&text, "bench", Path::new("."), &[]).expect("valid bench config")
}

fn lvc_config(trajectories: usize, dir: &Path) -> RunConfig {
    // 3 states, 10 modes: tuning modes 0–4, coupling modes 5–9 (a made-up model).
    let mut m = String::from("frequencies_ev = [0.05, 0.07, 0.09, 0.11, 0.13, 0.15, 0.17, 0.19, 0.21, 0.23]\nvertical_ev = [0.0, 3.8, 4.2]\n");
    for mode in 0..5 {
        for (state, v) in [(1, -0.05), (2, 0.06)] {
            m.push_str(&format!(
                "[[gradient]]\nstate = {state}\nmode = {mode}\nvalue_ev = {}\n",
                v * (1.0 + 0.1 * mode as f64)
            ));
        }
    }
    for mode in 5..10 {
        for (pair, v) in [("[1, 2]", 0.05), ("[0, 1]", 0.01)] {
            m.push_str(&format!(
                "[[coupling]]\nstates = {pair}\nmode = {mode}\nvalue_ev = {v}\n"
            ));
        }
    }
    std::fs::write(dir.join("bench-lvc.toml"), m).expect("temp dir writable");
    let text = format!(
        r#"[model]
kind = "lvc"
file = "bench-lvc.toml"
[start]
sampling = "wigner"
state = 2
[dynamics]
timestep_fs = 0.1
duration_fs = 100.0
[swarm]
trajectories = {trajectories}
seed = 2
"#
    );
    load_str(&text, "bench", dir, &[]).expect("valid bench config")
}

/// A made-up 20-atom-sized LVC model: 60 modes (3 × 20 coordinates), 5
/// states; tuning modes 0–29, coupling modes 30–59 (invented numbers, a demo).
fn lvc20_config(
    trajectories: usize,
    duration_fs: f64,
    dir: &Path,
    checkpoint_every: u64,
    record_every: u64,
) -> RunConfig {
    let freqs: Vec<String> = (0..60)
        .map(|k| format!("{:.4}", 0.02 + 0.006 * k as f64))
        .collect();
    let mut m = format!(
        "frequencies_ev = [{}]\nvertical_ev = [0.0, 3.6, 3.9, 4.2, 4.6]\n",
        freqs.join(", ")
    );
    for mode in 0..30 {
        for state in 1..5 {
            let v = if state % 2 == 0 { 0.04 } else { -0.05 } * (1.0 + 0.02 * mode as f64);
            m.push_str(&format!(
                "[[gradient]]\nstate = {state}\nmode = {mode}\nvalue_ev = {v:.5}\n"
            ));
        }
    }
    for mode in 30..60 {
        for (a, b, v) in [(1, 2, 0.03), (2, 3, 0.03), (3, 4, 0.025), (0, 1, 0.005)] {
            m.push_str(&format!(
                "[[coupling]]\nstates = [{a}, {b}]\nmode = {mode}\nvalue_ev = {v}\n"
            ));
        }
    }
    std::fs::write(dir.join("bench-lvc20.toml"), m).expect("temp dir writable");
    let text = format!(
        r#"[model]
kind = "lvc"
file = "bench-lvc20.toml"
[start]
sampling = "wigner"
state = 4
[dynamics]
timestep_fs = 0.1
duration_fs = {duration_fs}
[output]
record_every_steps = {record_every}
checkpoint_every_steps = {checkpoint_every}
[swarm]
trajectories = {trajectories}
seed = 3
"#
    );
    load_str(&text, "bench", dir, &[]).expect("valid bench config")
}

/// CPU time (user + system) of this process so far, seconds.
fn cpu_seconds() -> f64 {
    let mut u: libc::rusage = unsafe { std::mem::zeroed() };
    // SAFETY: `u` is a valid out-pointer for getrusage.
    unsafe { libc::getrusage(libc::RUSAGE_SELF, &mut u) };
    let t = |tv: libc::timeval| tv.tv_sec as f64 + tv.tv_usec as f64 * 1e-6;
    t(u.ru_utime) + t(u.ru_stime)
}

/// Trajectory-steps per second of the full engine, one thread.
fn engine(cfg: &RunConfig) -> (u64, f64) {
    let t = Instant::now();
    let out = swarm::run(cfg, 1).expect("thread pool");
    let steps: u64 = out.iter().map(|o| o.steps).sum();
    (steps, t.elapsed().as_secs_f64())
}

/// The reference: velocity Verlet on the initial adiabatic surface, same
/// initial conditions and step counts.
fn reference(cfg: &RunConfig, steps_each: &[u64]) -> (u64, f64) {
    let t = Instant::now();
    let mut total = 0;
    for (i, &n) in steps_each.iter().enumerate() {
        let mut backend = swarm::make_backend(&cfg.model);
        let masses = backend.info().masses;
        let (mut q, mut v, _) = swarm::initial_condition(cfg, &masses, i);
        let req = Request::gradient_of(cfg.initial_state);
        let mut g = backend
            .compute(&q, &req)
            .expect("model")
            .gradient(cfg.initial_state)
            .unwrap()
            .to_vec();
        for _ in 0..n {
            verlet::kick_drift(&mut q, &mut v, &g, &masses, cfg.settings.dt);
            g.copy_from_slice(
                backend
                    .compute(&q, &req)
                    .expect("model")
                    .gradient(cfg.initial_state)
                    .unwrap(),
            );
            verlet::kick(&mut v, &g, &masses, cfg.settings.dt);
        }
        total += n;
    }
    (total, t.elapsed().as_secs_f64())
}

fn report(name: &str, cfg: &RunConfig) {
    let out = swarm::run(cfg, 1).expect("thread pool");
    let steps_each: Vec<u64> = out.iter().map(|o| o.steps).collect();
    let (n, secs) = engine(cfg);
    let (nr, rsecs) = reference(cfg, &steps_each);
    let rate = n as f64 / secs;
    let rrate = nr as f64 / rsecs;
    println!(
        "{name:<34} {:>5} traj {n:>9} steps {secs:>7.3} s {rate:>12.0} steps/s/core | reference {rrate:>12.0} steps/s | ratio {:>5.2}",
        cfg.trajectories,
        rate / rrate
    );
}

/// Writer throughput: rows of a 20-atom (60 coordinates), 5-state system
/// appended in batches of 100, flushed after every batch, against the same
/// rows serialised to memory only (the reference).
/// Part-file metadata of the writer benchmarks (unit masses, one slice).
fn bench_meta(
    n_dof: usize,
    n_states: usize,
    trajectories: usize,
) -> flipswarm::ensemble::record::PartMeta {
    flipswarm::ensemble::record::PartMeta {
        config_toml: String::new(),
        program_version: "bench".into(),
        created: "2026-01-01T00:00:00Z".into(),
        n_states,
        n_dof,
        masses: vec![1.0; n_dof],
        slice: (0, 1),
        trajectories: (0..trajectories).collect(),
        timestep_au: 1.0,
    }
}

fn writer_throughput(dir: &Path) {
    use flipswarm::ensemble::h5::PartWriter;
    use flipswarm::ensemble::record::{StepRow, TrajectoryHeader};
    use num_complex::Complex64;
    let (n_dof, n_states, trajectories, rows_each) = (60, 5, 20, 2000);
    let meta = bench_meta(n_dof, n_states, trajectories);
    let row = |k: u64| StepRow {
        step: k,
        time: k as f64,
        q: (0..n_dof).map(|i| (i as f64 + k as f64).sin()).collect(),
        v: vec![0.1; n_dof],
        energies: vec![-1.0; n_states],
        active: 1,
        amplitudes: vec![Complex64::new(0.3, 0.1); n_states],
        kinetic: 0.1,
        potential: -1.0,
        total: -0.9,
    };
    let batch: Vec<StepRow> = (0..100).map(row).collect();
    let path = dir.join("writer-bench.h5");
    let _ = std::fs::remove_file(&path);
    let t = Instant::now();
    let mut w = PartWriter::create(&path, &meta).expect("create bench file");
    for i in 0..trajectories {
        w.begin(&TrajectoryHeader {
            index: i,
            q0: vec![0.0; n_dof],
            v0: vec![0.0; n_dof],
            initial_state: 1,
            seed: 0,
        })
        .expect("begin");
    }
    for _ in 0..rows_each / 100 {
        for i in 0..trajectories {
            w.append(i, &batch, &[]).expect("append");
        }
        w.flush().expect("flush");
    }
    w.close().expect("close");
    let secs = t.elapsed().as_secs_f64();
    let rows = (trajectories * rows_each) as f64;
    let t = Instant::now();
    let mut bytes = 0usize;
    for _ in 0..rows_each / 100 {
        for _ in 0..trajectories {
            bytes += serde_json::to_vec(&batch).expect("serialise").len();
        }
    }
    let rsecs = t.elapsed().as_secs_f64();
    let size = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0) as f64 / 1e6;
    println!(
        "{:<34} {:>9.0} rows/s ({size:.1} MB file) | reference (JSON to memory, {:.0} MB) {:>9.0} rows/s | ratio {:>5.2}",
        "writer: 60 coords x 5 states",
        rows / secs,
        bytes as f64 / 1e6,
        rows / rsecs,
        (rows / secs) / (rows / rsecs)
    );
    let _ = std::fs::remove_file(&path);
}

/// The writer's own work per row, as the runner feeds it: `trajectories`
/// trajectories of `rows_each` rows in blocks of 1024 (interleaved, as from
/// two trajectory threads), created, written, marked finished and closed;
/// against writing the same bytes unformatted to a plain file (the floor:
/// the kernel's copy into the page cache). The fastest of `repeats` runs of
/// each (a busy host only adds time). Returns (creation per trajectory in
/// ms, HDF5 per row in µs, plain file per row in µs).
fn writer_per_row(dir: &Path, repeats: usize) -> (f64, f64, f64) {
    use flipswarm::dynamics::trajectory::{EndReason, Status};
    use flipswarm::electronic::Diagnostics;
    use flipswarm::ensemble::h5::PartWriter;
    use flipswarm::ensemble::record::{RowBlock, TrajectoryHeader};
    use flipswarm::ensemble::runner::BLOCK_ROWS;
    use std::io::Write;
    let (n_dof, n_states, trajectories, rows_each) = (60, 5, 4, 20480);
    let meta = bench_meta(n_dof, n_states, trajectories);
    let q: Vec<f64> = (0..n_dof).map(|i| (i as f64).sin()).collect();
    let e = vec![-1.0; n_states];
    let a = vec![num_complex::Complex64::new(0.3, 0.1); n_states];
    let d = Diagnostics::default();
    let blocks: Vec<RowBlock> = (0..rows_each / BLOCK_ROWS)
        .map(|b| {
            let mut block = RowBlock::with_capacity(n_dof, n_states, BLOCK_ROWS);
            for k in 0..BLOCK_ROWS as u64 {
                let step = (b * BLOCK_ROWS) as u64 + k;
                block.push(step, step as f64, &q, &q, &e, 1, &a, 0.1, -1.0, &d);
            }
            block
        })
        .collect();
    let header = |index| TrajectoryHeader {
        index,
        q0: q.clone(),
        v0: q.clone(),
        initial_state: 1,
        seed: 0,
    };
    let path = dir.join("writer-per-row.h5");
    let (mut create, mut whole) = (f64::INFINITY, f64::INFINITY);
    for _ in 0..repeats {
        let _ = std::fs::remove_file(&path);
        let t = Instant::now();
        let mut w = PartWriter::create(&path, &meta).expect("create bench file");
        for i in 0..trajectories {
            w.begin(&header(i)).expect("begin");
        }
        create = create.min(t.elapsed().as_secs_f64());
        for b in &blocks {
            for i in 0..trajectories {
                w.append_block(i, b, &[], &[]).expect("append");
            }
        }
        for i in 0..trajectories {
            w.set_status(i, &Status::Finished(EndReason::TimeLimit))
                .expect("status");
        }
        w.flush().expect("flush");
        w.close().expect("close");
        whole = whole.min(t.elapsed().as_secs_f64());
    }
    let row_bytes = 8 * (5 + 2 * n_dof + 4 * n_states) + 4 * 3;
    let bytes = vec![7u8; row_bytes * BLOCK_ROWS];
    let raw = dir.join("writer-per-row.bin");
    let mut plain = f64::INFINITY;
    for _ in 0..repeats {
        let _ = std::fs::remove_file(&raw);
        let t = Instant::now();
        let mut f = std::fs::File::create(&raw).expect("plain file");
        for _ in &blocks {
            for _ in 0..trajectories {
                f.write_all(&bytes).expect("write");
            }
        }
        drop(f);
        plain = plain.min(t.elapsed().as_secs_f64());
    }
    let _ = std::fs::remove_file(&path);
    let _ = std::fs::remove_file(&raw);
    let rows = (trajectories * rows_each) as f64;
    (
        1e3 * create / trajectories as f64,
        1e6 * (whole - create) / rows,
        1e6 * plain / rows,
    )
}

/// Wall and CPU seconds of one in-memory run (reference) and of one run
/// into a run directory, and the part file's size.
/// `threads` trajectory threads each (the run with output adds the writer).
fn overhead_pair(cfg: &RunConfig, dir: &Path, threads: usize) -> ([f64; 2], [f64; 2], u64) {
    let (t, c) = (Instant::now(), cpu_seconds());
    swarm::run(cfg, threads).expect("thread pool");
    let plain = [t.elapsed().as_secs_f64(), cpu_seconds() - c];
    let (with, size) = run_into_directory(cfg, dir, threads);
    (plain, with, size)
}

/// One run of `cfg` into a fresh run directory under `dir` (removed
/// afterwards) on `threads` trajectory threads: wall and CPU seconds and the
/// part file's size.
fn run_into_directory(cfg: &RunConfig, dir: &Path, threads: usize) -> ([f64; 2], u64) {
    use flipswarm::ensemble::runner;
    use std::sync::atomic::AtomicBool;
    use std::sync::Arc;
    let model = cfg.model.clone();
    let factory = move |_: usize| swarm::make_backend(&model);
    let opts = runner::Options {
        threads,
        stop: Arc::new(AtomicBool::new(false)),
        factory: &factory,
        progress_bar: false,
    };
    let run_dir = dir.join("overhead-run");
    let _ = std::fs::remove_dir_all(&run_dir);
    let (t, c) = (Instant::now(), cpu_seconds());
    runner::start(cfg, &run_dir, (0, 1), &opts).expect("run into directory");
    let times = [t.elapsed().as_secs_f64(), cpu_seconds() - c];
    let size = std::fs::metadata(run_dir.join(runner::part_name(0, 1)))
        .map(|m| m.len())
        .unwrap_or(0);
    let _ = std::fs::remove_dir_all(&run_dir);
    (times, size)
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// The same ensemble run in memory (reference) and into a run directory with
/// a row every `record_every` steps and a checkpoint every `checkpoint_every`
/// steps (0: the default cadence, by wall-clock time), for a run of
/// `duration_fs` and one five times longer: medians of `repeats`
/// interleaved pairs (reference, with output) per length. The difference
/// of the two lengths separates the cost per step (the marginal overhead,
/// what a long production run pays) from the fixed cost of a run (file and
/// group creation, the final commit and close), which a sub-second
/// benchmark run would otherwise mistake for a per-step cost.
fn output_overhead(
    name: &str,
    make: &dyn Fn(f64) -> RunConfig,
    duration_fs: f64,
    checkpoint_every: u64,
    dir: &Path,
    repeats: usize,
) {
    let lengths = [duration_fs, 5.0 * duration_fs];
    let mut runs = Vec::new();
    let mut sizes = [0u64; 2];
    let mut record_every = 1;
    for (k, &d) in lengths.iter().enumerate() {
        let cfg = make(d);
        assert_eq!(
            cfg.output.checkpoint_every, checkpoint_every,
            "cadence in the TOML text"
        );
        record_every = cfg.output.record_every;
        let mut samples = Vec::new();
        for _ in 0..repeats {
            let (p, w, size) = overhead_pair(&cfg, dir, 1);
            sizes[k] = size;
            samples.push((p, w));
        }
        type Sample = ([f64; 2], [f64; 2]);
        let m = |f: &dyn Fn(&Sample) -> f64| median(samples.iter().map(f).collect());
        runs.push([
            m(&|s| s.0[0]),
            m(&|s| s.0[1]),
            m(&|s| s.1[0]),
            m(&|s| s.1[1]),
        ]);
    }
    let cadence = if checkpoint_every == 0 {
        "default checkpoints".to_string()
    } else {
        format!("checkpoint/{checkpoint_every} steps")
    };
    let cadence = format!("row/{record_every} steps, {cadence}");
    let pct = |with: f64, plain: f64| 100.0 * (with / plain - 1.0);
    for (k, r) in runs.iter().enumerate() {
        println!(
            "{:<34} {:>6.0} fs: {:>7.3} s ({:.3} s CPU) with output, {cadence}, {:.1} MB | reference (no output) {:>7.3} s ({:.3} s CPU) | overhead wall {:>5.1} %, CPU {:>5.1} %",
            format!("output + checkpoints ({name})"),
            lengths[k],
            r[2],
            r[3],
            sizes[k] as f64 / 1e6,
            r[0],
            r[1],
            pct(r[2], r[0]),
            pct(r[3], r[1]),
        );
    }
    let (s, l) = (&runs[0], &runs[1]);
    let marginal_wall = pct(l[2] - s[2], l[0] - s[0]);
    let marginal_cpu = pct(l[3] - s[3], l[1] - s[1]);
    let fixed = (s[2] - s[0]) - 0.01 * marginal_wall * s[0];
    println!(
        "{:<34} per step: overhead wall {marginal_wall:>5.1} %, CPU {marginal_cpu:>5.1} % (goal < 2 %) | fixed cost per run {:.0} ms wall",
        format!("output + checkpoints ({name})"),
        1e3 * fixed
    );
}

/// One run with output (for profiling).
fn output_overhead_once(cfg: &RunConfig, dir: &Path, checkpoint_every: u64) {
    let mut cfg = cfg.clone();
    cfg.output.record_every = 1;
    cfg.output.checkpoint_every = checkpoint_every;
    run_into_directory(&cfg, dir, 1);
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    if std::env::args().any(|a| a == "--push") {
        // Recording one row into a trajectory's block of columns (on the
        // trajectory's thread), against a plain copy of the same bytes.
        use flipswarm::ensemble::record::{Diagnostics, RowBlock};
        let (nd, ns, rows) = (60, 5, 1024u64);
        let q: Vec<f64> = (0..nd).map(|k| k as f64 * 0.1).collect();
        let e: Vec<f64> = (0..ns).map(|k| k as f64).collect();
        let a = vec![num_complex::Complex64::new(0.5, 0.1); ns];
        let d = Diagnostics::default();
        // The bytes of one stored row: step, time, three energies, q, v,
        // energies, amplitudes and <S²> in 8-byte values, the active state
        // and two counts in 4.
        let bytes = 8 * (5 + 2 * nd + 4 * ns) + 4 * 3;
        let row: Vec<u8> = (0..bytes).map(|k| k as u8).collect();
        let per_row = |t: Instant| t.elapsed().as_secs_f64() / (1000 * rows) as f64 * 1e9;
        for _ in 0..3 {
            let mut copy = Vec::with_capacity(bytes * rows as usize);
            let t = Instant::now();
            for _ in 0..1000 {
                copy.clear();
                for _ in 0..rows {
                    copy.extend_from_slice(std::hint::black_box(&row));
                }
            }
            let reference = per_row(t);
            let mut b = RowBlock::with_capacity(nd, ns, rows as usize);
            let t = Instant::now();
            for r in 0..1000 {
                b.clear();
                for k in 0..rows {
                    b.push(r * rows + k, 1.0, &q, &q, &e, 1, &a, 0.5, 0.25, &d);
                }
            }
            let push = per_row(t);
            println!(
                "one row of 60 coordinates x 5 states ({} bytes) into a block of columns: {push:.1} ns | reference (copy of the bytes) {reference:.1} ns | ratio {:.2}",
                bytes,
                push / reference
            );
        }
        return;
    }
    if let Some(which) =
        std::env::args().find_map(|a| a.strip_prefix("--profile=").map(str::to_string))
    {
        // For a profiler: only the plain run or only the run with output, five times.
        let dir = std::env::temp_dir().join(format!("flipswarm-bench-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("temp dir");
        let cfg = lvc20_config(20, 200.0, &dir, 200, 1);
        for _ in 0..5 {
            if which == "plain" {
                swarm::run(&cfg, 1).expect("thread pool");
            } else {
                let cfg = match which.as_str() {
                    "runner0" => lvc20_config(20, 200.0, &dir, 0, 1),
                    "runner20" => lvc20_config(20, 200.0, &dir, 0, 20),
                    _ => cfg.clone(),
                };
                output_overhead_once(&cfg, &dir, cfg.output.checkpoint_every);
            }
        }
        std::fs::remove_dir_all(&dir).ok();
        return;
    }
    let scale = if quick { 10 } else { 1 };
    println!("flipswarm engine benchmark (one thread; ratio = engine rate / reference rate)");
    let dir = std::env::temp_dir().join(format!("flipswarm-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp dir");
    let lvc = lvc_config(200 / scale, &dir);
    // The run directory re-reads the configuration from its TOML text, so the
    // checkpoint cadence is part of the text.
    let n20 = 20 / scale.min(4);
    let lvc20 = lvc20_config(n20, 200.0, &dir, 200, 1);
    let overheads = |dir: &Path, repeats: usize| {
        let d = dir.to_path_buf();
        let name = "LVC 20 atoms x 5 states";
        let every200 = |t: f64| lvc20_config(n20, t, &d, 200, 1);
        let default1 = |t: f64| lvc20_config(n20, t, &d, 0, 1);
        let default20 = |t: f64| lvc20_config(n20, t, &d, 0, 20);
        output_overhead(name, &every200, 200.0, 200, dir, repeats);
        output_overhead(name, &default1, 200.0, 0, dir, repeats);
        output_overhead(name, &default20, 200.0, 0, dir, repeats);
    };
    if std::env::args().any(|a| a == "--overhead=pairs") {
        // The default cadence, as medians and quartiles over nine rounds
        // (`--rounds=N`) of back-to-back pairs (reference, with output) at
        // two lengths, which cancels slow drifts of the machine's speed:
        // the overhead per step
        // (from the difference of the two lengths: what a long production
        // run pays), the fixed cost per run (file creation, final commit and
        // close) and the whole overhead of the longer run.
        // `--trajectories=N` (default 20) sets the ensemble size: fewer
        // trajectories make the rounds shorter, so more of them fit in the
        // same minutes and drifts slower than a round cancel.
        let (short, long) = (400.0, 2000.0);
        let n = std::env::args()
            .find_map(|a| {
                a.strip_prefix("--trajectories=")
                    .and_then(|n| n.parse().ok())
            })
            .unwrap_or(n20)
            .max(1);
        // `--threads=N` trajectory threads (default 1: the writer has a core
        // of its own; 0 = every core runs trajectories, as `run` does by
        // default) and `--record-every=N` steps per row (default 1).
        let arg = |key: &str, default: usize| {
            std::env::args()
                .find_map(|a| a.strip_prefix(key).and_then(|n| n.parse().ok()))
                .unwrap_or(default)
        };
        let threads = arg("--threads=", 1);
        let every = arg("--record-every=", 1).max(1) as u64;
        let cfg_short = lvc20_config(n, short, &dir, 0, every);
        let cfg_long = lvc20_config(n, long, &dir, 0, every);
        let (mut per_step, mut per_step_cpu, mut fixed, mut whole) =
            (Vec::new(), Vec::new(), Vec::new(), Vec::new());
        let rounds = std::env::args()
            .find_map(|a| a.strip_prefix("--rounds=").and_then(|n| n.parse().ok()))
            .unwrap_or(9usize)
            .max(3);
        // The fastest of each of the four runs over all rounds: a busy host
        // only ever adds time, so minima estimate the undisturbed costs.
        let mut fastest = [f64::INFINITY; 4];
        for _ in 0..rounds {
            let (ps, ws, _) = overhead_pair(&cfg_short, &dir, threads);
            let (pl, wl, _) = overhead_pair(&cfg_long, &dir, threads);
            for (m, t) in fastest.iter_mut().zip([ps[0], ws[0], pl[0], wl[0]]) {
                *m = m.min(t);
            }
            let marginal = (wl[0] - ws[0]) / (pl[0] - ps[0]);
            per_step.push(marginal);
            per_step_cpu.push((wl[1] - ws[1]) / (pl[1] - ps[1]));
            fixed.push(ws[0] - marginal * ps[0]);
            whole.push(wl[0] / pl[0]);
        }
        let quartiles = |mut v: Vec<f64>| {
            v.sort_by(f64::total_cmp);
            let n = v.len() - 1;
            [v[n / 4], median(v.clone()), v[(3 * n).div_ceil(4)]].map(|r| 100.0 * (r - 1.0))
        };
        let [lo, mid, hi] = quartiles(per_step);
        let [wlo, wmid, whi] = quartiles(whole);
        let [ps, ws, pl, wl] = fastest;
        let (min_step, min_whole) = (
            100.0 * ((wl - ws) / (pl - ps) - 1.0),
            100.0 * (wl / pl - 1.0),
        );
        println!(
            "{:<34} {n} trajectories on {} thread(s), row/{every} steps, default checkpoints, {rounds} rounds of back-to-back pairs ({short} and {long} fs): per step overhead wall median {mid:>5.1} % (quartiles {lo:.1} … {hi:.1} %), CPU median {:>5.1} % (goal < 2 %) | fixed cost per run {:.0} ms wall | whole {long} fs run {wmid:.1} % (quartiles {wlo:.1} … {whi:.1} %) | from the fastest runs: per step {min_step:.1} %, whole {min_whole:.1} %",
            "output + checkpoints (LVC 20 atoms x 5 states)",
            if threads == 0 { "all".to_string() } else { threads.to_string() },
            100.0 * (median(per_step_cpu) - 1.0),
            1e3 * median(fixed),
        );
        std::fs::remove_dir_all(&dir).ok();
        return;
    }
    // The writer's own CPU per row (what every row costs when all cores run
    // trajectories and the writer takes its share from them).
    let writer_line = |dir: &Path| {
        let (create, per_row, plain) = writer_per_row(dir, 9);
        println!(
            "{:<34} {per_row:>6.2} µs per row (1172 bytes), {create:.2} ms per trajectory created | reference (the same bytes to a plain file) {plain:.2} µs per row | ratio {:.1}",
            "writer: 60 coords x 5 states",
            per_row / plain
        );
    };
    if std::env::args().any(|a| a == "--writer") {
        writer_line(&dir);
        std::fs::remove_dir_all(&dir).ok();
        return;
    }
    if std::env::args().any(|a| a == "--overhead") {
        // Only the output overhead (scripts/bench engine -- --overhead).
        overheads(&dir, 5);
        std::fs::remove_dir_all(&dir).ok();
        return;
    }
    report("Tully 1, k = 20, decoherence", &tully_config(2000 / scale));
    report("LVC 3 states x 10 modes", &lvc);
    report("LVC 20 atoms (60 modes) x 5 states", &lvc20);
    writer_throughput(&dir);
    writer_line(&dir);
    overheads(&dir, if quick { 1 } else { 5 });
    std::fs::remove_dir_all(&dir).ok();
    let t = Instant::now();
    let cfg = tully_config(2000);
    let out = swarm::run(&cfg, 0).expect("thread pool");
    let steps: u64 = out.iter().map(|o| o.steps).sum();
    println!(
        "Tully 1, 2000 trajectories on all cores: {steps} steps in {:.3} s (goal: under 1 s)",
        t.elapsed().as_secs_f64()
    );
}
