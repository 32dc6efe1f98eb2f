//! The initial-condition chain through the command line: `modes` →
//! `sample` (Wigner, excitation, state selection) → `run` → `analyze`, and
//! `spectrum`.
//!
//! Sources: the harmonic Wigner distribution ⟨Q²⟩ = (ħ/2ω) coth(ħω/2kT),
//! ⟨P²⟩ = (ħω/2) coth(ħω/2kT) (Phys. Rep. 106, 121 (1984)); the LVC model's
//! own frequencies (its ground state is harmonic up to the weak S0–S1
//! coupling, whose second-order shift we compute analytically below);
//! oscillator strengths f = (2/3) ΔE |μ|² (common practice); the sum rule of
//! the nuclear-ensemble spectrum (Theor. Chem. Acc. 131, 1237 (2012), from
//! memory) with the prefactor πe²ħ/(2 m_e c ε₀) = 1.0976 eV·Å².

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use flipswarm::sampling::files::{InitialConditions, ModesFile};

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");
/// eV per hartree, CODATA 2018.
const EV: f64 = 27.211_386_245_988;

fn scratch(name: &str) -> PathBuf {
    common::scratch("ic", name)
}

fn run_in(dir: &Path, args: &[&str]) -> (i32, String, String) {
    let out = Command::new(BIN)
        .current_dir(dir)
        .args(args)
        .env("FLIPSWARM_LOG", "warn")
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// A two-mode, three-state LVC model of our own (invented numbers) with
/// dipoles; S0 is uncoupled so its Hessian is exactly diag(ω²).
const MODEL: &str = r#"
description = "test: two modes, three states"
frequencies_ev = [0.10, 0.25]
vertical_ev = [0.0, 4.0, 4.4]
[[gradient]]
state = 1
mode = 0
value_ev = -0.12
[[gradient]]
state = 2
mode = 0
value_ev = 0.10
[[coupling]]
states = [1, 2]
mode = 1
value_ev = 0.08
[[dipole]]
states = [0, 1]
value_au = [0.0, 0.2, 0.0]
[[dipole]]
states = [0, 2]
value_au = [0.7, 0.0, 0.3]
"#;

const ENSEMBLE: &str = r#"
[model]
kind = "lvc"
file = "model.toml"
[start]
sampling = "wigner"
[dynamics]
timestep_fs = 0.2
duration_fs = 10.0
[swarm]
trajectories = 10
seed = 1
"#;

fn setup(name: &str) -> PathBuf {
    let d = scratch(name);
    std::fs::write(d.join("model.toml"), MODEL).unwrap();
    std::fs::write(d.join("ensemble.toml"), ENSEMBLE).unwrap();
    d
}

// modes → sample → run → analyze on an LVC model (issue: end to end).
#[test]
fn modes_sample_excite_run_analyze() {
    let d = setup("chain");
    let (c, out, err) = run_in(&d, &["modes", "ensemble.toml", "-o", "modes.toml"]);
    assert_eq!(c, 0, "{err}");
    assert!(out.contains("2 modes"), "{out}");
    // Source: the model's frequencies (0.10 and 0.25 eV); the FD Hessian of
    // the exactly harmonic S0 reproduces them to rounding (1e-6 relative).
    let modes = ModesFile::read(&d.join("modes.toml")).unwrap();
    let w: Vec<f64> = modes.mode.iter().map(|m| m.omega_hartree * EV).collect();
    assert!(
        (w[0] - 0.10).abs() < 1e-7 && (w[1] - 0.25).abs() < 2e-7,
        "{w:?}"
    );
    assert!(modes.gradient_norm_hartree_bohr < 1e-12);

    let n = 4000;
    let (c, out, err) = run_in(
        &d,
        &[
            "sample",
            "modes.toml",
            "-n",
            &n.to_string(),
            "--seed",
            "11",
            "--excite",
            "ensemble.toml",
            "--window-ev",
            "3.5:5.0",
            "-o",
            "ic.h5",
        ],
    );
    assert_eq!(c, 0, "{err}");
    assert!(out.contains("4000 initial conditions"), "{out}");
    let ic = InitialConditions::read(&d.join("ic.h5")).unwrap();
    assert_eq!(ic.len(), n);
    // Wigner widths at T = 0 (unit masses, mass-weighted coordinates):
    // ⟨x²⟩ = 1/(2ω), ⟨v²⟩ = ω/2, within 4 standard errors of a variance.
    for (k, &wk) in [0.10 / EV, 0.25 / EV].iter().enumerate() {
        let var_x = ic.positions.iter().map(|q| q[k] * q[k]).sum::<f64>() / n as f64;
        let var_v = ic.velocities.iter().map(|v| v[k] * v[k]).sum::<f64>() / n as f64;
        let se = (2.0 / n as f64).sqrt() * 4.0;
        assert!(
            (var_x * 2.0 * wk - 1.0).abs() < se,
            "mode {k}: ⟨x²⟩ = {var_x} vs {}",
            0.5 / wk
        );
        assert!(
            (var_v * 2.0 / wk - 1.0).abs() < se,
            "mode {k}: ⟨v²⟩ = {var_v} vs {}",
            0.5 * wk
        );
    }
    // Oscillator strengths f = (2/3) ΔE |μ|²: at a geometry where the
    // diabatic states do not mix (S0 uncoupled; S1/S2 mix only through
    // mode 1), check the sum over states, which is invariant under the S1/S2
    // rotation only when ΔE1 = ΔE2 — so check instead the bound
    // f1 + f2 ≤ (2/3) ΔE_max (|μ01|² + |μ02|²).
    let x = ic.excitation.as_ref().unwrap();
    let mu2 = 0.2f64.powi(2) + 0.7f64.powi(2) + 0.3f64.powi(2);
    for (e, f) in x.energies.iter().zip(&x.oscillator_strengths) {
        let bound = 2.0 / 3.0 * e[2] * mu2 * (1.0 + 1e-12);
        assert!(
            f[1] >= 0.0 && f[2] >= 0.0 && f[1] + f[2] <= bound,
            "{f:?} vs {bound}"
        );
        assert!(f[1] + f[2] >= 2.0 / 3.0 * e[1] * mu2 * (1.0 - 1e-12));
    }
    // State selection: the fraction starting on state n is mean(f_n)/F_max
    // (all transitions lie in the window here) within 4 binomial errors.
    let fmax = x
        .energies
        .iter()
        .zip(&x.oscillator_strengths)
        .map(|(_, f)| f[1] + f[2])
        .fold(0.0, f64::max);
    for s in 1..3 {
        let p = x.oscillator_strengths.iter().map(|f| f[s]).sum::<f64>() / n as f64 / fmax;
        let got = x.initial_state.iter().filter(|t| **t == Some(s)).count() as f64 / n as f64;
        let se = (p * (1.0 - p) / n as f64).sqrt();
        assert!(
            (got - p).abs() < 4.0 * se + 1e-12,
            "state {s}: {got} vs {p}"
        );
    }

    // run from the file: every trajectory starts on its selected state
    std::fs::write(
        d.join("run.toml"),
        "[model]\nkind = \"lvc\"\nfile = \"model.toml\"\n[start]\nsampling = \"file\"\ninitial_conditions = \"ic.h5\"\n[dynamics]\ntimestep_fs = 0.2\nduration_fs = 4.0\n[swarm]\ntrajectories = 40\nseed = 3\n",
    )
    .unwrap();
    let (c, _, err) = run_in(&d, &["run", "run.toml", "-o", "out"]);
    assert_eq!(c, 0, "{err}");
    assert!(
        d.join("out/initial-conditions.h5").exists(),
        "the run directory keeps its own copy"
    );
    let reader =
        flipswarm::ensemble::h5::PartReader::open(&d.join("out/part-0000-of-0001.h5")).unwrap();
    let chosen: Vec<usize> = x.initial_state.iter().filter_map(|s| *s).take(40).collect();
    let rows: Vec<usize> = (0..n)
        .filter(|&i| x.initial_state[i].is_some())
        .take(40)
        .collect();
    for i in reader.trajectory_indices() {
        let data = reader.read(i).unwrap();
        assert_eq!(data.header.initial_state, chosen[i], "trajectory {i}");
        assert_eq!(
            data.header.q0, ic.positions[rows[i]],
            "trajectory {i} starts at its row"
        );
    }
    let (c, _, err) = run_in(&d, &["resume", "out"]);
    assert_eq!(c, 0, "{err}");
    let (c, _, err) = run_in(&d, &["analyze", "out", "--out", "an"]);
    assert_eq!(c, 0, "{err}");
    assert!(d.join("an/populations.csv").exists());

    // spectrum: the integral obeys the sum rule (trapezoid on a fine grid)
    let (c, out, err) = run_in(
        &d,
        &["spectrum", "ic.h5", "--width-ev", "0.1", "--out", "spec"],
    );
    assert_eq!(c, 0, "{err}");
    assert!(out.contains("sum rule"), "{out}");
    let csv = std::fs::read_to_string(d.join("spec/spectrum.csv")).unwrap();
    let rows: Vec<Vec<f64>> = csv
        .lines()
        .skip(1)
        .map(|l| l.split(',').map(|x| x.parse().unwrap()).collect())
        .collect();
    let integral: f64 = rows
        .windows(2)
        .map(|w| 0.5 * (w[1][0] - w[0][0]) * (w[0][2] + w[1][2]))
        .sum();
    let mean_f: f64 = x
        .oscillator_strengths
        .iter()
        .map(|f| f[1] + f[2])
        .sum::<f64>()
        / n as f64;
    assert!(
        (integral / (1.0976 * mean_f) - 1.0).abs() < 2e-3,
        "{integral} vs {}",
        1.0976 * mean_f
    );
    // ε = σ N_A 1e-16/(1000 ln 10) in every row
    for r in &rows {
        assert!(
            (r[3] - r[2] * 6.022_140_76e23 * 1e-16 / (1000.0 * std::f64::consts::LN_10)).abs()
                <= 1e-6 * r[3].abs() + 1e-300
        );
    }
    assert!(d.join("spec/spectrum.svg").exists() && d.join("spec/spectrum.png").exists());
}

// Thermal Wigner widths: coth(ħω/2kT) at 3000 K for a 0.10 eV mode.
#[test]
fn thermal_sampling_widens_by_coth() {
    let d = setup("thermal");
    let (c, _, err) = run_in(&d, &["modes", "ensemble.toml", "-o", "modes.toml"]);
    assert_eq!(c, 0, "{err}");
    let n = 4000;
    let (c, _, err) = run_in(
        &d,
        &[
            "sample",
            "modes.toml",
            "-n",
            &n.to_string(),
            "--seed",
            "2",
            "--temperature-k",
            "3000",
            "-o",
            "ic.h5",
        ],
    );
    assert_eq!(c, 0, "{err}");
    let ic = InitialConditions::read(&d.join("ic.h5")).unwrap();
    let w = 0.10 / EV;
    // k_B = 3.1668115634556e-6 hartree/K (CODATA 2018)
    let coth = 1.0 / (w / (2.0 * 3000.0 * 3.166_811_563_455_6e-6)).tanh();
    let var_x = ic.positions.iter().map(|q| q[0] * q[0]).sum::<f64>() / n as f64;
    assert!(
        (var_x / (coth / (2.0 * w)) - 1.0).abs() < 4.0 * (2.0 / n as f64).sqrt(),
        "{var_x}"
    );
    assert!(
        coth > 1.5,
        "the test must see a thermal effect: coth = {coth}"
    );
    assert!(ic.excitation.is_none());
}

#[test]
fn bad_inputs_are_named() {
    let d = setup("bad");
    // A model whose S0 has a gradient at the reference: non-stationary warning.
    std::fs::write(
        d.join("tilted.toml"),
        MODEL.replace(
            "[[gradient]]\nstate = 1\nmode = 0",
            "[[gradient]]\nstate = 0\nmode = 0\nvalue_ev = 1.0\n[[gradient]]\nstate = 1\nmode = 0",
        ),
    )
    .unwrap();
    std::fs::write(
        d.join("tilted-ens.toml"),
        ENSEMBLE.replace("model.toml", "tilted.toml"),
    )
    .unwrap();
    let (c, _, err) = run_in(&d, &["modes", "tilted-ens.toml", "-o", "m.toml"]);
    assert_eq!(c, 0, "{err}");
    assert!(
        err.contains("not stationary") && err.contains("|gradient|"),
        "{err}"
    );
    // A Hessian of the wrong shape names both shapes.
    std::fs::write(
        d.join("w.xyz"),
        "3\nwater\nO 0 0 0.117\nH 0 0.757 -0.469\nH 0 -0.757 -0.469\n",
    )
    .unwrap();
    std::fs::write(d.join("h.txt"), "1 0 0\n0 1 0\n0 0 1\n").unwrap();
    let (c, _, err) = run_in(&d, &["modes", "w.xyz", "--hessian", "h.txt"]);
    assert_eq!(c, 2, "{err}");
    assert!(err.contains("3×3") && err.contains("9×9"), "{err}");
    // sampling = "file" with a file of the wrong model
    let (c, _, err) = run_in(&d, &["modes", "ensemble.toml", "-o", "modes.toml"]);
    assert_eq!(c, 0, "{err}");
    let (c, _, err) = run_in(
        &d,
        &[
            "sample",
            "modes.toml",
            "-n",
            "5",
            "--seed",
            "1",
            "-o",
            "ic.h5",
        ],
    );
    assert_eq!(c, 0, "{err}");
    std::fs::write(
        d.join("one.toml"),
        "frequencies_ev = [0.1]\nvertical_ev = [0.0, 4.0]\n",
    )
    .unwrap();
    std::fs::write(d.join("r.toml"), "[model]\nkind = \"lvc\"\nfile = \"one.toml\"\n[start]\nsampling = \"file\"\ninitial_conditions = \"ic.h5\"\n[dynamics]\ntimestep_fs = 0.2\nduration_fs = 4.0\n[swarm]\ntrajectories = 5\nseed = 3\n").unwrap();
    let (c, _, err) = run_in(&d, &["run", "r.toml"]);
    assert_eq!(c, 2, "{err}");
    assert!(
        err.contains("start.initial_conditions")
            && err.contains("2 coordinates")
            && err.contains("has 1"),
        "{err}"
    );
    // more trajectories than initial conditions
    let (c, _, err) = run_in(
        &d,
        &[
            "run",
            "r.toml",
            "--set",
            "model.file=\"model.toml\"",
            "--set",
            "swarm.trajectories=6",
        ],
    );
    assert_eq!(c, 2, "{err}");
    assert!(
        err.contains("swarm.trajectories") && err.contains("only 5"),
        "{err}"
    );
    // the output file exists already; a window without --excite; no excitation data for a spectrum
    let (c, _, err) = run_in(
        &d,
        &[
            "sample",
            "modes.toml",
            "-n",
            "5",
            "--seed",
            "1",
            "-o",
            "ic.h5",
        ],
    );
    assert!(c == 2 && err.contains("exists already"), "{err}");
    let (c, _, err) = run_in(
        &d,
        &[
            "sample",
            "modes.toml",
            "-n",
            "5",
            "--seed",
            "1",
            "--window-ev",
            "1:2",
            "-o",
            "x.h5",
        ],
    );
    assert!(c == 2 && err.contains("--excite"), "{err}");
    let (c, _, err) = run_in(&d, &["spectrum", "ic.h5"]);
    assert!(c == 2 && err.contains("no excitation data"), "{err}");
    // a model without dipoles cannot give oscillator strengths
    std::fs::write(
        d.join("dark.toml"),
        "frequencies_ev = [0.1, 0.2]\nvertical_ev = [0.0, 4.0]\n",
    )
    .unwrap();
    std::fs::write(
        d.join("dark-ens.toml"),
        ENSEMBLE.replace("model.toml", "dark.toml"),
    )
    .unwrap();
    let (c, _, err) = run_in(
        &d,
        &[
            "sample",
            "modes.toml",
            "-n",
            "5",
            "--seed",
            "1",
            "--excite",
            "dark-ens.toml",
            "--state",
            "1",
            "-o",
            "y.h5",
        ],
    );
    assert!(c == 2 && err.contains("no dipoles"), "{err}");
}

// Molecules: a user Hessian (three atoms joined by springs, whose Hessian at
// the equilibrium geometry is Σ_bonds k u uᵀ per pair, a textbook result)
// gives 3 vibrations and 6 projected external modes; sampled velocities
// carry no total linear or angular momentum (stated in the README).
#[test]
fn cartesian_modes_and_zero_net_momenta() {
    let d = scratch("cart");
    // Å in the file; bohr in the Hessian.
    let a = 1.0 / 0.529_177_210_903;
    let pos = [
        [0.0, 0.0, 0.117 * a],
        [0.0, 0.757 * a, -0.469 * a],
        [0.0, -0.757 * a, -0.469 * a],
    ];
    std::fs::write(
        d.join("m.xyz"),
        "3\nspring model\nO 0 0 0.117\nH 0 0.757 -0.469\nH 0 -0.757 -0.469\n",
    )
    .unwrap();
    let mut h = vec![vec![0.0; 9]; 9];
    for (i, j, k) in [(0usize, 1usize, 0.5), (0, 2, 0.5), (1, 2, 0.05)] {
        let d: Vec<f64> = (0..3).map(|c| pos[j][c] - pos[i][c]).collect();
        let r = d.iter().map(|x| x * x).sum::<f64>().sqrt();
        let u: Vec<f64> = d.iter().map(|x| x / r).collect();
        for p in 0..3 {
            for q in 0..3 {
                let v = k * u[p] * u[q];
                h[3 * i + p][3 * i + q] += v;
                h[3 * j + p][3 * j + q] += v;
                h[3 * i + p][3 * j + q] -= v;
                h[3 * j + p][3 * i + q] -= v;
            }
        }
    }
    let text: String = h
        .iter()
        .map(|r| {
            r.iter()
                .map(|x| format!("{x:.17e}"))
                .collect::<Vec<_>>()
                .join(" ")
                + "\n"
        })
        .collect();
    std::fs::write(d.join("h.txt"), text).unwrap();
    let (c, out, err) = run_in(
        &d,
        &["modes", "m.xyz", "--hessian", "h.txt", "-o", "modes.toml"],
    );
    assert_eq!(c, 0, "{err}");
    assert!(out.contains("3 modes"), "{out}");
    let m = ModesFile::read(&d.join("modes.toml")).unwrap();
    assert!(m.mode.iter().all(|x| x.omega_hartree > 0.0));
    let (c, _, err) = run_in(
        &d,
        &[
            "sample",
            "modes.toml",
            "-n",
            "50",
            "--seed",
            "9",
            "--temperature-k",
            "300",
            "-o",
            "ic.h5",
        ],
    );
    assert_eq!(c, 0, "{err}");
    let ic = InitialConditions::read(&d.join("ic.h5")).unwrap();
    let masses: Vec<f64> = ic.masses.iter().step_by(3).copied().collect();
    for (q, v) in ic.positions.iter().zip(&ic.velocities) {
        let total: f64 = masses.iter().sum();
        let com: Vec<f64> = (0..3)
            .map(|c| (0..3).map(|a| masses[a] * q[3 * a + c]).sum::<f64>() / total)
            .collect();
        let mut p = [0.0; 3];
        let mut l = [0.0; 3];
        for a in 0..3 {
            let r: Vec<f64> = (0..3).map(|c| q[3 * a + c] - com[c]).collect();
            let mv: Vec<f64> = (0..3).map(|c| masses[a] * v[3 * a + c]).collect();
            for c in 0..3 {
                p[c] += mv[c];
            }
            l[0] += r[1] * mv[2] - r[2] * mv[1];
            l[1] += r[2] * mv[0] - r[0] * mv[2];
            l[2] += r[0] * mv[1] - r[1] * mv[0];
        }
        let scale = masses
            .iter()
            .zip(v.chunks(3))
            .map(|(m, vv)| m * vv.iter().map(|x| x.abs()).sum::<f64>())
            .sum::<f64>();
        assert!(
            p.iter().chain(&l).all(|x| x.abs() < 1e-10 * scale.max(1.0)),
            "P = {p:?}, L = {l:?}"
        );
    }
}
