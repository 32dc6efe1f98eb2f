//! `flipswarm optimize`: minimise the energy of the SCF ground state (analytic
//! gradients) or of an MRSF-TDDFT state (analytic MRSF gradients) in Cartesian
//! coordinates, or find the minimum-energy crossing of two MRSF states
//! (gradient projection or penalty function, see
//! [`crate::electronic::qc::optimize::intersection`]), and write the
//! optimised geometry as XYZ (Å).
//!
//! Convergence criteria (common practice, see
//! [`crate::electronic::qc::optimize`]): max/RMS gradient 4.5e−4/3.0e−4
//! Eh/bohr and max/RMS step 1.8e−3/1.2e−3 bohr, all multiplied by
//! `--criteria-scale`. When the step limit is reached, the last geometry is
//! still written (comment line "not converged") and the exit code is the
//! runtime-failure code. Progress: one line per step on stderr (tracing, info
//! level).

use std::path::PathBuf;

use clap::Args;

use super::exit;
use super::single_point::{molecular_input, HarmonicsArg, Method, MolecularInput};
use crate::chem::xyz::xyz_string;
use crate::chem::Molecule;
use crate::electronic::qc::dft::grid::GridSpec;
use crate::electronic::qc::gradient::numerical::{ScfEnergy, Target, DEFAULT_STEP};
use crate::electronic::qc::gradient::scf::Potential;
use crate::electronic::qc::integrals::JkOptions;
use crate::electronic::qc::optimize::intersection::{CrossingOptions, ProjectionOptions};
use crate::electronic::qc::optimize::{
    minimize_energy, minimize_mrsf_crossing, minimize_mrsf_crossing_projected, GradientKind,
    OptimizeError, OptimizeOptions,
};
use crate::electronic::qc::response::davidson::DavidsonOptions;
use crate::electronic::qc::scf::{Reference, ScfOptions};

/// Arguments of `flipswarm optimize`.
#[derive(Debug, Args)]
pub struct OptimizeArgs {
    /// Start geometry: an XYZ file (Å), first frame.
    pub geometry: PathBuf,
    /// Where to write the optimised geometry (XYZ, Å).
    #[arg(short = 'o', long = "output")]
    pub output: PathBuf,
    /// SCF method.
    #[arg(long, value_enum, default_value = "roks")]
    pub method: Method,
    /// Exchange–correlation functional for rks/uks/roks (as single-point).
    #[arg(long, default_value = "bhhlyp")]
    pub functional: String,
    /// Basis set: built-in name or basis-set-exchange JSON file.
    #[arg(long, default_value = "6-31G*")]
    pub basis: String,
    /// Override the basis family's Cartesian/spherical default.
    #[arg(long, value_enum)]
    pub harmonics: Option<HarmonicsArg>,
    /// Molecular charge.
    #[arg(long, default_value_t = 0, allow_negative_numbers = true)]
    pub charge: i64,
    /// Spin multiplicity 2S+1 (default: 3 for roks/rohf, otherwise 1 or 2).
    #[arg(long)]
    pub multiplicity: Option<usize>,
    /// Integration grid level for Kohn–Sham.
    #[arg(long, default_value = "fine")]
    pub grid: String,
    /// Optimise this MRSF-TDDFT state (S0, S1, …, T1, …) of the triplet
    /// ROKS/ROHF reference instead of the SCF energy (analytic MRSF gradients).
    #[arg(long)]
    pub state: Option<String>,
    /// Search the minimum-energy crossing of two MRSF states of the same
    /// spin instead, e.g. `S0,S1` (analytic gradients unless --numerical);
    /// the gap, both energies and the branching-plane vectors are reported.
    #[arg(long, value_name = "LOWER,UPPER", conflicts_with = "state")]
    pub crossing: Option<String>,
    /// Crossing search method: `projection` (gradient projection, converges
    /// to the crossing itself) or `penalty` (penalty function, gradients
    /// only, ends slightly off the seam).
    #[arg(long, value_enum, default_value = "projection")]
    pub crossing_method: CrossingMethod,
    /// Second branching-plane vector of the projection search: `update`
    /// (estimated from the previous steps, no extra cost) or `coupling`
    /// (derivative coupling from overlaps at 6N displaced geometries per
    /// step, with --step).
    #[arg(long, value_enum, default_value = "update")]
    pub branching: Branching,
    /// Gap at which a crossing search stops (Eh).
    #[arg(long, default_value_t = 1e-4)]
    pub gap_tolerance: f64,
    /// MRSF singlet roots to solve for with --state.
    #[arg(long, default_value_t = 3)]
    pub singlets: usize,
    /// MRSF triplet roots to solve for with --state.
    #[arg(long, default_value_t = 1)]
    pub triplets: usize,
    /// Use central-difference gradients instead of analytic ones.
    #[arg(long)]
    pub numerical: bool,
    /// Central-difference step (bohr).
    #[arg(long, default_value_t = DEFAULT_STEP)]
    pub step: f64,
    /// Energy-and-gradient evaluations allowed.
    #[arg(long, default_value_t = 100)]
    pub max_steps: usize,
    /// Multiply all four convergence thresholds by this factor.
    #[arg(long, default_value_t = 1.0)]
    pub criteria_scale: f64,
    /// Worker threads (0 = all cores).
    #[arg(long, default_value_t = 0)]
    pub threads: usize,
}

/// `--crossing-method`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum CrossingMethod {
    /// Gradient projection.
    Projection,
    /// Penalty function.
    Penalty,
}

/// `--branching`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum Branching {
    /// Branching-plane update.
    Update,
    /// Derivative coupling by finite differences of overlaps.
    Coupling,
}

fn write_geometry(
    path: &std::path::Path,
    mol: &Molecule,
    positions: &[[f64; 3]],
    comment: &str,
) -> Result<(), String> {
    let mut m = mol.clone();
    for (a, p) in m.atoms.iter_mut().zip(positions) {
        a.position_bohr = *p;
    }
    let text = xyz_string(&m, comment).map_err(|e| e.to_string())?;
    std::fs::write(path, text).map_err(|e| format!("{}: {e}", path.display()))
}

/// Execute; returns the exit code.
pub fn execute(args: &OptimizeArgs) -> i32 {
    if args.threads > 0 {
        let _ = rayon::ThreadPoolBuilder::new()
            .num_threads(args.threads)
            .build_global();
    }
    let input = match molecular_input(
        &args.geometry,
        &args.basis,
        args.harmonics,
        args.charge,
        args.multiplicity,
        args.method,
    ) {
        Ok(i) => i,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
    };
    let MolecularInput {
        mol,
        data,
        harmonics,
        basis,
        electrons,
        multiplicity,
    } = input;
    let (reference, is_ks, label) = (
        args.method.reference(),
        args.method.is_ks(),
        args.method.label(),
    );
    let crossing = match &args.crossing {
        None => None,
        Some(text) => match text.split_once(',') {
            Some((a, b)) if !a.trim().is_empty() && !b.trim().is_empty() => {
                Some((a.trim().to_string(), b.trim().to_string()))
            }
            _ => {
                eprintln!("error: --crossing {text:?}: give two state labels separated by a comma, e.g. S0,S1");
                return exit::INPUT;
            }
        },
    };
    let state = args
        .state
        .clone()
        .or_else(|| crossing.as_ref().map(|(a, _)| a.clone()));
    let target = match &state {
        None => Target::Ground,
        Some(s) => {
            if reference != Reference::RestrictedOpen || multiplicity != 3 {
                eprintln!("error: --state and --crossing need the high-spin triplet reference: --method roks (or rohf) with --multiplicity 3");
                return exit::INPUT;
            }
            Target::Mrsf {
                label: s.clone(),
                singlets: args.singlets,
                triplets: args.triplets,
            }
        }
    };
    let potential = if is_ks {
        match GridSpec::level(&args.grid) {
            Ok(grid) => Potential::KohnSham {
                functional: args.functional.clone(),
                grid,
            },
            Err(e) => {
                eprintln!("error: --grid: {e}");
                return exit::INPUT;
            }
        }
    } else {
        Potential::HartreeFock
    };
    if !(args.step.is_finite()
        && args.step > 0.0
        && args.criteria_scale.is_finite()
        && args.criteria_scale > 0.0)
    {
        eprintln!("error: --step and --criteria-scale must be positive");
        return exit::INPUT;
    }
    let gradient = if args.numerical {
        GradientKind::Numerical(args.step)
    } else {
        GradientKind::Analytic
    };
    let calc = ScfEnergy {
        molecule: mol.clone(),
        basis: data,
        harmonics,
        electrons,
        reference,
        potential,
        scf: ScfOptions::default(),
        jk: JkOptions::default(),
        davidson: DavidsonOptions::default(),
    };
    let mut calc = calc;
    if target != Target::Ground {
        // Response energies are not variational in the orbitals: converge the
        // reference and the roots further (see gradient::numerical).
        calc.scf.gradient_tolerance = 1e-10;
        calc.scf.energy_tolerance = 1e-12;
        calc.davidson.residual_tolerance = 1e-8;
        calc.davidson.energy_tolerance = 1e-12;
    }
    let opts = OptimizeOptions {
        max_steps: args.max_steps,
        ..OptimizeOptions::default()
    }
    .scaled(args.criteria_scale);
    let start: Vec<[f64; 3]> = mol.atoms.iter().map(|a| a.position_bohr).collect();
    let what = match (&args.state, &crossing) {
        (_, Some((a, b))) => format!("the MRSF {a}/{b} crossing of {label}"),
        (Some(s), None) => format!("MRSF {s} of {label}"),
        (None, None) => label.to_string(),
    };
    println!(
        "{}: optimising {what} ({} basis, {} gradients)",
        args.geometry.display(),
        basis.name,
        if gradient == GradientKind::Analytic {
            "analytic"
        } else {
            "numerical"
        }
    );
    let t = std::time::Instant::now();
    if let Some((lower, upper)) = &crossing {
        if !(args.gap_tolerance.is_finite() && args.gap_tolerance > 0.0) {
            eprintln!("error: --gap-tolerance must be positive");
            return exit::INPUT;
        }
        let kind = if args.numerical {
            GradientKind::Numerical(args.step)
        } else {
            GradientKind::Analytic
        };
        let found = match args.crossing_method {
            CrossingMethod::Penalty => minimize_mrsf_crossing(
                &calc,
                &start,
                lower,
                upper,
                args.singlets,
                args.triplets,
                kind,
                &CrossingOptions {
                    stage: opts,
                    gap_tolerance: args.gap_tolerance,
                    ..CrossingOptions::default()
                },
            ),
            CrossingMethod::Projection => minimize_mrsf_crossing_projected(
                &calc,
                &start,
                lower,
                upper,
                args.singlets,
                args.triplets,
                kind,
                (args.branching == Branching::Coupling).then_some(args.step),
                &ProjectionOptions {
                    optimizer: OptimizeOptions {
                        trust_radius: ProjectionOptions::default().optimizer.trust_radius,
                        max_trust_radius: ProjectionOptions::default().optimizer.max_trust_radius,
                        ..opts
                    },
                    gap_tolerance: args.gap_tolerance,
                },
            ),
        };
        return match found {
            Ok(c) => {
                let comment = format!(
                    "{what}: E({lower}) = {:.10} Eh, E({upper}) = {:.10} Eh, gap {:.2e} Eh",
                    c.states.lower, c.states.upper, c.gap
                );
                if let Err(e) = write_geometry(&args.output, &mol, &c.positions, &comment) {
                    eprintln!("error: {e}");
                    return exit::RUNTIME;
                }
                println!(
                    "{what} found in {:.1} s: {c}; written to {}",
                    t.elapsed().as_secs_f64(),
                    args.output.display()
                );
                let mut planes = vec![("gradient difference", &c.gradient_difference)];
                if let Some(y) = &c.coupling_direction {
                    planes.push(match args.branching {
                        Branching::Coupling => ("derivative coupling orthogonalised to it", y),
                        Branching::Update => ("second vector from the branching-plane update", y),
                    });
                }
                for (name, vectors) in planes {
                    println!("branching plane, {name} (unit vector, per atom):");
                    for (a, v) in mol.atoms.iter().zip(vectors) {
                        println!(
                            "  {:<2} {:>12.6} {:>12.6} {:>12.6}",
                            a.element.symbol(),
                            v[0],
                            v[1],
                            v[2]
                        );
                    }
                }
                exit::OK
            }
            Err(e) => fail(&args.geometry, &args.output, &mol, &what, e),
        };
    }
    match minimize_energy(&calc, &start, &target, gradient, &opts) {
        Ok(r) => {
            let comment = format!("{what} minimum, E = {:.10} Eh", r.energy);
            if let Err(e) = write_geometry(&args.output, &mol, &r.positions, &comment) {
                eprintln!("error: {e}");
                return exit::RUNTIME;
            }
            println!(
                "converged in {} steps ({:.1} s): E = {:.10} Eh, max |gradient| = {:.2e} Eh/bohr; written to {}",
                r.history.len(),
                t.elapsed().as_secs_f64(),
                r.energy,
                crate::electronic::qc::gradient::max_component(&r.gradient),
                args.output.display()
            );
            exit::OK
        }
        Err(e) => fail(&args.geometry, &args.output, &mol, &what, e),
    }
}

/// Report a failed optimisation, saving the last accepted geometry.
fn fail(
    geometry: &std::path::Path,
    output: &std::path::Path,
    mol: &Molecule,
    what: &str,
    e: OptimizeError,
) -> i32 {
    eprintln!("error: {}: {e}", geometry.display());
    let first_failed = matches!(e, OptimizeError::Evaluation { step: 1, .. });
    if let (Some(last), false) = (e.last_positions(), first_failed) {
        let comment = format!("{what}: not converged (last accepted geometry)");
        match write_geometry(output, mol, last, &comment) {
            Ok(()) => eprintln!(
                "the last accepted geometry was written to {}",
                output.display()
            ),
            Err(w) => eprintln!("error: {w}"),
        }
    }
    match e {
        OptimizeError::Options(_) => exit::INPUT,
        _ => exit::RUNTIME,
    }
}
