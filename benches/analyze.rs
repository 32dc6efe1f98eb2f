//! Analysis throughput, printed, never asserted (`cargo bench --bench analyze`).
//!
//! Workload: 1000 trajectories × 2000 rows × 4 states (a synthetic, seeded
//! 3 → 2 → 1 cascade with invented lifetimes), analysed with a decay fit
//! and a sequential fit, each with 1000 bootstrap resamples (goal: under 5 s
//! for the whole analysis on the machine's cores). Reference, in the same
//! process on the same data: the same analysis with the point fits only (no
//! bootstrap); the difference is the cost of the intervals. A second block
//! times reading the ensemble back from a part file (200 trajectories, to keep
//! the file small) beside building the same data in memory.

use std::time::Instant;

use flipswarm::analysis::data::{self, Ensemble, Traj};
use flipswarm::analysis::kinetics::Model;
use flipswarm::analysis::report::{analyse, Options};
use flipswarm::dynamics::{EndReason, Hop, Status};
use flipswarm::ensemble::h5::PartWriter;
use flipswarm::ensemble::record::{PartMeta, StepRow, TrajectoryHeader};
use flipswarm::units;
use num_complex::Complex64;
use rand::{Rng, SeedableRng};

const N_STATES: usize = 4;
const ROWS: usize = 2000;

/// Hop steps of trajectory i: 3 → 2 → 1 with lifetimes 60 and 150 steps (invented).
fn cascade(i: usize) -> Vec<(u64, usize)> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(i as u64);
    let mut t = 0.0;
    let mut out = Vec::new();
    for (to, tau) in [(2usize, 60.0), (1, 150.0)] {
        let u: f64 = rng.gen_range(f64::EPSILON..1.0);
        t += -tau * u.ln();
        let s = t.ceil() as u64;
        if s < ROWS as u64 {
            out.push((s, to));
        }
    }
    out
}

fn rows(i: usize) -> (Vec<StepRow>, Vec<Hop>) {
    let hops = cascade(i);
    let state = |s: u64| hops.iter().rfind(|h| h.0 <= s).map_or(3, |h| h.1);
    let rows = (0..ROWS as u64)
        .map(|s| {
            let a = state(s);
            StepRow {
                step: s,
                time: s as f64 * 20.0,
                q: vec![0.0; 3],
                v: vec![0.0; 3],
                energies: (0..N_STATES).map(|j| 0.1 * j as f64).collect(),
                active: a as u32,
                amplitudes: (0..N_STATES)
                    .map(|j| Complex64::new(if j == a { 0.9 } else { 0.25 }, 0.0))
                    .collect(),
                kinetic: 0.01,
                potential: 0.1 * a as f64,
                total: 0.5 + 1e-6 * (s % 7) as f64,
            }
        })
        .collect();
    let mut from = 3;
    let h = hops
        .iter()
        .map(|&(s, to)| {
            let h = Hop {
                step: s,
                time: s as f64 * 20.0,
                from,
                to,
                accepted: true,
                gap: 0.1 * (to as f64 - from as f64),
                kinetic_before: 0.01,
                kinetic_after: 0.11,
            };
            from = to;
            h
        })
        .collect();
    (rows, h)
}

fn traj(i: usize) -> Traj {
    let (r, hops) = rows(i);
    Traj {
        index: i,
        status: Status::Finished(EndReason::TimeLimit),
        steps: r.iter().map(|x| x.step).collect(),
        times: r.iter().map(|x| x.time).collect(),
        active: r.iter().map(|x| x.active).collect(),
        pops: r
            .iter()
            .flat_map(|x| x.amplitudes.iter().map(|c| c.norm_sqr()))
            .collect(),
        total: r.iter().map(|x| x.total).collect(),
        q: Vec::new(),
        energies: Vec::new(),
        hops,
    }
}

fn ensemble(n: usize) -> Ensemble {
    Ensemble {
        files: vec![],
        n_states: N_STATES,
        n_dof: 3,
        timestep_au: 20.0,
        record_every: 1,
        pending: 0,
        trajs: (0..n).map(traj).collect(),
    }
}

fn main() {
    let t = Instant::now();
    let ens = ensemble(1000);
    let build = t.elapsed().as_secs_f64();
    let fits = vec![
        Model::Decay {
            state: 3,
            delay: false,
        },
        Model::Sequential { a: 3, b: 2, c: 1 },
    ];
    println!("flipswarm analysis benchmark: 1000 trajectories × {ROWS} rows × {N_STATES} states on {} threads (data built in memory in {build:.2} s)", rayon::current_num_threads());
    let reference = Options {
        fits: fits.clone(),
        resamples: 0,
        ..Options::default()
    };
    let t = Instant::now();
    let a0 = analyse(&ens, &reference).expect("analysis");
    let t_ref = t.elapsed().as_secs_f64();
    let full = Options {
        fits,
        resamples: 1000,
        ..Options::default()
    };
    let t = Instant::now();
    let a1 = analyse(&ens, &full).expect("analysis");
    let t_full = t.elapsed().as_secs_f64();
    println!("  reference (populations, hops, energies, 2 point fits, no bootstrap): {t_ref:.3} s");
    println!("  with 1000 bootstrap resamples for each of the 2 fits:              {t_full:.3} s  (goal < 5 s; ratio {:.1})", t_full / t_ref.max(1e-9));
    println!(
        "    (true lifetimes of the synthetic data: τ1 = {:.2} fs, τ2 = {:.2} fs)",
        units::au_to_fs(60.0 * 20.0),
        units::au_to_fs(150.0 * 20.0)
    );
    for f in &a1.fits {
        let ps: Vec<String> = f
            .parameters
            .iter()
            .map(|p| {
                format!(
                    "{} {:.2} [{:.2}, {:.2}]",
                    p.name, p.value, p.lower95, p.upper95
                )
            })
            .collect();
        println!("    {}: {}", f.description, ps.join(", "));
    }
    assert_eq!(
        a0.fits[0].parameters[0].value,
        a1.fits[0].parameters[0].value
    );

    // Reading from a part file.
    let dir = std::env::temp_dir().join(format!("flipswarm-bench-analyze-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("part-0000-of-0001.h5");
    let n = 200;
    let meta = PartMeta {
        config_toml: String::new(),
        program_version: "bench".into(),
        created: "2026-12-01T00:00:00Z".into(),
        n_states: N_STATES,
        n_dof: 3,
        masses: vec![1836.0; 3],
        slice: (0, 1),
        trajectories: (0..n).collect(),
        timestep_au: 20.0,
    };
    let mut w = PartWriter::create(&path, &meta).unwrap();
    for i in 0..n {
        w.begin(&TrajectoryHeader {
            index: i,
            q0: vec![0.0; 3],
            v0: vec![0.0; 3],
            initial_state: 3,
            seed: 0,
        })
        .unwrap();
        let (r, h) = rows(i);
        w.append(i, &r, &h).unwrap();
        w.set_status(i, &Status::Finished(EndReason::TimeLimit))
            .unwrap();
    }
    w.close().unwrap();
    let t = Instant::now();
    let mem = ensemble(n);
    let t_mem = t.elapsed().as_secs_f64();
    let t = Instant::now();
    let read = data::load(&[path], &Default::default()).expect("read");
    let t_read = t.elapsed().as_secs_f64();
    assert_eq!(read.trajs.len(), mem.trajs.len());
    println!("  reading {n} trajectories × {ROWS} rows from a part file: {t_read:.3} s (reference: building them in memory {t_mem:.3} s)");
    let _ = std::fs::remove_dir_all(&dir);
}
