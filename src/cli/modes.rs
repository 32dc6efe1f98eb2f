//! `flipswarm modes`: harmonic normal modes of a model's ground state (from
//! finite differences of its gradients) or of a molecule from a Hessian the
//! user supplies, written to a normal-modes file for `flipswarm sample`.

use std::path::{Path, PathBuf};

use clap::Args;

use super::exit;
use crate::config::ModelSpec;
use crate::electronic::Request;
use crate::sampling::files::{read_hessian, ModeEntry, ModesFile, MODES_FORMAT};
use crate::sampling::modes::{
    finite_difference_hessian, normal_modes, normal_modes_of_coordinates, NormalModes,
};
use crate::units;

/// Gradient norm (hartree/bohr) above which the reference geometry is not
/// treated as a minimum (common practice: optimisers stop near 1e-4).
pub const STATIONARY_GRADIENT: f64 = 1e-3;

/// Arguments of `flipswarm modes`.
#[derive(Debug, Args)]
pub struct ModesArgs {
    /// An ensemble file (TOML; its model's ground state is analysed at the
    /// model's reference geometry) or a geometry (XYZ, Å) with `--hessian`.
    pub input: PathBuf,
    /// Cartesian Hessian for an XYZ geometry: a text file of 3N×3N numbers
    /// (hartree/bohr²), whitespace separated, one row per line.
    #[arg(long)]
    pub hessian: Option<PathBuf>,
    /// Where to write the normal-modes file.
    #[arg(short, long, default_value = "modes.toml")]
    pub output: PathBuf,
    /// Finite-difference step (bohr, or model units) for models.
    #[arg(long, default_value_t = 1e-3)]
    pub step_bohr: f64,
    /// Replace an existing output file.
    #[arg(long)]
    pub force: bool,
}

fn reference_of(model: &ModelSpec) -> Result<Vec<f64>, String> {
    match model {
        ModelSpec::Lvc { model, .. } => Ok(vec![0.0; model.n_modes()]),
        ModelSpec::Harmonic(h) => Ok(h.centres.clone()),
        ModelSpec::Morse(m) => Ok(vec![m.r_eq]),
        ModelSpec::Tully(_) => {
            Err("Tully's scattering models have no bound ground state to analyse".into())
        }
        ModelSpec::Molecule { spec, .. } => Ok(spec.reference_coordinates()),
    }
}

/// Execute; returns the exit code.
pub fn execute(args: &ModesArgs) -> i32 {
    if args.output.exists() && !args.force {
        eprintln!(
            "error: {} exists already; choose another --output or pass --force",
            args.output.display()
        );
        return exit::INPUT;
    }
    if !(args.step_bohr > 0.0 && args.step_bohr.is_finite()) {
        eprintln!(
            "error: --step-bohr must be positive, got {}",
            args.step_bohr
        );
        return exit::INPUT;
    }
    let is_xyz = args.input.extension().is_some_and(|e| e == "xyz");
    let (modes, file) = if is_xyz {
        let Some(hpath) = &args.hessian else {
            eprintln!("error: {}: a molecular geometry needs --hessian FILE (analytic or finite-difference Hessians of the built-in electronic structure are not available yet)", args.input.display());
            return exit::INPUT;
        };
        let frame = match crate::chem::xyz::read_single_xyz_file(&args.input) {
            Ok(f) => f,
            Err(e) => {
                eprintln!("error: {e}");
                return exit::INPUT;
            }
        };
        let mol = frame.molecule;
        let hess = match read_hessian(hpath, 3 * mol.len()).map_err(|e| e.to_string()) {
            Ok(h) => h,
            Err(e) => {
                eprintln!("error: --hessian {e}");
                return exit::INPUT;
            }
        };
        let positions: Vec<[f64; 3]> = mol.atoms.iter().map(|a| a.position_bohr).collect();
        let masses = mol.masses_me();
        let modes = match normal_modes(&hess, &positions, &masses) {
            Ok(m) => m,
            Err(e) => {
                eprintln!("error: {}: {e}", hpath.display());
                return exit::INPUT;
            }
        };
        let per_coordinate: Vec<f64> = masses.iter().flat_map(|&m| [m, m, m]).collect();
        let file = modes_file(
            &modes,
            "cartesian",
            &args.input,
            per_coordinate,
            mol.positions_flat_bohr(),
            f64::NAN,
            mol.atoms
                .iter()
                .map(|a| a.element.symbol().to_string())
                .collect(),
        );
        (modes, file)
    } else {
        if args.hessian.is_some() {
            eprintln!("error: --hessian goes with an XYZ geometry; an ensemble file's model gives its own Hessian");
            return exit::INPUT;
        }
        let cfg = match crate::config::load_file(&args.input, &[]) {
            Ok(c) => c,
            Err(e) => {
                eprintln!("error: {e}");
                return exit::INPUT;
            }
        };
        let q0 = match reference_of(&cfg.model) {
            Ok(q) => q,
            Err(e) => {
                eprintln!("error: {}: {e}", args.input.display());
                return exit::INPUT;
            }
        };
        let model = cfg.model.clone();
        // Molecules: the closed-shell SCF ground state (same functional,
        // basis and grid) with analytic gradients — the usual ground state
        // of Wigner sampling, and 6N gradients instead of 36N² MRSF energies.
        let closed_shell = match &model {
            ModelSpec::Molecule { spec, .. } => {
                let mut calc = spec.calculation.clone();
                let z = calc.electrons.alpha + calc.electrons.beta;
                calc.electrons = crate::electronic::qc::scf::Electrons {
                    alpha: z / 2,
                    beta: z / 2,
                };
                calc.reference = crate::electronic::qc::scf::Reference::Restricted;
                Some(calc)
            }
            _ => None,
        };
        let gradient = |q: &[f64]| -> Result<Vec<f64>, String> {
            if let Some(calc) = &closed_shell {
                let p: Vec<[f64; 3]> = q.chunks(3).map(|c| [c[0], c[1], c[2]]).collect();
                let guess = crate::electronic::qc::scf::Guess::AtomicSuperposition;
                let (_, g) = calc
                    .analytic_gradient(&p, &guess)
                    .map_err(|e| e.to_string())?;
                return Ok(g.into_iter().flatten().collect());
            }
            let mut b = crate::swarm::make_backend(&model);
            let r = b
                .compute(q, &Request::gradient_of(0))
                .map_err(|e| e.to_string())?;
            Ok(r.gradient(0).expect("requested").to_vec())
        };
        let g0 = match gradient(&q0) {
            Ok(g) => g,
            Err(e) => {
                eprintln!("error: the back end failed at the reference geometry: {e}");
                return exit::RUNTIME;
            }
        };
        let gnorm = g0.iter().map(|x| x * x).sum::<f64>().sqrt();
        tracing::info!(
            "finite-difference Hessian: {} gradient evaluations, step {} bohr",
            2 * q0.len(),
            args.step_bohr
        );
        let hess = match finite_difference_hessian(&q0, args.step_bohr, gradient) {
            Ok(h) => h,
            Err(e) => {
                eprintln!("error: the back end failed at a displaced geometry: {e}");
                return exit::RUNTIME;
            }
        };
        let masses = crate::swarm::make_backend(&cfg.model).info().masses;
        let modes = match &cfg.model {
            ModelSpec::Molecule { spec, .. } => {
                let mol = &spec.calculation.molecule;
                let positions: Vec<[f64; 3]> = mol.atoms.iter().map(|a| a.position_bohr).collect();
                normal_modes(&hess, &positions, &mol.masses_me())
            }
            _ => normal_modes_of_coordinates(&hess, &masses),
        };
        let modes = match modes {
            Ok(m) => m,
            Err(e) => {
                eprintln!("error: {e}");
                return exit::RUNTIME;
            }
        };
        let (coordinates, elements) = match &cfg.model {
            ModelSpec::Molecule { spec, .. } => (
                "cartesian",
                spec.calculation
                    .molecule
                    .atoms
                    .iter()
                    .map(|a| a.element.symbol().to_string())
                    .collect(),
            ),
            _ => ("model", vec![]),
        };
        let file = modes_file(
            &modes,
            coordinates,
            &args.input,
            masses,
            q0,
            gnorm,
            elements,
        );
        (modes, file)
    };
    if file.gradient_norm_hartree_bohr > STATIONARY_GRADIENT {
        eprintln!(
            "warning: the reference geometry is not stationary: |gradient| = {:.2e} hartree/bohr (> {STATIONARY_GRADIENT:.0e}); harmonic modes and Wigner sampling assume a minimum — optimise the geometry first",
            file.gradient_norm_hartree_bohr
        );
    }
    let imaginary = modes.imaginary();
    if !imaginary.is_empty() {
        let list: Vec<String> = imaginary
            .iter()
            .map(|&k| format!("mode {} ({:.1}i cm^-1)", k + 1, -modes.wavenumbers()[k]))
            .collect();
        eprintln!("warning: imaginary frequencies: {}; `sample` leaves these modes unexcited — the geometry is not a minimum", list.join(", "));
    }
    if let Err(e) = file.write(&args.output) {
        eprintln!("error: {e}");
        return exit::RUNTIME;
    }
    println!(
        "{}: {} modes{}",
        args.output.display(),
        modes.omegas.len(),
        if modes.linear {
            " (linear geometry: 5 external degrees of freedom removed)"
        } else {
            ""
        }
    );
    println!("  {:>4}  {:>12}", "mode", "cm^-1");
    for (k, w) in modes.wavenumbers().iter().enumerate() {
        println!("  {:>4}  {:>12.2}", k + 1, w);
    }
    exit::OK
}

fn modes_file(
    modes: &NormalModes,
    coordinates: &str,
    source: &Path,
    masses: Vec<f64>,
    reference: Vec<f64>,
    gnorm: f64,
    elements: Vec<String>,
) -> ModesFile {
    let mode = (0..modes.omegas.len())
        .map(|k| ModeEntry {
            wavenumber_cm1: units::hartree_to_cm1(modes.omegas[k]),
            omega_hartree: modes.omegas[k],
            vector: modes.vectors.column(k).iter().copied().collect(),
        })
        .collect();
    ModesFile {
        format: MODES_FORMAT.into(),
        version: 1,
        coordinates: coordinates.into(),
        source: source.display().to_string(),
        masses_me: masses,
        reference_bohr: reference,
        gradient_norm_hartree_bohr: if gnorm.is_finite() { gnorm } else { 0.0 },
        elements,
        mode,
    }
}
