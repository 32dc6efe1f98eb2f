//! `flipswarm analyze` and `flipswarm::analysis`: kinetic fits recover known
//! lifetimes of synthetic ensembles and their bootstrap intervals have their
//! nominal coverage; Wilson intervals against published values; the ended /
//! failed policies; populations of a real Tully-1 run equal the branching
//! ratios `run` reported; geometric parameters at hops; valid SVG and PNG
//! files of the requested size; bad input gives exit code 2 with a clear
//! message.
//!
//! Synthetic ensembles: every trajectory starts on one state and hops at
//! times drawn (seeded) from exponential distributions; rows have |c|² = 1 on
//! the active state. Hop steps are ceil(t/Δt), so the fraction still on the
//! initial state at a recorded time t is exactly the fraction whose hop time
//! exceeds t: the expected curves are the survival functions of the textbook
//! models with no discretisation bias.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::{RwLock, RwLockReadGuard, RwLockWriteGuard};

use flipswarm::analysis::data::{Ensemble, Traj};
use flipswarm::analysis::fit::levenberg_marquardt;
use flipswarm::analysis::geometry::Param;
use flipswarm::analysis::kinetics::{self, Model};
use flipswarm::analysis::populations::{wilson, Ended, Grid, Populations, Z95};
use flipswarm::analysis::report::{analyse, Options};
use flipswarm::dynamics::EndReason;
use flipswarm::ensemble::h5::PartWriter;
use flipswarm::ensemble::record::{Hop, PartMeta, Status, StepRow, TrajectoryHeader};
use flipswarm::units;
use num_complex::Complex64;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");

/// A child process inherits the descriptors (and HDF5 file locks) of files
/// open in other test threads: tests that open HDF5 files hold this for
/// reading, tests that start processes for writing (as in tests/ensemble_h5.rs).
static FORK: RwLock<()> = RwLock::new(());

fn files() -> RwLockReadGuard<'static, ()> {
    FORK.read().unwrap_or_else(|e| e.into_inner())
}

fn spawning() -> RwLockWriteGuard<'static, ()> {
    FORK.write().unwrap_or_else(|e| e.into_inner())
}

fn scratch(name: &str) -> PathBuf {
    let dir = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .join("analysis")
        .join(name);
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

fn run(args: &[&str]) -> Output {
    let _g = spawning();
    Command::new(BIN)
        .args(args)
        .output()
        .expect("start flipswarm")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

// ----------------------------------------------------------------------------
// Synthetic trajectories
// ----------------------------------------------------------------------------

/// A synthetic trajectory: initial state, accepted hops (step, to), frustrated
/// attempts (step, to), last step, status, and total-energy drift (hartree).
#[derive(Clone)]
struct Syn {
    index: usize,
    initial: usize,
    hops: Vec<(u64, usize)>,
    frustrated: Vec<(u64, usize)>,
    last: u64,
    status: Status,
    drift: f64,
}

/// Adiabatic energy of state j at step s (hartree; invented).
fn energy(j: usize, _s: u64) -> f64 {
    0.05 * j as f64
}

/// Coordinates at step s: 4 atoms whose bond 0–1, angle 0–1–2 and dihedral
/// 0–1–2–3 are known functions of s (bohr).
fn coords(s: u64) -> Vec<f64> {
    let (d, theta, phi) = geometry_at(s);
    let d = units::angstrom_to_bohr(d);
    let (t, p) = (theta.to_radians(), phi.to_radians());
    // Atom 1 at the origin, atom 0 on +x, atom 2 in the xy plane at angle θ.
    // Atom 3 = atom 2 + a unit bond perpendicular-ish: built so that the
    // dihedral 0-1-2-3 is φ (rotation about the 1→2 axis).
    let a0 = [d, 0.0, 0.0];
    let a1 = [0.0, 0.0, 0.0];
    let a2 = [1.5 * t.cos(), 1.5 * t.sin(), 0.0];
    // Unit vector along 1→2, and the in-plane normal n pointing towards atom 0's side.
    let u = [t.cos(), t.sin(), 0.0];
    let ax = [1.0 - u[0] * u[0], -u[0] * u[1], 0.0]; // x minus its projection on u
    let na = (ax[0] * ax[0] + ax[1] * ax[1]).sqrt();
    let v = [ax[0] / na, ax[1] / na, 0.0]; // in-plane, perpendicular to u, on atom 0's side
    let w = [
        u[1] * v[2] - u[2] * v[1],
        u[2] * v[0] - u[0] * v[2],
        u[0] * v[1] - u[1] * v[0],
    ]; // u × v
    let a3 = [
        a2[0] + p.cos() * v[0] + p.sin() * w[0],
        a2[1] + p.cos() * v[1] + p.sin() * w[1],
        a2[2] + p.cos() * v[2] + p.sin() * w[2],
    ];
    [a0, a1, a2, a3].concat()
}

/// Bond (Å), angle and dihedral (degrees) at step s: invented smooth functions.
fn geometry_at(s: u64) -> (f64, f64, f64) {
    let x = s as f64;
    (1.0 + 0.001 * x, 100.0 + 0.05 * x, -170.0 + 0.9 * x)
}

fn rows_of(
    t: &Syn,
    n_states: usize,
    n_dof: usize,
    dt: f64,
    every: u64,
) -> (Vec<StepRow>, Vec<Hop>) {
    let mut steps: Vec<u64> = (0..=t.last).step_by(every as usize).collect();
    if *steps.last().unwrap() != t.last {
        steps.push(t.last);
    }
    let state_at = |s: u64| t.hops.iter().rfind(|h| h.0 <= s).map_or(t.initial, |h| h.1);
    let e0 = -1.0;
    let rows = steps
        .iter()
        .map(|&s| {
            let a = state_at(s);
            let energies: Vec<f64> = (0..n_states).map(|j| energy(j, s)).collect();
            let q = if n_dof == 12 {
                coords(s)
            } else {
                vec![0.1 * s as f64; n_dof]
            };
            StepRow {
                step: s,
                time: s as f64 * dt,
                q,
                v: vec![0.0; n_dof],
                potential: energies[a],
                energies,
                active: a as u32,
                amplitudes: (0..n_states)
                    .map(|j| Complex64::new(if j == a { 1.0 } else { 0.0 }, 0.0))
                    .collect(),
                kinetic: 0.01,
                total: e0 + t.drift * s as f64 / t.last.max(1) as f64,
            }
        })
        .collect();
    let mut hops = Vec::new();
    let mut from = t.initial;
    let mut all: Vec<(u64, usize, bool)> = t
        .hops
        .iter()
        .map(|&(s, to)| (s, to, true))
        .chain(t.frustrated.iter().map(|&(s, to)| (s, to, false)))
        .collect();
    all.sort();
    for (s, to, accepted) in all {
        let f = if accepted { from } else { state_at(s) };
        hops.push(Hop {
            step: s,
            time: s as f64 * dt,
            from: f,
            to,
            accepted,
            gap: energy(to, s) - energy(f, s),
            kinetic_before: 0.01,
            kinetic_after: 0.01,
        });
        if accepted {
            from = to;
        }
    }
    (rows, hops)
}

fn meta(n_states: usize, n_dof: usize, indices: Vec<usize>, dt: f64) -> PartMeta {
    PartMeta {
        config_toml: "title = \"synthetic analysis test\"\n".into(),
        program_version: "0.1.0".into(),
        created: "2026-12-01T00:00:00Z".into(),
        n_states,
        n_dof,
        masses: vec![1836.0; n_dof],
        slice: (0, 1),
        trajectories: indices,
        timestep_au: dt,
    }
}

fn write_part(path: &Path, trajs: &[Syn], n_states: usize, n_dof: usize, dt: f64, every: u64) {
    let _f = files();
    let mut w = PartWriter::create(
        path,
        &meta(n_states, n_dof, trajs.iter().map(|t| t.index).collect(), dt),
    )
    .unwrap();
    for t in trajs {
        w.begin(&TrajectoryHeader {
            index: t.index,
            q0: vec![0.0; n_dof],
            v0: vec![0.0; n_dof],
            initial_state: t.initial,
            seed: 1,
        })
        .unwrap();
        let (rows, hops) = rows_of(t, n_states, n_dof, dt, every);
        w.append(t.index, &rows, &hops).unwrap();
        w.set_status(t.index, &t.status).unwrap();
    }
    w.close().unwrap();
}

/// The same trajectories as an in-memory ensemble (no files), for the
/// coverage replicates.
fn in_memory(trajs: &[Syn], n_states: usize, dt: f64, every: u64) -> Ensemble {
    let ts = trajs
        .iter()
        .map(|t| {
            let (rows, hops) = rows_of(t, n_states, 1, dt, every);
            Traj {
                index: t.index,
                status: t.status.clone(),
                steps: rows.iter().map(|r| r.step).collect(),
                times: rows.iter().map(|r| r.time).collect(),
                active: rows.iter().map(|r| r.active).collect(),
                pops: rows
                    .iter()
                    .flat_map(|r| r.amplitudes.iter().map(|c| c.norm_sqr()))
                    .collect(),
                total: rows.iter().map(|r| r.total).collect(),
                q: Vec::new(),
                energies: Vec::new(),
                hops,
            }
        })
        .collect();
    Ensemble {
        files: vec![],
        n_states,
        n_dof: 1,
        timestep_au: dt,
        record_every: every,
        pending: 0,
        trajs: ts,
    }
}

/// Time step: 0.5 fs in a.u.; rows every 4 steps (2 fs); 300 fs.
fn dt() -> f64 {
    units::fs_to_au(0.5)
}
const EVERY: u64 = 4;
const LAST: u64 = 600;

/// Hop step for a hop at time t (fs): ceil(t/Δt), never 0.
fn hop_step(t_fs: f64) -> u64 {
    ((t_fs / 0.5).ceil() as u64).max(1)
}

/// n trajectories decaying 1 → 0 at t0 + Exp(τ) (fs), seeded; hops after the end are dropped.
fn exponential_ensemble(n: usize, tau: f64, t0: f64, seed: u64) -> Vec<Syn> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..n)
        .map(|i| {
            let u: f64 = rng.gen_range(f64::EPSILON..1.0);
            let s = hop_step(t0 - tau * u.ln());
            Syn {
                index: i,
                initial: 1,
                hops: if s <= LAST { vec![(s, 0)] } else { vec![] },
                frustrated: vec![],
                last: LAST,
                status: Status::Finished(EndReason::TimeLimit),
                drift: 0.0,
            }
        })
        .collect()
}

/// n trajectories 2 → 1 → 0 with lifetimes τ1, τ2 (fs), seeded.
fn sequential_ensemble(n: usize, tau1: f64, tau2: f64, seed: u64) -> Vec<Syn> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..n)
        .map(|i| {
            let u1: f64 = rng.gen_range(f64::EPSILON..1.0);
            let u2: f64 = rng.gen_range(f64::EPSILON..1.0);
            let t1 = -tau1 * u1.ln();
            let t2 = t1 - tau2 * u2.ln();
            let (s1, s2) = (hop_step(t1), hop_step(t2).max(hop_step(t1) + 1));
            let hops: Vec<(u64, usize)> = [(s1, 1), (s2, 0)]
                .into_iter()
                .filter(|h| h.0 <= LAST)
                .collect();
            Syn {
                index: i,
                initial: 2,
                hops,
                frustrated: vec![],
                last: LAST,
                status: Status::Finished(EndReason::TimeLimit),
                drift: 0.0,
            }
        })
        .collect()
}

fn param(rep: &kinetics::FitReport, name: &str) -> (f64, f64, f64) {
    let p = rep
        .parameters
        .iter()
        .find(|p| p.name == name)
        .unwrap_or_else(|| panic!("no {name}"));
    (p.value, p.lower95, p.upper95)
}

fn window_all(g: &Grid) -> std::ops::Range<usize> {
    0..g.steps.len()
}

// ----------------------------------------------------------------------------
// 1. Kinetics: known lifetimes and bootstrap coverage
// ----------------------------------------------------------------------------

/// Levenberg–Marquardt on noise-free data of a known model returns the model's
/// parameters. Source: common practice (a least-squares solver must reproduce
/// exact data); the curve is exp(−t/τ) with τ = 37 fs, invented.
#[test]
fn levenberg_marquardt_recovers_exact_data() {
    let t: Vec<f64> = (0..60).map(|k| k as f64 * 2.5).collect();
    let y: Vec<f64> = t.iter().map(|x| (-x / 37.0).exp()).collect();
    let r = levenberg_marquardt(
        |p, r| {
            for k in 0..t.len() {
                r[k] = (-t[k] / p[0].exp()).exp() - y[k];
            }
        },
        t.len(),
        &[100f64.ln()],
        200,
    );
    assert!(r.converged);
    assert!(
        (r.params[0].exp() - 37.0).abs() < 1e-6,
        "τ = {}",
        r.params[0].exp()
    );
    assert!(r.cost < 1e-20);
}

/// The sequential model's curves: A + B + C = 1; B peaks at
/// t_max = ln(k1/k2)/(k1 − k2) with B(t_max) = (k1/k2)^(k2/(k2−k1)); the
/// equal-rate limit k t e^{−kt} peaks at 1/k with value 1/e. Source: textbook
/// solution of consecutive first-order reactions (physical chemistry texts).
#[test]
fn sequential_model_matches_textbook_solution() {
    let m = Model::Sequential { a: 2, b: 1, c: 0 };
    let (tau1, tau2) = (30.0, 80.0);
    let (k1, k2): (f64, f64) = (1.0 / tau1, 1.0 / tau2);
    let tmax = (k1 / k2).ln() / (k1 - k2);
    let mut out = [0.0; 3];
    m.eval(&[tau1, tau2], tmax, &mut out);
    assert!(
        (out[1] - (k1 / k2).powf(k2 / (k2 - k1))).abs() < 1e-12,
        "B(t_max) = {}",
        out[1]
    );
    for t in [0.0, 5.0, 50.0, 400.0] {
        m.eval(&[tau1, tau2], t, &mut out);
        assert!((out.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!((out[0] - (-t / tau1).exp()).abs() < 1e-15);
    }
    // A maximum: lower on both sides.
    let mut side = [0.0; 3];
    for t in [tmax - 1.0, tmax + 1.0] {
        m.eval(&[tau1, tau2], t, &mut side);
        assert!(side[1] < (k1 / k2).powf(k2 / (k2 - k1)));
    }
    m.eval(&[50.0, 50.0], 50.0, &mut out);
    assert!(
        (out[1] - (-1.0f64).exp()).abs() < 1e-12,
        "equal rates: B(τ) = {}",
        out[1]
    );
}

/// A decay with τ = 40 fs written to a part file: `analyze --fit decay:1`
/// recovers τ within 3 standard errors (τ/√N for an exponential sample) and
/// its 95 % interval covers it; the binary and the library agree; a delayed
/// decay (t0 = 12 fs) with `--delay` recovers both. Source: survival function
/// of the exponential distribution (probability textbooks).
#[test]
fn exponential_lifetime_recovered_from_part_files() {
    let dir = scratch("exp_recover");
    let n = 400;
    let tau = 40.0;
    let trajs = exponential_ensemble(n, tau, 0.0, 7);
    let part = dir.join("part-0000-of-0001.h5");
    write_part(&part, &trajs, 2, 1, dt(), EVERY);
    let o = run(&[
        "analyze",
        dir.to_str().unwrap(),
        "--fit",
        "decay:1",
        "--resamples",
        "200",
        "--json",
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: Value = serde_json::from_str(&stdout(&o)).expect("JSON");
    let fit = &v["fits"][0]["parameters"][0];
    let (est, lo, hi) = (
        fit["value"].as_f64().unwrap(),
        fit["lower95"].as_f64().unwrap(),
        fit["upper95"].as_f64().unwrap(),
    );
    eprintln!("decay: τ fitted {est:.3} fs [{lo:.3}, {hi:.3}], true {tau}");
    assert!(
        (est - tau).abs() < 3.0 * tau / (n as f64).sqrt(),
        "τ = {est}"
    );
    assert!(lo < tau && tau < hi, "[{lo}, {hi}]");
    assert!(v["fits"][0]["r_squared"].as_f64().unwrap() > 0.99);
    // Library on the same file gives the same numbers.
    let ens = {
        let _f = files();
        flipswarm::analysis::data::load(std::slice::from_ref(&dir), &Default::default()).unwrap()
    };
    let a = analyse(
        &ens,
        &Options {
            fits: vec![Model::Decay {
                state: 1,
                delay: false,
            }],
            resamples: 200,
            ..Options::default()
        },
    )
    .unwrap();
    assert_eq!(param(&a.fits[0], "tau_fs"), (est, lo, hi));

    // With a delay.
    let dir2 = scratch("exp_delay");
    let trajs = exponential_ensemble(n, tau, 12.0, 8);
    write_part(
        &dir2.join("part-0000-of-0001.h5"),
        &trajs,
        2,
        1,
        dt(),
        EVERY,
    );
    let ens = {
        let _f = files();
        flipswarm::analysis::data::load(&[dir2], &Default::default()).unwrap()
    };
    let a = analyse(
        &ens,
        &Options {
            fits: vec![Model::Decay {
                state: 1,
                delay: true,
            }],
            resamples: 200,
            ..Options::default()
        },
    )
    .unwrap();
    let (t_est, t_lo, t_hi) = param(&a.fits[0], "tau_fs");
    let (d_est, d_lo, d_hi) = param(&a.fits[0], "t0_fs");
    eprintln!("delayed decay: τ {t_est:.3} [{t_lo:.3}, {t_hi:.3}] (true 40), t0 {d_est:.3} [{d_lo:.3}, {d_hi:.3}] (true 12)");
    assert!((t_est - tau).abs() < 3.0 * tau / (n as f64).sqrt());
    assert!((d_est - 12.0).abs() < 3.0, "t0 = {d_est}");
    assert!(t_lo < tau && tau < t_hi && d_lo < 12.0 && 12.0 < d_hi);
}

/// Over 100 seeded replicates of 200 trajectories (τ = 40 fs), the 95 %
/// bootstrap interval (200 resamples per replicate, fewer than the default
/// 1000 to keep the test fast) covers the true τ in at least 88. Source: the
/// nominal coverage of a 95 % interval; for a binomial(100, 0.95) count,
/// P(X < 88) ≈ 0.001 (common practice).
#[test]
fn exponential_bootstrap_interval_covers_truth() {
    let tau = 40.0;
    let mut covered = 0;
    let mut mean = 0.0;
    for rep in 0..100u64 {
        let ens = in_memory(
            &exponential_ensemble(200, tau, 0.0, 1000 + rep),
            2,
            dt(),
            EVERY,
        );
        let g = Grid::new(&ens, Ended::Hold);
        let f = kinetics::fit(
            &g,
            window_all(&g),
            &Model::Decay {
                state: 1,
                delay: false,
            },
            200,
            rep,
        )
        .unwrap();
        let (v, lo, hi) = param(&f, "tau_fs");
        mean += v / 100.0;
        if lo <= tau && tau <= hi {
            covered += 1;
        }
    }
    eprintln!("exponential: 95% bootstrap interval covered τ = {tau} fs in {covered}/100 replicates; mean fitted τ {mean:.3} fs");
    assert!(covered >= 88, "covered {covered}/100");
    assert!((mean - tau).abs() < 0.03 * tau, "mean τ {mean}");
}

/// A → B → C with τ1 = 30 fs, τ2 = 80 fs: the fit recovers both lifetimes
/// from a 400-trajectory part file; over 100 replicates of 200 trajectories
/// (200 resamples each) the intervals cover each true value in at least 88.
/// Source: textbook solution of consecutive first-order reactions; coverage
/// bound as in the exponential test.
#[test]
fn sequential_lifetimes_recovered_and_covered() {
    let (tau1, tau2) = (30.0, 80.0);
    let dir = scratch("seq_recover");
    write_part(
        &dir.join("part-0000-of-0001.h5"),
        &sequential_ensemble(400, tau1, tau2, 3),
        3,
        1,
        dt(),
        EVERY,
    );
    let o = run(&[
        "analyze",
        dir.to_str().unwrap(),
        "--fit",
        "seq:2,1,0",
        "--resamples",
        "200",
        "--json",
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: Value = serde_json::from_str(&stdout(&o)).expect("JSON");
    let ps = &v["fits"][0]["parameters"];
    let t1 = ps[0]["value"].as_f64().unwrap();
    let t2 = ps[1]["value"].as_f64().unwrap();
    eprintln!("sequential from file: τ1 {t1:.3} (true 30), τ2 {t2:.3} (true 80)");
    assert!((t1 - tau1).abs() < 3.0 * tau1 / 20.0, "τ1 = {t1}");
    assert!((t2 - tau2).abs() < 3.0 * tau2 / 20.0, "τ2 = {t2}");
    let (mut c1, mut c2) = (0, 0);
    for rep in 0..100u64 {
        let ens = in_memory(
            &sequential_ensemble(200, tau1, tau2, 5000 + rep),
            3,
            dt(),
            EVERY,
        );
        let g = Grid::new(&ens, Ended::Hold);
        let f = kinetics::fit(
            &g,
            window_all(&g),
            &Model::Sequential { a: 2, b: 1, c: 0 },
            200,
            rep,
        )
        .unwrap();
        let (_, l1, h1) = param(&f, "tau1_fs");
        let (_, l2, h2) = param(&f, "tau2_fs");
        c1 += usize::from(l1 <= tau1 && tau1 <= h1);
        c2 += usize::from(l2 <= tau2 && tau2 <= h2);
    }
    eprintln!("sequential: intervals covered τ1 in {c1}/100, τ2 in {c2}/100");
    assert!(c1 >= 88 && c2 >= 88, "covered τ1 {c1}/100, τ2 {c2}/100");
}

// ----------------------------------------------------------------------------
// 2. Populations
// ----------------------------------------------------------------------------

/// Wilson score intervals against the worked examples of Stat. Med. 17, 857
/// (1998) (values from memory, 4 decimals): 81/263 → (0.2553, 0.3662),
/// 15/148 → (0.0624, 0.1605), 0/20 → (0, 0.1611), 1/29 → (0.0061, 0.1718).
#[test]
fn wilson_intervals_match_published_examples() {
    for (k, n, lo, hi) in [
        (81.0, 263.0, 0.2553, 0.3662),
        (15.0, 148.0, 0.0624, 0.1605),
        (0.0, 20.0, 0.0, 0.1611),
        (1.0, 29.0, 0.0061, 0.1718),
    ] {
        let (l, h) = wilson(k, n, Z95);
        assert!(
            (l - lo).abs() < 6e-5 && (h - hi).abs() < 6e-5,
            "{k}/{n}: ({l:.5}, {h:.5})"
        );
    }
}

/// Hand-counted populations under both policies: A on state 1 to the end, B
/// ends early (exit) on state 0 at step 8, C hops 1 → 0 at step 6 and runs to
/// the end, D fails (left out, listed). At step 12: hold counts A, B, C
/// (fractions 1/3, 2/3 on states 1, 0), drop counts A, C (1/2, 1/2). Mean
/// |c|² equals the fractions here (|c|² = 1 on the active state). Energy
/// drifts of 0, 1e-4, 2e-4 hartree give mean and largest drift in eV.
/// Source: the definitions (common practice).
#[test]
fn ended_and_failed_policies_count_as_documented() {
    let fin = Status::Finished(EndReason::TimeLimit);
    let trajs = vec![
        Syn {
            index: 0,
            initial: 1,
            hops: vec![],
            frustrated: vec![],
            last: 12,
            status: fin.clone(),
            drift: 0.0,
        },
        Syn {
            index: 1,
            initial: 1,
            hops: vec![(3, 0)],
            frustrated: vec![],
            last: 8,
            status: Status::Finished(EndReason::ExitLow),
            drift: 1e-4,
        },
        Syn {
            index: 2,
            initial: 1,
            hops: vec![(6, 0)],
            frustrated: vec![(2, 0)],
            last: 12,
            status: fin,
            drift: 2e-4,
        },
        Syn {
            index: 3,
            initial: 1,
            hops: vec![],
            frustrated: vec![],
            last: 4,
            status: Status::Failed {
                step: 4,
                reason: "invented failure".into(),
            },
            drift: 5.0,
        },
    ];
    let ens = in_memory(&trajs, 2, 1.0, 2);
    for (policy, n_end, f1) in [(Ended::Hold, 3, 1.0 / 3.0), (Ended::Drop, 2, 0.5)] {
        let a = analyse(
            &ens,
            &Options {
                ended: policy,
                ..Options::default()
            },
        )
        .unwrap();
        let p = &a.populations;
        assert_eq!(p.times_fs.len(), 7, "grid 0, 2, …, 12");
        assert_eq!(p.used, vec![3, 3, 3, 3, 3, n_end, n_end], "{policy:?}");
        assert_eq!(p.fraction[0], vec![0.0, 1.0]);
        assert!(
            (p.fraction[3][1] - 1.0 / 3.0).abs() < 1e-15,
            "step 6: C and B on 0, A on 1"
        ); // B hopped at 3, C at 6
        assert!(
            (p.fraction[6][1] - f1).abs() < 1e-15,
            "{policy:?}: {:?}",
            p.fraction[6]
        );
        assert_eq!(p.mean_population[6], p.fraction[6]);
        assert_eq!(a.failed.len(), 1);
        assert_eq!((a.failed[0].trajectory, a.failed[0].step), (3, 4));
        assert_eq!(a.trajectories_used, 3);
        let e1 = units::hartree_to_ev(1e-4);
        let e2 = units::hartree_to_ev(2e-4);
        assert!((a.energy.mean_max_drift_ev - (e1 + e2) / 3.0).abs() < 1e-12);
        assert!((a.energy.max_drift_ev - e2).abs() < 1e-12);
        assert_eq!(a.energy.worst_trajectory, Some(2));
        // Hops: 2 accepted 1→0, one frustrated 1→0; the failed one not counted.
        assert_eq!(a.hops.pairs.len(), 1);
        assert_eq!(
            (a.hops.pairs[0].accepted, a.hops.pairs[0].frustrated),
            (2, 1)
        );
        assert!((a.hops.pairs[0].mean_abs_gap_ev - units::hartree_to_ev(0.05)).abs() < 1e-12);
        assert_eq!(a.hops.histogram.counts.iter().sum::<usize>(), 2);
    }
    // The Wilson band of the last point of the hold policy is that of 1 in 3.
    let g = Grid::new(&ens, Ended::Hold);
    let p = Populations::new(&g, 6..7, &[1]);
    assert_eq!((p.lower[0][0], p.upper[0][0]), wilson(1.0, 3.0, Z95));
}

/// A small Tully model 1 ensemble (J. Chem. Phys. 93, 1061 (1990)) run with
/// `run -o`: the fractions `analyze` reports at the last time equal the state
/// fractions (branching ratios summed over channels) and mean |c|² `run`
/// printed, the trajectory count equals the finished count, and the hop
/// counts agree. Source: `flipswarm run`'s own summary of the same files.
#[test]
fn tully1_populations_equal_run_branching_ratios() {
    let dir = scratch("tully1");
    let ens = dir.join("ens.toml");
    std::fs::write(
        &ens,
        r#"title = "analysis test: Tully 1"
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
[output]
record_every_steps = 5
[swarm]
trajectories = 60
seed = 4242
"#,
    )
    .unwrap();
    let out = dir.join("run");
    let o = run(&[
        "run",
        ens.to_str().unwrap(),
        "-o",
        out.to_str().unwrap(),
        "--json",
        "-q",
        "--threads",
        "1",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let r: Value = serde_json::from_str(&stdout(&o)).unwrap();
    let s = &r["summary"];
    let o = run(&["analyze", out.to_str().unwrap(), "--json", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let a: Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert_eq!(a["final_trajectories"], s["finished"]);
    let fr = a["final_fractions"].as_array().unwrap();
    let want = s["state_fractions"].as_array().unwrap();
    assert_eq!(fr.len(), 2);
    let mut seen_both = true;
    for (k, (got, w)) in fr.iter().zip(want).enumerate() {
        let (g, w0) = (got["fraction"].as_f64().unwrap(), w[0].as_f64().unwrap());
        eprintln!("Tully 1 state {k}: analyze {g:.4}, run {w0:.4}");
        assert!((g - w0).abs() < 1e-12, "state {k}: analyze {g}, run {w0}");
        let (gp, wp) = (
            got["mean_population"].as_f64().unwrap(),
            s["mean_populations"][k].as_f64().unwrap(),
        );
        assert!(
            (gp - wp).abs() < 1e-12,
            "state {k} |c|²: analyze {gp}, run {wp}"
        );
        seen_both &= w0 > 0.0;
    }
    assert!(
        seen_both,
        "the test ensemble should populate both states: {want:?}"
    );
    let acc: u64 = a["hops"]["pairs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["accepted"].as_u64().unwrap())
        .sum();
    let fru: u64 = a["hops"]["pairs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["frustrated"].as_u64().unwrap())
        .sum();
    assert_eq!(
        (acc, fru),
        (
            s["hops_accepted"].as_u64().unwrap(),
            s["hops_frustrated"].as_u64().unwrap()
        )
    );
}

// ----------------------------------------------------------------------------
// 3. Hops and geometry
// ----------------------------------------------------------------------------

/// Internal coordinates of hand-placed atoms: bond 1.2 Å; angle 90°; the
/// torsion of a +90° arrangement looking along j → k is +90°, its mirror
/// −90°, trans 180°. Source: definitions of bond, angle and torsion angle
/// (IUPAC sign convention, from memory).
#[test]
fn internal_coordinates_of_known_geometries() {
    let b = units::angstrom_to_bohr(1.2);
    let q = [b, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0, 1.0, 1.0];
    assert!((Param::Bond([0, 1]).value(&q) - 1.2).abs() < 1e-12);
    assert!((Param::Angle([0, 1, 2]).value(&q) - 90.0).abs() < 1e-12);
    assert!((Param::Dihedral([0, 1, 2, 3]).value(&q) - 90.0).abs() < 1e-9);
    let mirror = [b, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0, -1.0, 1.0];
    assert!((Param::Dihedral([0, 1, 2, 3]).value(&mirror) + 90.0).abs() < 1e-9);
    let trans = [1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0, -1.0, 0.0, 1.0];
    assert!((Param::Dihedral([0, 1, 2, 3]).value(&trans).abs() - 180.0).abs() < 1e-9);
}

/// Bond, angle and dihedral at hops from a part file of four atoms whose
/// geometry is a known function of the step: with rows every step the values
/// are those at the hop step; with rows every 4 steps, those of the nearest
/// row. The CSV has one line per attempt. Source: the construction of the
/// synthetic geometry (common practice).
#[test]
fn geometry_at_hops_from_part_files() {
    for every in [1u64, 4] {
        let dir = scratch(&format!("geometry_{every}"));
        let fin = Status::Finished(EndReason::TimeLimit);
        let trajs = vec![
            Syn {
                index: 0,
                initial: 2,
                hops: vec![(9, 1), (31, 0)],
                frustrated: vec![(5, 1)],
                last: 60,
                status: fin.clone(),
                drift: 0.0,
            },
            Syn {
                index: 1,
                initial: 2,
                hops: vec![(21, 1)],
                frustrated: vec![],
                last: 60,
                status: fin,
                drift: 0.0,
            },
        ];
        write_part(
            &dir.join("part-0000-of-0001.h5"),
            &trajs,
            3,
            12,
            dt(),
            every,
        );
        let out = dir.join("out");
        let o = run(&[
            "analyze",
            dir.to_str().unwrap(),
            "--bond",
            "0,1",
            "--angle",
            "0,1,2",
            "--dihedral",
            "0,1,2,3",
            "--out",
            out.to_str().unwrap(),
            "--json",
            "-q",
        ]);
        assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
        let csv = std::fs::read_to_string(out.join("hops.csv")).unwrap();
        let mut lines = csv.lines();
        assert_eq!(lines.next().unwrap(), "trajectory,time_fs,step,from,to,accepted,gap_ev,geometry_step,bond_0_1_angstrom,angle_0_1_2_deg,dihedral_0_1_2_3_deg");
        let rows: Vec<Vec<String>> = lines
            .map(|l| l.split(',').map(String::from).collect())
            .collect();
        assert_eq!(rows.len(), 4);
        for r in &rows {
            let step: u64 = r[2].parse().unwrap();
            let nearest = if every == 1 {
                step
            } else {
                ((step as f64 / every as f64).round() as u64) * every
            };
            let used: u64 = r[7].parse().unwrap();
            assert_eq!(used, nearest, "row {r:?}");
            let (d, th, ph) = geometry_at(used);
            let got: Vec<f64> = r[8..11].iter().map(|x| x.parse().unwrap()).collect();
            assert!(
                (got[0] - d).abs() < 2e-6
                    && (got[1] - th).abs() < 2e-6
                    && (got[2] - ph).abs() < 2e-6,
                "{r:?} vs {:?}",
                (d, th, ph)
            );
        }
    }
}

// ----------------------------------------------------------------------------
// 4. Files and figures
// ----------------------------------------------------------------------------

fn png_size(bytes: &[u8]) -> (u32, u32) {
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "PNG signature");
    assert_eq!(&bytes[12..16], b"IHDR");
    (
        u32::from_be_bytes(bytes[16..20].try_into().unwrap()),
        u32::from_be_bytes(bytes[20..24].try_into().unwrap()),
    )
}

/// `--out` writes tables and figures: every SVG parses as XML with an `svg`
/// root of the requested width and height and holds the axis labels; every
/// PNG has the requested size; CSVs have their headers; a second run is
/// refused (exit 2, files untouched) and `--force` overwrites. Source: PNG
/// specification (signature, IHDR width/height big-endian) and the SVG
/// format (XML); common practice.
#[test]
fn figures_and_tables_are_valid_files() {
    let dir = scratch("figures");
    write_part(
        &dir.join("part-0000-of-0001.h5"),
        &exponential_ensemble(120, 40.0, 0.0, 11),
        2,
        1,
        dt(),
        EVERY,
    );
    let out = dir.join("out");
    let args = [
        "analyze",
        dir.to_str().unwrap(),
        "--fit",
        "decay:1",
        "--resamples",
        "50",
        "--out",
        out.to_str().unwrap(),
        "--size",
        "800x500",
        "--trajectory",
        "3",
        "-q",
    ];
    let o = run(&args);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(stdout(&o).contains("decay of state 1"), "{}", stdout(&o));
    for name in ["populations", "hop_times", "energy_trajectory_3"] {
        let svg = std::fs::read_to_string(out.join(format!("{name}.svg"))).unwrap();
        let doc = roxmltree::Document::parse(&svg).unwrap_or_else(|e| panic!("{name}.svg: {e}"));
        let root = doc.root_element();
        assert_eq!(root.tag_name().name(), "svg");
        assert_eq!(root.attribute("width"), Some("800"));
        assert_eq!(root.attribute("height"), Some("500"));
        let text: String = doc
            .descendants()
            .filter(|n| n.is_text())
            .map(|n| n.text().unwrap_or(""))
            .collect();
        assert!(text.contains("time (fs)"), "{name}.svg lacks the x label");
        let png = std::fs::read(out.join(format!("{name}.png"))).unwrap();
        assert_eq!(png_size(&png), (800, 500), "{name}.png");
    }
    let svg = std::fs::read_to_string(out.join("energy_trajectory_3.svg")).unwrap();
    assert!(svg.contains("energy (eV)"));
    let pops = std::fs::read_to_string(out.join("populations.csv")).unwrap();
    assert!(pops.starts_with("time_fs,trajectories,fraction_0,fraction_0_lower95,fraction_0_upper95,mean_population_0,fraction_1"));
    assert_eq!(pops.lines().count(), 1 + (LAST / EVERY) as usize + 1);
    let summary: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("summary.json")).unwrap()).unwrap();
    assert_eq!(summary["trajectories_used"], 120);
    let before = std::fs::read(out.join("populations.png")).unwrap();
    let o = run(&args);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("exists") && stderr(&o).contains("--force"),
        "{}",
        stderr(&o)
    );
    assert_eq!(std::fs::read(out.join("populations.png")).unwrap(), before);
    let mut forced = args.to_vec();
    forced.push("--force");
    let o = run(&forced);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
}

/// Selectors: `--trajectories 0-49` reads 50 trajectories; `--from-fs 10
/// --to-fs 50` limits the population rows to grid times in [10, 50] fs and
/// the hops to those at times in it (counted here from the synthetic hop
/// steps); `--states 1` reports only state 1; `--ended drop` is recorded in
/// the summary. Source: the definitions of the options (common practice).
#[test]
fn selectors_restrict_trajectories_window_and_states() {
    let dir = scratch("selectors");
    let trajs = exponential_ensemble(120, 40.0, 0.0, 21);
    write_part(&dir.join("part-0000-of-0001.h5"), &trajs, 2, 1, dt(), EVERY);
    let out = dir.join("out");
    let o = run(&[
        "analyze",
        dir.to_str().unwrap(),
        "--trajectories",
        "0-49",
        "--from-fs",
        "10",
        "--to-fs",
        "50",
        "--states",
        "1",
        "--ended",
        "drop",
        "--json",
        "-q",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert_eq!(v["trajectories_read"], 50);
    assert_eq!(v["ended_policy"], "drop");
    assert_eq!(v["window_fs"][0].as_f64().unwrap(), 10.0);
    assert_eq!(v["window_fs"][1].as_f64().unwrap(), 50.0);
    let fr = v["final_fractions"].as_array().unwrap();
    assert_eq!(fr.len(), 1);
    assert_eq!(fr[0]["state"], 1);
    let still = trajs[..50]
        .iter()
        .filter(|t| t.hops.first().is_none_or(|h| h.0 as f64 * 0.5 > 50.0))
        .count();
    assert!((fr[0]["fraction"].as_f64().unwrap() - still as f64 / 50.0).abs() < 1e-15);
    let in_window = trajs[..50]
        .iter()
        .flat_map(|t| &t.hops)
        .filter(|h| (10.0..=50.0).contains(&(h.0 as f64 * 0.5)))
        .count();
    let acc: u64 = v["hops"]["pairs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["accepted"].as_u64().unwrap())
        .sum();
    assert_eq!(acc as usize, in_window);
    let csv = std::fs::read_to_string(out.join("populations.csv")).unwrap();
    let times: Vec<f64> = csv
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap().parse().unwrap())
        .collect();
    assert_eq!(times.len(), 21, "10, 12, …, 50 fs");
    assert_eq!((times[0], times[20]), (10.0, 50.0));
    assert!(
        csv.lines().next().unwrap().ends_with("mean_population_1") && !csv.contains("fraction_0")
    );
}

// ----------------------------------------------------------------------------
// 5. Bad input
// ----------------------------------------------------------------------------

/// Runs analyze expecting exit 2, no panic, nothing on stdout and every `needle` in the message.
fn refused(args: &[&str], needles: &[&str]) {
    let o = run(args);
    let e = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{args:?}: {e}");
    assert!(!e.contains("panicked"), "{e}");
    assert!(stdout(&o).is_empty(), "{}", stdout(&o));
    for n in needles {
        assert!(e.contains(n), "{args:?}: message lacks `{n}`: {e}");
    }
}

/// Each bad input is refused with exit code 2 and a message naming the file or
/// option and what is wrong: a missing file, an empty directory, a part whose
/// trajectories never started, parts with different state counts, a time
/// window outside the data, an atom index out of range, coordinates that are
/// not atoms, a state that does not exist, a malformed fit. Source: the
/// project's exit-code convention (README).
#[test]
fn bad_input_is_refused_with_exit_code_2() {
    let dir = scratch("bad");
    let missing = dir.join("nope.h5");
    refused(
        &["analyze", missing.to_str().unwrap()],
        &["nope.h5", "no such file"],
    );
    let empty_dir = dir.join("empty_dir");
    std::fs::create_dir_all(&empty_dir).unwrap();
    refused(
        &["analyze", empty_dir.to_str().unwrap()],
        &["empty_dir", "no part files"],
    );
    // Trajectories listed but none begun.
    let empty = dir.join("empty.h5");
    {
        let _f = files();
        PartWriter::create(&empty, &meta(2, 1, vec![0, 1], dt()))
            .unwrap()
            .close()
            .unwrap();
    }
    refused(
        &["analyze", empty.to_str().unwrap()],
        &["empty.h5", "empty"],
    );
    // Mismatched state counts.
    let two = dir.join("two.h5");
    let three = dir.join("three.h5");
    let fin = Status::Finished(EndReason::TimeLimit);
    let one = |i| {
        vec![Syn {
            index: i,
            initial: 1,
            hops: vec![],
            frustrated: vec![],
            last: 40,
            status: fin.clone(),
            drift: 0.0,
        }]
    };
    write_part(&two, &one(0), 2, 12, dt(), EVERY);
    write_part(&three, &one(1), 3, 12, dt(), EVERY);
    refused(
        &["analyze", two.to_str().unwrap(), three.to_str().unwrap()],
        &["three.h5", "3 electronic states", "two.h5", "2"],
    );
    let p = two.to_str().unwrap();
    refused(
        &["analyze", p, "--from-fs", "5000"],
        &["--from-fs", "outside the data"],
    );
    refused(
        &["analyze", p, "--from-fs", "10", "--to-fs", "5"],
        &["--from-fs", "--to-fs"],
    );
    refused(
        &["analyze", p, "--bond", "0,7"],
        &["--bond 0,7", "atom index 7", "4 atoms"],
    );
    refused(
        &["analyze", p, "--dihedral", "0,1,2"],
        &["--dihedral", "4 atom indices"],
    );
    refused(&["analyze", p, "--states", "0,5"], &["--states", "state 5"]);
    refused(&["analyze", p, "--fit", "decay:4"], &["--fit", "state 4"]);
    refused(
        &["analyze", p, "--fit", "exponential"],
        &["--fit", "decay:STATE"],
    );
    refused(&["analyze", p, "--trajectory", "9"], &["--trajectory 9"]);
    refused(
        &["analyze", p, "--trajectories", "5-9"],
        &["two.h5", "--trajectories"],
    );
    refused(&["analyze", p, "--size", "10x10"], &["--size"]);
    // Coordinates that are not atoms.
    let odd = dir.join("odd.h5");
    write_part(&odd, &one(0), 2, 5, dt(), EVERY);
    refused(
        &["analyze", odd.to_str().unwrap(), "--angle", "0,1,2"],
        &["--angle 0,1,2", "5 coordinates", "multiple of 3"],
    );
}
