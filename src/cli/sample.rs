//! `flipswarm sample`: Wigner-distributed initial conditions from a
//! normal-modes file, optionally with vertical excitation energies,
//! oscillator strengths and the choice of each trajectory's initial state.
//!
//! State selection (`--window-ev LO:HI`): at every sampled geometry i, the
//! transitions 0 → n with ΔE_in inside the window are candidates; geometry i
//! starts on state n with probability f_in / F_max, where F_max is the
//! largest Σ_n f_in over the ensemble (so the probability of a state is
//! proportional to its oscillator strength, as in the nuclear-ensemble
//! approach of Theor. Chem. Acc. 131, 1237 (2012), from memory); with
//! probability 1 − Σ_n f_in / F_max the geometry is not excited and the run
//! skips it. One uniform number per geometry from its own seeded stream.

use std::path::PathBuf;

use clap::Args;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;

use super::exit;
use crate::electronic::Request;
use crate::sampling::files::{Excitation, InitialConditions, ModesFile};
use crate::sampling::wigner;
use crate::units;

/// Arguments of `flipswarm sample`.
#[derive(Debug, Args)]
pub struct SampleArgs {
    /// Normal-modes file written by `flipswarm modes`.
    pub modes: PathBuf,
    /// Number of initial conditions.
    #[arg(short = 'n', long)]
    pub count: usize,
    /// Seed of the sampling.
    #[arg(long)]
    pub seed: u64,
    /// Temperature of the harmonic Wigner distribution (K); 0 = ground state.
    #[arg(long, default_value_t = 0.0)]
    pub temperature_k: f64,
    /// Keep modes below this wavenumber (cm^-1) at rest (not excited).
    #[arg(long)]
    pub freeze_below_cm1: Option<f64>,
    /// Output file (HDF5).
    #[arg(short, long, default_value = "initial-conditions.h5")]
    pub output: PathBuf,
    /// Ensemble file whose model gives excitation energies and transition
    /// dipoles at every sampled geometry.
    #[arg(long)]
    pub excite: Option<PathBuf>,
    /// With --excite: start every trajectory on this adiabatic state.
    #[arg(long, conflicts_with = "window_ev")]
    pub state: Option<usize>,
    /// With --excite: choose the initial state stochastically among the
    /// transitions with excitation energy in LO:HI (eV), with probability
    /// proportional to the oscillator strength.
    #[arg(long, value_name = "LO:HI")]
    pub window_ev: Option<String>,
}

fn parse_window(s: &str) -> Result<(f64, f64), String> {
    let (a, b) = s
        .split_once(':')
        .ok_or_else(|| format!("--window-ev {s:?}: expected LO:HI in eV, e.g. 3.9:4.6"))?;
    let lo: f64 = a
        .trim()
        .parse()
        .map_err(|_| format!("--window-ev: {a:?} is not a number"))?;
    let hi: f64 = b
        .trim()
        .parse()
        .map_err(|_| format!("--window-ev: {b:?} is not a number"))?;
    if !(lo.is_finite() && hi.is_finite() && lo < hi) {
        return Err(format!("--window-ev {s}: needs LO < HI"));
    }
    Ok((lo, hi))
}

/// Execute; returns the exit code.
pub fn execute(args: &SampleArgs) -> i32 {
    if args.count == 0 {
        eprintln!("error: --count must be at least 1");
        return exit::INPUT;
    }
    if !(args.temperature_k >= 0.0 && args.temperature_k.is_finite()) {
        eprintln!(
            "error: --temperature-k must be zero or positive, got {}",
            args.temperature_k
        );
        return exit::INPUT;
    }
    if args.output.exists() {
        eprintln!(
            "error: {} exists already; choose another --output",
            args.output.display()
        );
        return exit::INPUT;
    }
    if args.excite.is_none() && (args.state.is_some() || args.window_ev.is_some()) {
        eprintln!("error: --state and --window-ev need --excite ENSEMBLE.toml (the model that gives the excitation energies)");
        return exit::INPUT;
    }
    let window = match args.window_ev.as_deref().map(parse_window).transpose() {
        Ok(w) => w,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
    };
    let modes = match ModesFile::read(&args.modes) {
        Ok(m) => m,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
    };
    let modes_text = std::fs::read_to_string(&args.modes).unwrap_or_default();
    let dof = modes.masses_me.len();
    let omegas: Vec<f64> = modes.mode.iter().map(|m| m.omega_hartree).collect();
    let mut frozen: Vec<usize> = Vec::new();
    for (k, m) in modes.mode.iter().enumerate() {
        if m.omega_hartree <= 0.0 {
            eprintln!(
                "warning: mode {} has an imaginary frequency ({:.1}i cm^-1) and stays at rest",
                k + 1,
                -m.wavenumber_cm1
            );
            frozen.push(k);
        } else if args.freeze_below_cm1.is_some_and(|w| m.wavenumber_cm1 < w) {
            frozen.push(k);
        }
    }
    if modes.gradient_norm_hartree_bohr > super::modes::STATIONARY_GRADIENT {
        eprintln!("warning: the modes were computed at a non-stationary geometry (|gradient| = {:.2e} hartree/bohr)", modes.gradient_norm_hartree_bohr);
    }
    let kt = args.temperature_k * units::BOLTZMANN_IN_HARTREE_PER_K;
    let cartesian = modes.coordinates == "cartesian";
    let mut positions = Vec::with_capacity(args.count);
    let mut velocities = Vec::with_capacity(args.count);
    for i in 0..args.count {
        let mut rng = ChaCha20Rng::seed_from_u64(args.seed);
        rng.set_stream(2 * i as u64);
        let (q, p) = wigner::sample(&omegas, kt, &frozen, &mut rng);
        // x = x0 + M^{-1/2} Σ_k L_k Q_k,  v = M^{-1/2} Σ_k L_k P_k
        let mut x = modes.reference_bohr.clone();
        let mut v = vec![0.0; dof];
        for (k, mode) in modes.mode.iter().enumerate() {
            for c in 0..dof {
                let s = 1.0 / modes.masses_me[c].sqrt();
                x[c] += s * mode.vector[c] * q[k];
                v[c] += s * mode.vector[c] * p[k];
            }
        }
        if cartesian {
            let atom_masses: Vec<f64> = modes.masses_me.iter().step_by(3).copied().collect();
            wigner::remove_net_momenta(&x, &mut v, &atom_masses);
        }
        positions.push(x);
        velocities.push(v);
    }
    let mut set = InitialConditions {
        coordinates: modes.coordinates.clone(),
        positions,
        velocities,
        masses: modes.masses_me.clone(),
        temperature_k: args.temperature_k,
        seed: args.seed,
        modes_toml: modes_text,
        excitation: None,
    };
    if let Some(ens) = &args.excite {
        match excite(&set, ens, args.state, window, args.seed) {
            Ok(x) => set.excitation = Some(x),
            Err(e) => {
                eprintln!("error: {e}");
                return exit::INPUT;
            }
        }
    }
    if let Err(e) = set.write(&args.output) {
        eprintln!("error: {e}");
        return exit::RUNTIME;
    }
    println!(
        "{}: {} initial conditions at {} K ({} of {} modes excited)",
        args.output.display(),
        set.len(),
        args.temperature_k,
        omegas.len() - frozen.len(),
        omegas.len()
    );
    if let Some(x) = &set.excitation {
        let chosen = x.initial_state.iter().filter(|s| s.is_some()).count();
        println!(
            "  initial states: {} ({} of {} geometries selected)",
            x.selection,
            chosen,
            set.len()
        );
        let ns = x.energies.first().map_or(0, |r| r.len());
        for n in 1..ns {
            let k = x.initial_state.iter().filter(|s| **s == Some(n)).count();
            let mean_e = x.energies.iter().map(|r| r[n]).sum::<f64>() / set.len() as f64;
            let mean_f =
                x.oscillator_strengths.iter().map(|r| r[n]).sum::<f64>() / set.len() as f64;
            println!(
                "  state {n}: mean excitation {:.3} eV, mean f {:.4}, {k} trajectories start here",
                units::hartree_to_ev(mean_e),
                mean_f
            );
        }
    }
    exit::OK
}

fn excite(
    set: &InitialConditions,
    ensemble: &std::path::Path,
    fixed: Option<usize>,
    window: Option<(f64, f64)>,
    seed: u64,
) -> Result<Excitation, String> {
    let cfg = crate::config::load_file(ensemble, &[]).map_err(|e| e.to_string())?;
    let n_states = cfg.model.n_states();
    if cfg.model.n_dof() != set.masses.len() {
        return Err(format!(
            "--excite {}: the model has {} coordinates but the modes have {}",
            ensemble.display(),
            cfg.model.n_dof(),
            set.masses.len()
        ));
    }
    if let Some(s) = fixed {
        if s >= n_states {
            return Err(format!(
                "--state {s}: the model has {n_states} states, numbered 0–{}",
                n_states - 1
            ));
        }
    }
    let mut backend = crate::swarm::make_backend(&cfg.model);
    let mut energies = Vec::with_capacity(set.len());
    let mut osc = Vec::with_capacity(set.len());
    for q in &set.positions {
        let r = backend
            .compute(
                q,
                &Request {
                    transition_dipoles: true,
                    ..Request::default()
                },
            )
            .map_err(|e| format!("--excite {}: {e}", ensemble.display()))?;
        let e0 = r.energies[0];
        let mu = r
            .transition_dipoles
            .as_ref()
            .ok_or("the back end returned no transition dipoles")?;
        let de: Vec<f64> = r.energies.iter().map(|e| e - e0).collect();
        let f: Vec<f64> = (0..n_states)
            .map(|n| {
                if n == 0 {
                    0.0
                } else {
                    2.0 / 3.0
                        * de[n]
                        * (mu[n][0] * mu[n][0] + mu[n][1] * mu[n][1] + mu[n][2] * mu[n][2])
                }
            })
            .collect();
        energies.push(de);
        osc.push(f);
    }
    let (initial_state, selection) = match (fixed, window) {
        (Some(s), _) => (vec![Some(s); set.len()], format!("fixed: state {s}")),
        (None, None) => (
            vec![None; set.len()],
            "none (energies and oscillator strengths only)".to_string(),
        ),
        (None, Some((lo, hi))) => {
            let (lo_h, hi_h) = (units::ev_to_hartree(lo), units::ev_to_hartree(hi));
            let in_window = |de: f64| de >= lo_h && de <= hi_h;
            let sums: Vec<f64> = (0..set.len())
                .map(|i| {
                    (1..n_states)
                        .filter(|&n| in_window(energies[i][n]))
                        .map(|n| osc[i][n])
                        .sum()
                })
                .collect();
            let fmax = sums.iter().copied().fold(0.0, f64::max);
            if fmax <= 0.0 {
                return Err(format!("--window-ev {lo}:{hi}: no bright transition lies in the window at any sampled geometry"));
            }
            let mut states = Vec::with_capacity(set.len());
            for i in 0..set.len() {
                let mut rng = ChaCha20Rng::seed_from_u64(seed);
                rng.set_stream(2 * i as u64 + 1);
                let u: f64 = rng.gen();
                let mut acc = 0.0;
                let mut chosen = None;
                for n in 1..n_states {
                    if in_window(energies[i][n]) {
                        acc += osc[i][n] / fmax;
                        if u < acc {
                            chosen = Some(n);
                            break;
                        }
                    }
                }
                states.push(chosen);
            }
            (
                states,
                format!("window {lo}:{hi} eV, probability f/F_max with F_max = {fmax:.6}"),
            )
        }
    };
    Ok(Excitation {
        energies,
        oscillator_strengths: osc,
        initial_state,
        selection,
    })
}
