//! `flipswarm single-point`: one SCF (Hartree–Fock or Kohn–Sham) at one
//! geometry, printed as a table or JSON.

use std::path::PathBuf;

use clap::{Args, ValueEnum};

use super::exit;
use crate::chem::xyz::read_single_xyz_file;
use crate::electronic::qc::basis::{BasisSet, BasisSetData, Harmonics};
use crate::electronic::qc::dft::grid::GridSpec;
use crate::electronic::qc::dft::ks::{self, KsOptions};
use crate::electronic::qc::integrals::JkOptions;
use crate::electronic::qc::scf::{self, Electrons, Guess, Reference, ScfError, ScfOptions};
use crate::units;

/// The SCF method.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum Method {
    /// Restricted closed-shell Hartree–Fock.
    Rhf,
    /// Unrestricted Hartree–Fock.
    Uhf,
    /// Restricted open-shell (high-spin) Hartree–Fock.
    Rohf,
    /// Restricted closed-shell Kohn–Sham.
    Rks,
    /// Unrestricted Kohn–Sham.
    Uks,
    /// Restricted open-shell (high-spin) Kohn–Sham: the spin-flip reference.
    Roks,
}

impl Method {
    pub(crate) fn reference(self) -> Reference {
        match self {
            Method::Rhf | Method::Rks => Reference::Restricted,
            Method::Uhf | Method::Uks => Reference::Unrestricted,
            Method::Rohf | Method::Roks => Reference::RestrictedOpen,
        }
    }
    pub(crate) fn is_ks(self) -> bool {
        matches!(self, Method::Rks | Method::Uks | Method::Roks)
    }
    pub(crate) fn label(self) -> &'static str {
        match self {
            Method::Rhf => "RHF",
            Method::Uhf => "UHF",
            Method::Rohf => "ROHF",
            Method::Rks => "RKS",
            Method::Uks => "UKS",
            Method::Roks => "ROKS",
        }
    }
}

/// Starting guess.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum GuessKind {
    /// Superposition of atomic densities.
    Atoms,
    /// Core Hamiltonian.
    Core,
}

/// Cartesian or spherical d/f functions.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum HarmonicsArg {
    /// Cartesian (6d, 10f).
    Cartesian,
    /// Spherical (5d, 7f).
    Spherical,
}

/// Spin-flip excited states after the SCF.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum Excited {
    /// MRSF-TDDFT: spin-adapted singlets and triplets from both references.
    Mrsf,
    /// Collinear SF-TDA from the Ms = +1 reference (comparison; spin-contaminated).
    Sf,
}

/// Whether MRSF singlets include the core→virtual configurations.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum SingletCv {
    /// Keep them (the published configuration space; <S²> = 2 w_CV).
    Keep,
    /// Drop them: exactly spin-pure singlets, a little less correlation.
    Drop,
}

/// Arguments of `flipswarm single-point`.
#[derive(Debug, Args)]
pub struct SinglePointArgs {
    /// Geometry: an XYZ file (Å), first frame.
    pub geometry: PathBuf,
    /// SCF method.
    #[arg(long, value_enum, default_value = "roks")]
    pub method: Method,
    /// Exchange–correlation functional for rks/uks/roks: bhhlyp, b3lyp, pbe0,
    /// pbe, hf, or libxc names joined by '+' with optional weights
    /// ("0.5*GGA_X_B88+GGA_C_LYP+0.5*HF").
    #[arg(long, default_value = "bhhlyp")]
    pub functional: String,
    /// Basis set: a built-in name (STO-3G, 3-21G, 6-31G, 6-31G*, 6-31G**,
    /// 6-31+G*, cc-pVDZ, def2-SVP) or a JSON file in the basis-set-exchange
    /// schema.
    #[arg(long, default_value = "6-31G*")]
    pub basis: String,
    /// Override the basis family's Cartesian/spherical default.
    #[arg(long, value_enum)]
    pub harmonics: Option<HarmonicsArg>,
    /// Molecular charge.
    #[arg(long, default_value_t = 0, allow_negative_numbers = true)]
    pub charge: i64,
    /// Spin multiplicity 2S+1 (default: 3 for roks/rohf, otherwise 1 or 2 by
    /// electron parity).
    #[arg(long)]
    pub multiplicity: Option<usize>,
    /// Integration grid level (coarse, medium, fine, ultrafine) for Kohn–Sham.
    #[arg(long, default_value = "fine")]
    pub grid: String,
    /// Starting guess.
    #[arg(long, value_enum, default_value = "atoms")]
    pub guess: GuessKind,
    /// SCF iteration limit.
    #[arg(long, default_value_t = 128)]
    pub max_iterations: usize,
    /// Convergence threshold on the energy change (Eh).
    #[arg(long, default_value_t = 1e-10)]
    pub energy_tolerance: f64,
    /// Convergence threshold on the largest orbital-gradient element.
    #[arg(long, default_value_t = 1e-7)]
    pub gradient_tolerance: f64,
    /// Spin-flip excited states from the triplet reference (needs --method
    /// roks or rohf and multiplicity 3).
    #[arg(long, value_enum)]
    pub excited: Option<Excited>,
    /// Number of singlet states (MRSF; with sf: states = singlets + triplets).
    #[arg(long, default_value_t = 3)]
    pub singlets: usize,
    /// Number of triplet states (MRSF).
    #[arg(long, default_value_t = 0)]
    pub triplets: usize,
    /// MRSF singlets with (keep) or without (drop) the core→virtual
    /// configurations, whose singlet combination is one-third quintet.
    #[arg(long, value_enum, default_value = "keep")]
    pub singlet_cv: SingletCv,
    /// Print every iteration.
    #[arg(long)]
    pub iterations: bool,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Worker threads (0 = all cores).
    #[arg(long, default_value_t = 0)]
    pub threads: usize,
}

/// A molecule with its basis set and electrons, from the options that
/// `single-point` and `optimize` share.
pub(crate) struct MolecularInput {
    /// The geometry (bohr).
    pub mol: crate::chem::Molecule,
    /// The basis-set data.
    pub data: BasisSetData,
    /// The harmonics override, if any.
    pub harmonics: Option<Harmonics>,
    /// The basis placed on the molecule.
    pub basis: BasisSet,
    /// α and β electrons.
    pub electrons: Electrons,
    /// The spin multiplicity used (given or defaulted).
    pub multiplicity: usize,
}

/// Read the geometry and basis and count the electrons; the message names
/// the option or file that is wrong.
pub(crate) fn molecular_input(
    geometry: &std::path::Path,
    basis_name: &str,
    harmonics: Option<HarmonicsArg>,
    charge: i64,
    multiplicity: Option<usize>,
    method: Method,
) -> Result<MolecularInput, String> {
    let mol = read_single_xyz_file(geometry)
        .map_err(|e| e.to_string())?
        .molecule;
    let data = if std::path::Path::new(basis_name).is_file() {
        BasisSetData::from_file(std::path::Path::new(basis_name), Harmonics::Spherical)
    } else {
        BasisSetData::builtin(basis_name)
    }
    .map_err(|e| format!("--basis: {e}"))?;
    let harmonics = harmonics.map(|h| match h {
        HarmonicsArg::Cartesian => Harmonics::Cartesian,
        HarmonicsArg::Spherical => Harmonics::Spherical,
    });
    let basis = BasisSet::new(&mol, &data, harmonics)
        .map_err(|e| format!("{}: {e}", geometry.display()))?;
    let z = scf::nuclear_charge(&basis);
    let multiplicity = multiplicity.unwrap_or(match method {
        Method::Rohf | Method::Roks => 3,
        _ => 1 + ((z as i64 - charge).rem_euclid(2)) as usize,
    });
    let electrons = Electrons::from_charge_multiplicity(z, charge, multiplicity)
        .map_err(|e| format!("--charge {charge} --multiplicity {multiplicity}: {e}"))?;
    if method.reference() == Reference::Restricted && electrons.alpha != electrons.beta {
        return Err(format!(
            "--method {} is closed-shell but multiplicity {multiplicity} has unpaired electrons; use {} or {}",
            method.label().to_lowercase(),
            if method.is_ks() { "uks" } else { "uhf" },
            if method.is_ks() { "roks" } else { "rohf" }
        ));
    }
    Ok(MolecularInput {
        mol,
        data,
        harmonics,
        basis,
        electrons,
        multiplicity,
    })
}

/// Execute; returns the exit code.
pub fn execute(args: &SinglePointArgs) -> i32 {
    if args.threads > 0 {
        // The global pool may already exist (tests); then keep it.
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
        basis,
        electrons,
        multiplicity,
        ..
    } = input;
    let reference = args.method.reference();
    if args.excited.is_some() {
        if reference != Reference::RestrictedOpen || multiplicity != 3 {
            eprintln!("error: --excited needs the high-spin triplet reference: --method roks (or rohf) with --multiplicity 3");
            return exit::INPUT;
        }
        if args.singlets + args.triplets == 0 {
            eprintln!("error: --excited: ask for at least one state (--singlets N, --triplets N)");
            return exit::INPUT;
        }
    }
    if args.singlet_cv == SingletCv::Drop && args.excited != Some(Excited::Mrsf) {
        eprintln!("error: --singlet-cv drop applies to MRSF singlets only: add --excited mrsf");
        return exit::INPUT;
    }
    if !(args.energy_tolerance > 0.0 && args.gradient_tolerance > 0.0) {
        eprintln!("error: --energy-tolerance and --gradient-tolerance must be positive");
        return exit::INPUT;
    }
    let opts = ScfOptions {
        max_iterations: args.max_iterations,
        energy_tolerance: args.energy_tolerance,
        gradient_tolerance: args.gradient_tolerance,
        ..ScfOptions::default()
    };
    let guess = match args.guess {
        GuessKind::Atoms => Guess::AtomicSuperposition,
        GuessKind::Core => Guess::Core,
    };
    let started = std::time::Instant::now();
    let mut engine_keep: Option<crate::electronic::qc::scf::fock::JkEngine> = None;
    let mut exact_exchange = 1.0;
    let (result, grid_info, functional_label) = if args.method.is_ks() {
        let grid = match GridSpec::level(&args.grid) {
            Ok(g) => g,
            Err(e) => {
                eprintln!("error: --grid: {e}");
                return exit::INPUT;
            }
        };
        let ks_opts = KsOptions {
            functional: args.functional.clone(),
            grid,
            jk: JkOptions::default(),
        };
        let mut builder = match ks::KohnSham::new(&basis, reference, &ks_opts) {
            Ok(b) => b,
            Err(e) => {
                eprintln!("error: --functional {}: {e}", args.functional);
                return exit::INPUT;
            }
        };
        let label = builder.functional_name().to_string();
        exact_exchange = builder.functional().exact_exchange();
        let info = (builder.grid_points(), args.grid.clone());
        let r = scf::run(&basis, electrons, reference, &mut builder, &guess, &opts);
        if args.excited.is_some() {
            engine_keep = Some(builder.into_engine());
        }
        (r, Some(info), Some(label))
    } else {
        let mut builder = crate::electronic::qc::scf::fock::HartreeFock {
            engine: crate::electronic::qc::scf::fock::JkEngine::new(&basis, JkOptions::default()),
            exchange_fraction: 1.0,
        };
        let r = scf::run(&basis, electrons, reference, &mut builder, &guess, &opts);
        engine_keep = Some(builder.engine);
        (r, None, None)
    };
    let seconds = started.elapsed().as_secs_f64();
    let r = match result {
        Ok(r) => r,
        Err(e @ ScfError::NotConverged { .. }) => {
            eprintln!("error: {}: {e}", args.geometry.display());
            eprintln!("hint: try --guess core, a larger --max-iterations, or check the geometry, charge and multiplicity");
            return exit::RUNTIME;
        }
        Err(e) => {
            eprintln!("error: {}: {e}", args.geometry.display());
            return exit::RUNTIME;
        }
    };
    let excited = match (args.excited, engine_keep.as_mut()) {
        (Some(kind), Some(engine)) => {
            use crate::electronic::qc::response::{
                self, davidson::DavidsonOptions, Method as RMethod, StateRequest,
            };
            let request = StateRequest {
                method: if kind == Excited::Mrsf {
                    RMethod::Mrsf
                } else {
                    RMethod::SpinFlip
                },
                singlets: args.singlets,
                triplets: args.triplets,
            };
            let t = std::time::Instant::now();
            let solved = if args.singlet_cv == SingletCv::Drop {
                response::Mrsf::new(&basis, &r, exact_exchange, engine).and_then(|m| {
                    m.with_singlet_cv(false).solve(
                        args.singlets,
                        args.triplets,
                        &DavidsonOptions::default(),
                    )
                })
            } else {
                response::excited_states(
                    &basis,
                    &r,
                    exact_exchange,
                    engine,
                    request,
                    &DavidsonOptions::default(),
                )
            };
            match solved {
                Ok(x) => Some((x, t.elapsed().as_secs_f64())),
                Err(e) => {
                    eprintln!("error: --excited: {e}");
                    return exit::INPUT;
                }
            }
        }
        _ => None,
    };
    let method = match &functional_label {
        Some(f) => format!("{}/{}", args.method.label(), f),
        None => args.method.label().to_string(),
    };
    let (occ_a, occ_b) = r.occupations();
    if args.json {
        let v = serde_json::json!({
            "geometry": args.geometry,
            "method": method,
            "basis": basis.name,
            "basis_functions": basis.nbf,
            "harmonics": format!("{:?}", basis.harmonics).to_lowercase(),
            "charge": args.charge,
            "multiplicity": multiplicity,
            "grid": grid_info.as_ref().map(|(n, level)| serde_json::json!({"level": level, "points": n})),
            "units": "hartree",
            "energy": r.energy,
            "components": {
                "nuclear_repulsion": r.nuclear_repulsion,
                "one_electron": r.one_electron,
                "coulomb": r.coulomb,
                "exact_exchange": r.exchange,
                "exchange_correlation": r.xc,
            },
            "grid_electrons": r.grid_electrons,
            "s_squared": r.s_squared,
            "iterations": r.iterations,
            "history": r.history,
            "orbital_energies_alpha": r.orbital_energies_alpha,
            "orbital_energies_beta": r.orbital_energies_beta,
            "occupations_alpha": occ_a,
            "occupations_beta": occ_b,
            "seconds": seconds,
            "excited_states": excited.as_ref().map(|(x, secs)| excited_json(x, *secs)),
        });
        println!("{v}");
        return exit::OK;
    }
    println!(
        "{}: {method}, {} ({} basis functions, {}), charge {}, multiplicity {multiplicity}",
        args.geometry.display(),
        basis.name,
        basis.nbf,
        format!("{:?}", basis.harmonics).to_lowercase(),
        args.charge
    );
    if let Some((n, level)) = &grid_info {
        println!(
            "grid {level}: {n} points; integrated electrons {:.8} (exact {})",
            r.grid_electrons.unwrap_or(f64::NAN),
            electrons.total()
        );
    }
    if args.iterations {
        for rec in &r.history {
            println!("  {rec}");
        }
    }
    println!(
        "SCF converged in {} iterations ({} integrals, {:.2} s)",
        r.iterations,
        if r.in_core { "in-core" } else { "direct" },
        seconds
    );
    println!();
    println!("  total energy          {:>20.10} Eh", r.energy);
    println!("  nuclear repulsion     {:>20.10} Eh", r.nuclear_repulsion);
    println!("  one-electron          {:>20.10} Eh", r.one_electron);
    println!("  Coulomb               {:>20.10} Eh", r.coulomb);
    println!("  exact exchange        {:>20.10} Eh", r.exchange);
    if args.method.is_ks() {
        println!("  exchange-correlation  {:>20.10} Eh", r.xc);
    }
    println!("  <S^2>                 {:>20.6}", r.s_squared);
    println!();
    let unrestricted = reference == Reference::Unrestricted;
    if unrestricted {
        println!(
            "  {:>4}  {:>14} {:>10} {:>4}   {:>14} {:>10} {:>4}",
            "k", "alpha (Eh)", "(eV)", "occ", "beta (Eh)", "(eV)", "occ"
        );
    } else {
        println!(
            "  {:>4}  {:>14} {:>10} {:>4}",
            "k", "energy (Eh)", "(eV)", "occ"
        );
    }
    let nmo = r.orbital_energies_alpha.len();
    let homo = electrons.alpha.max(1);
    // Print occupied orbitals and the first ten virtuals.
    let last = (homo + 10).min(nmo);
    for k in 0..last {
        let ea = r.orbital_energies_alpha[k];
        if unrestricted {
            let eb = r.orbital_energies_beta[k];
            println!(
                "  {:>4}  {:>14.6} {:>10.3} {:>4}   {:>14.6} {:>10.3} {:>4}",
                k + 1,
                ea,
                ea * units::HARTREE_IN_EV,
                occ_a[k],
                eb,
                eb * units::HARTREE_IN_EV,
                occ_b[k]
            );
        } else {
            println!(
                "  {:>4}  {:>14.6} {:>10.3} {:>4}",
                k + 1,
                ea,
                ea * units::HARTREE_IN_EV,
                occ_a[k] + occ_b[k]
            );
        }
    }
    if last < nmo {
        println!("  ({} more virtual orbitals)", nmo - last);
    }
    if let Some((x, secs)) = &excited {
        println!();
        println!(
            "{} states ({:.2} s); energies relative to S0, the lowest singlet{}",
            if x.method == crate::electronic::qc::response::Method::Mrsf {
                "MRSF-TDDFT"
            } else {
                "SF-TDA (spin-unadapted)"
            },
            secs,
            if x.ground.is_none() {
                " (none computed: relative to the lowest state)"
            } else {
                ""
            }
        );
        println!(
            "  {:<6} {:<9} {:>18} {:>9} {:>8} {:>8}  dominant configurations",
            "state", "spin", "energy (Eh)", "dE (eV)", "<S^2>", "f"
        );
        for i in 0..x.states.len() {
            let s = &x.states[i];
            let label = x.label(i).unwrap_or_default();
            let de = s.excitation.map_or("-".to_string(), |e| {
                format!("{:.4}", e * units::HARTREE_IN_EV)
            });
            let f = x
                .oscillator_from_ground(i)
                .ok()
                .flatten()
                .map_or("-".to_string(), |f| format!("{f:.4}"));
            println!(
                "  {:<6} {:<9} {:>18.10} {:>9} {:>8.4} {:>8}  {}",
                label,
                s.spin.to_string(),
                s.energy,
                de,
                s.s_squared,
                f,
                s.dominant_text()
            );
        }
    }
    exit::OK
}

fn excited_json(
    x: &crate::electronic::qc::response::ExcitedStates,
    seconds: f64,
) -> serde_json::Value {
    let states: Vec<serde_json::Value> = (0..x.states.len())
        .map(|i| {
            let s = &x.states[i];
            serde_json::json!({
                "label": x.label(i).ok(),
                "spin": s.spin.to_string(),
                "energy": s.energy,
                "omega": s.omega,
                "excitation_ev": s.excitation.map(|e| e * units::HARTREE_IN_EV),
                "s_squared": s.s_squared,
                "oscillator_strength": x.oscillator_from_ground(i).ok().flatten(),
                "dominant": s.dominant_text(),
            })
        })
        .collect();
    serde_json::json!({"method": format!("{:?}", x.method), "ground": x.ground, "seconds": seconds, "states": states})
}
