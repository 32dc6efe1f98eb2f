//! Ensemble definitions: one TOML schema for files and `--set` overrides,
//! validated completely before any work starts (parse, then build).
//!
//! Keys carry their unit in the name (`timestep_fs`, `mass_au`,
//! `width_bohr`); inside, everything is converted to atomic units once, here.
//! Unknown keys are errors that name the nearest valid key; every error names
//! the file and line (or the `--set` option) and the key.
//!
//! The full list of keys, their units and defaults is [`SCHEMA`];
//! `flipswarm keys` and `flipswarm run --help` show it.

mod reader;
pub mod suggest;

use std::fmt;
use std::path::{Path, PathBuf};

pub use reader::Reader;

use crate::dynamics::{DecoherenceScheme, FrustratedHops, HopDirection, Settings};
use crate::electronic::models::{DiabaticModel, Harmonic, Lvc, Morse, Tully, TullyModel};
use crate::electronic::qc::backend::MolecularSpec;
use crate::units;

/// A configuration problem, located as precisely as possible.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub struct ConfigError {
    /// File name, or `--set` for command-line overrides.
    pub origin: String,
    /// Line in the file, when known.
    pub line: Option<usize>,
    /// The key path (`dynamics.timestep_fs`), when the problem has one.
    pub key: Option<String>,
    /// What is wrong.
    pub message: String,
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.origin)?;
        if let Some(l) = self.line {
            write!(f, ":{l}")?;
        }
        if let Some(k) = &self.key {
            write!(f, ": key `{k}`")?;
        }
        write!(f, ": {}", self.message)
    }
}

/// One documented key: path, what it holds, default.
pub struct KeyDoc {
    /// Dotted key path.
    pub path: &'static str,
    /// Meaning and unit.
    pub meaning: &'static str,
    /// Default, or "required".
    pub default: &'static str,
}

/// Every key an ensemble file may contain.
pub const SCHEMA: &[KeyDoc] = &[
    KeyDoc { path: "title", meaning: "free text describing the ensemble", default: "\"\"" },
    KeyDoc { path: "model.kind", meaning: "back end: tully-1, tully-2, tully-3, lvc, harmonic, morse, or molecule (MRSF-TDDFT of a molecule)", default: "required" },
    KeyDoc { path: "model.mass_au", meaning: "nuclear mass of 1D models, electron masses", default: "2000 (tully), 1836.15 (harmonic, morse)" },
    KeyDoc { path: "model.file", meaning: "LVC model file (relative to the ensemble file)", default: "required for lvc" },
    KeyDoc { path: "model.frequency_au", meaning: "harmonic angular frequency, hartree/ħ", default: "required for harmonic" },
    KeyDoc { path: "model.depth_hartree", meaning: "Morse well depth D", default: "required for morse" },
    KeyDoc { path: "model.range_per_bohr", meaning: "Morse range parameter a", default: "required for morse" },
    KeyDoc { path: "model.equilibrium_bohr", meaning: "equilibrium position (harmonic centre, Morse r_e)", default: "0" },
    KeyDoc { path: "model.geometry", meaning: "molecule: reference geometry, an XYZ file in Å (relative to the ensemble file); trajectories start there at rest with sampling = \"fixed\"", default: "required for molecule" },
    KeyDoc { path: "model.charge", meaning: "molecule: total charge", default: "0" },
    KeyDoc { path: "model.basis", meaning: "molecule: basis set (built-in name or basis-set-exchange JSON file)", default: "6-31G*" },
    KeyDoc { path: "model.functional", meaning: "molecule: functional of the triplet ROKS reference (bhhlyp, b3lyp, pbe0, hf for ROHF, or libxc names)", default: "bhhlyp" },
    KeyDoc { path: "model.grid", meaning: "molecule: integration grid level (coarse, medium, fine, ultrafine)", default: "medium" },
    KeyDoc { path: "model.singlets", meaning: "molecule: tracked MRSF singlets S0 … S(n−1) (the states of the dynamics)", default: "3" },
    KeyDoc { path: "model.gradients", meaning: "molecule: analytic (MRSF Z-vector gradients) or numerical (central differences of the state energies)", default: "analytic" },
    KeyDoc { path: "model.gradient_step_bohr", meaning: "molecule: central-difference step of numerical gradients and of coupling vectors, bohr", default: "0.001" },
    KeyDoc { path: "model.scf_tolerance", meaning: "molecule: SCF convergence, largest orbital-gradient element", default: "1e-8" },
    KeyDoc { path: "model.response_tolerance", meaning: "molecule: MRSF eigensolver residual norm per root", default: "1e-6" },
    KeyDoc { path: "start.sampling", meaning: "fixed (one phase-space point), wigner (Gaussian wavepacket in 1D; harmonic ground state per mode for lvc) or file (from start.initial_conditions)", default: "fixed" },
    KeyDoc { path: "start.initial_conditions", meaning: "initial-conditions file written by `flipswarm sample` (relative to the ensemble file), for sampling = \"file\"", default: "required for sampling = file" },
    KeyDoc { path: "start.position_bohr", meaning: "initial position (1D models)", default: "required for 1D models" },
    KeyDoc { path: "start.momentum_au", meaning: "initial (mean) momentum, ħ/bohr (1D models)", default: "0" },
    KeyDoc { path: "start.width_bohr", meaning: "position standard deviation of the wavepacket |ψ|² (1D, wigner)", default: "required for 1D wigner" },
    KeyDoc { path: "start.state", meaning: "initial adiabatic state, 0 = lowest", default: "0" },
    KeyDoc { path: "dynamics.timestep_fs", meaning: "nuclear time step, fs (or timestep_au)", default: "required (one of the two)" },
    KeyDoc { path: "dynamics.timestep_au", meaning: "nuclear time step, atomic units of time", default: "required (one of the two)" },
    KeyDoc { path: "dynamics.duration_fs", meaning: "simulated time, fs (or duration_au)", default: "required (one of the two)" },
    KeyDoc { path: "dynamics.duration_au", meaning: "simulated time, atomic units", default: "required (one of the two)" },
    KeyDoc { path: "dynamics.substeps", meaning: "electronic substeps per nuclear step", default: "20" },
    KeyDoc { path: "dynamics.hop_direction", meaning: "velocity adjustment at hops: coupling (along the coupling vector), velocity (uniform rescaling) or gradient-difference (along ∇E_to − ∇E_from)", default: "coupling" },
    KeyDoc { path: "dynamics.frustrated", meaning: "frustrated hops: keep or reflect", default: "keep" },
    KeyDoc { path: "dynamics.decoherence", meaning: "none or energy-based", default: "energy-based" },
    KeyDoc { path: "dynamics.decoherence_constant_hartree", meaning: "C of the energy-based correction", default: "0.1" },
    KeyDoc { path: "dynamics.max_energy_drift_ev", meaning: "total-energy change that fails a trajectory, eV", default: "0.05" },
    KeyDoc { path: "dynamics.min_overlap_determinant", meaning: "|det| of the overlap between consecutive steps' tracked states below which a state has left the tracked set: the trajectory fails if it is the active or a populated one (state tracking lost), an empty one is passed over with a warning; 0 switches the check off", default: "0.3" },
    KeyDoc { path: "dynamics.exit_region_bohr", meaning: "[low, high]: 1D trajectories stop once outside, moving away", default: "none" },
    KeyDoc { path: "output.record_every_steps", meaning: "write one row of positions, energies, amplitudes every this many steps (hops are always written)", default: "1" },
    KeyDoc { path: "output.checkpoint_every_steps", meaning: "checkpoint each trajectory every this many steps (0: by wall-clock time only)", default: "0" },
    KeyDoc { path: "output.checkpoint_interval_s", meaning: "checkpoint each running trajectory at least this often, seconds of wall-clock time", default: "60" },
    KeyDoc { path: "swarm.trajectories", meaning: "number of trajectories", default: "required" },
    KeyDoc { path: "swarm.seed", meaning: "ensemble random seed (per-trajectory streams derive from it)", default: "required" },
];

const TABLES: &[&str] = &["model", "start", "dynamics", "output", "swarm"];

/// The model, built and validated.
#[derive(Clone, Debug, PartialEq)]
pub enum ModelSpec {
    /// One of Tully's models.
    Tully(Tully),
    /// A linear vibronic coupling model and the file it came from.
    Lvc { path: PathBuf, model: Lvc },
    /// A harmonic oscillator.
    Harmonic(Harmonic),
    /// A Morse oscillator.
    Morse(Morse),
    /// MRSF-TDDFT singlets of a molecule and the geometry file it came from.
    Molecule {
        path: PathBuf,
        spec: std::sync::Arc<MolecularSpec>,
    },
}

impl ModelSpec {
    /// Number of electronic states.
    pub fn n_states(&self) -> usize {
        match self {
            ModelSpec::Tully(m) => m.n_states(),
            ModelSpec::Lvc { model, .. } => model.n_states(),
            ModelSpec::Harmonic(m) => m.n_states(),
            ModelSpec::Morse(m) => m.n_states(),
            ModelSpec::Molecule { spec, .. } => spec.singlets,
        }
    }
    /// Masses of the coordinates (electron masses).
    pub fn masses(&self) -> Vec<f64> {
        use crate::electronic::models::DiabaticModel;
        match self {
            ModelSpec::Tully(m) => m.masses(),
            ModelSpec::Lvc { model, .. } => model.masses(),
            ModelSpec::Harmonic(m) => m.masses(),
            ModelSpec::Morse(m) => m.masses(),
            ModelSpec::Molecule { spec, .. } => spec.masses(),
        }
    }
    /// Number of coordinates.
    pub fn n_dof(&self) -> usize {
        match self {
            ModelSpec::Lvc { model, .. } => model.n_modes(),
            ModelSpec::Molecule { spec, .. } => 3 * spec.calculation.molecule.len(),
            _ => 1,
        }
    }
    /// Whether this is a one-dimensional scattering-type model.
    pub fn is_one_dimensional(&self) -> bool {
        !matches!(self, ModelSpec::Lvc { .. } | ModelSpec::Molecule { .. })
    }
}

/// How initial conditions are drawn.
#[derive(Clone, Debug, PartialEq)]
pub enum Sampling {
    /// Every trajectory starts at the same point.
    Fixed { position: f64, momentum: f64 },
    /// Wigner distribution of a Gaussian wavepacket in 1D: x ~ N(x0, σ²), p ~ N(p0, (1/2σ)²).
    Wavepacket {
        position: f64,
        momentum: f64,
        width: f64,
    },
    /// Harmonic ground-state Wigner distribution in every LVC mode.
    HarmonicGround,
    /// LVC or a molecule at its reference geometry, at rest.
    Origin,
    /// Initial conditions from a file written by `flipswarm sample`: the
    /// rows used, in order (position, velocity, selected state if any).
    File {
        /// The file.
        path: PathBuf,
        /// Rows used, one per trajectory index.
        rows: std::sync::Arc<Vec<(Vec<f64>, Vec<f64>, Option<usize>)>>,
    },
}

/// Output and checkpoint cadence.
#[derive(Clone, Debug, PartialEq)]
pub struct OutputSettings {
    /// Rows every this many steps (the last step is always written).
    pub record_every: u64,
    /// Checkpoint every this many steps (0 = by time only).
    pub checkpoint_every: u64,
    /// Checkpoint at least this often (seconds of wall-clock time).
    pub checkpoint_interval_s: f64,
}

/// A validated run description, atomic units.
#[derive(Clone, Debug, PartialEq)]
pub struct RunConfig {
    /// Free text.
    pub title: String,
    /// The model.
    pub model: ModelSpec,
    /// Initial conditions.
    pub sampling: Sampling,
    /// Initial adiabatic state.
    pub initial_state: usize,
    /// Engine settings.
    pub settings: Settings,
    /// Number of trajectories.
    pub trajectories: usize,
    /// Ensemble seed.
    pub seed: u64,
    /// What is written to disk and how often.
    pub output: OutputSettings,
    /// The configuration text after overrides (kept with the results).
    pub effective_toml: String,
}

/// Read and validate an ensemble file with `key=value` overrides.
pub fn load_file(path: &Path, overrides: &[String]) -> Result<RunConfig, ConfigError> {
    let origin = path.display().to_string();
    let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
        origin: origin.clone(),
        line: None,
        key: None,
        message: format!("cannot read the ensemble file: {e}"),
    })?;
    let base = path.parent().unwrap_or(Path::new("."));
    load_str(&text, &origin, base, overrides)
}

/// Validate ensemble text; relative model files are resolved against `base`.
pub fn load_str(
    text: &str,
    origin: &str,
    base: &Path,
    overrides: &[String],
) -> Result<RunConfig, ConfigError> {
    let r = Reader::parse(text, origin, overrides)?;
    check_keys(&r)?;
    let model = build_model(&r, base)?;
    let n_states = model.n_states();
    let initial_state = r.u64("start.state")?.unwrap_or(0) as usize;
    if initial_state >= n_states {
        return Err(r.error(
            "start.state",
            format!("state {initial_state} does not exist: the model has {n_states} state(s), numbered 0–{}", n_states - 1),
        ));
    }
    let sampling = build_sampling(&r, &model, base)?;
    let settings = build_settings(&r, &model, &sampling)?;
    let trajectories = r.u64("swarm.trajectories")?.ok_or_else(|| {
        r.error(
            "swarm.trajectories",
            "missing (how many trajectories to run)",
        )
    })?;
    if trajectories == 0 || trajectories > 10_000_000 {
        return Err(r.error(
            "swarm.trajectories",
            format!("must be between 1 and 10 000 000, found {trajectories}"),
        ));
    }
    if let Sampling::File { path, rows } = &sampling {
        if (trajectories as usize) > rows.len() {
            return Err(r.error(
                "swarm.trajectories",
                format!("{trajectories} trajectories but {} has only {} usable initial conditions (with a selected state, if states were selected)", path.display(), rows.len()),
            ));
        }
    }
    let seed = r.u64("swarm.seed")?.ok_or_else(|| {
        r.error(
            "swarm.seed",
            "missing (the ensemble seed makes runs reproducible)",
        )
    })?;
    let record_every = r.u64("output.record_every_steps")?.unwrap_or(1);
    if record_every == 0 {
        return Err(r.error("output.record_every_steps", "must be at least 1"));
    }
    let checkpoint_every = r.u64("output.checkpoint_every_steps")?.unwrap_or(0);
    let checkpoint_interval_s = positive(&r, "output.checkpoint_interval_s")?.unwrap_or(60.0);
    let output = OutputSettings {
        record_every,
        checkpoint_every,
        checkpoint_interval_s,
    };
    Ok(RunConfig {
        output,
        title: r.string("title")?.unwrap_or_default(),
        model,
        sampling,
        initial_state,
        settings,
        trajectories: trajectories as usize,
        seed,
        effective_toml: r.effective_text(),
    })
}

fn check_keys(r: &Reader) -> Result<(), ConfigError> {
    let known: Vec<&str> = SCHEMA.iter().map(|k| k.path).collect();
    for (path, is_table) in r.all_keys() {
        let ok = if is_table {
            TABLES.contains(&path.as_str())
        } else {
            known.contains(&path.as_str())
        };
        if ok {
            continue;
        }
        let leaf = path.rsplit('.').next().unwrap_or(&path);
        let leaf_of = |k: &'static str| k.rsplit('.').next().unwrap_or(k);
        let same_kind: Vec<&str> = if is_table {
            TABLES.to_vec()
        } else {
            known.clone()
        };
        // The right key in the wrong table first, then the nearest spelling.
        let hint = same_kind
            .iter()
            .copied()
            .find(|k| leaf_of(k) == leaf)
            .or_else(|| suggest::nearest(&path, same_kind.iter().copied()))
            .or_else(|| {
                same_kind
                    .iter()
                    .copied()
                    .map(|k| (suggest::distance(leaf, leaf_of(k)), k))
                    .filter(|(d, _)| *d <= (leaf.len() / 2).max(2))
                    .min_by_key(|(d, _)| *d)
                    .map(|(_, k)| k)
            })
            .map(|k| format!("; did you mean `{k}`?"))
            .unwrap_or_else(|| "; see `flipswarm keys` for the valid keys".into());
        let what = if is_table {
            "unknown table"
        } else {
            "unknown key"
        };
        return Err(r.error(&path, format!("{what}{hint}")));
    }
    Ok(())
}

fn positive(r: &Reader, key: &str) -> Result<Option<f64>, ConfigError> {
    match r.f64(key)? {
        Some(x) if x <= 0.0 => Err(r.error(key, format!("must be positive, found {x}"))),
        other => Ok(other),
    }
}

fn require<T>(r: &Reader, key: &str, v: Option<T>, why: &str) -> Result<T, ConfigError> {
    v.ok_or_else(|| r.error(key, format!("missing ({why})")))
}

/// Keys that only some model kinds use; any other kind rejects them.
const MODEL_KEYS: &[(&str, &[&str])] = &[
    (
        "model.mass_au",
        &["tully-1", "tully-2", "tully-3", "harmonic", "morse"],
    ),
    ("model.file", &["lvc"]),
    ("model.frequency_au", &["harmonic"]),
    ("model.depth_hartree", &["morse"]),
    ("model.range_per_bohr", &["morse"]),
    ("model.equilibrium_bohr", &["harmonic", "morse"]),
    ("model.geometry", &["molecule"]),
    ("model.charge", &["molecule"]),
    ("model.basis", &["molecule"]),
    ("model.functional", &["molecule"]),
    ("model.grid", &["molecule"]),
    ("model.singlets", &["molecule"]),
    ("model.gradients", &["molecule"]),
    ("model.gradient_step_bohr", &["molecule"]),
    ("model.scf_tolerance", &["molecule"]),
    ("model.response_tolerance", &["molecule"]),
];

fn build_model(r: &Reader, base: &Path) -> Result<ModelSpec, ConfigError> {
    let kinds = [
        "tully-1", "tully-2", "tully-3", "lvc", "harmonic", "morse", "molecule",
    ];
    let kind = r
        .choice("model.kind", &kinds)?
        .ok_or_else(|| r.error("model.kind", "missing (which model to run)"))?;
    for (key, users) in MODEL_KEYS {
        if r.has(key) && !users.contains(&kind.as_str()) {
            return Err(r.error(
                key,
                format!(
                    "not used by model kind \"{kind}\" (only by {})",
                    users.join(", ")
                ),
            ));
        }
    }
    let proton_mass = units::amu_to_me(1.007_276_466_621);
    let mass = positive(r, "model.mass_au")?;
    let centre = r.f64("model.equilibrium_bohr")?.unwrap_or(0.0);
    Ok(match kind.as_str() {
        "tully-1" | "tully-2" | "tully-3" => {
            let which = match kind.as_str() {
                "tully-1" => TullyModel::SimpleAvoidedCrossing,
                "tully-2" => TullyModel::DualAvoidedCrossing,
                _ => TullyModel::ExtendedCoupling,
            };
            ModelSpec::Tully(Tully {
                model: which,
                mass: mass.unwrap_or(2000.0),
            })
        }
        "lvc" => {
            let file = r
                .string("model.file")?
                .ok_or_else(|| r.error("model.file", "missing (the LVC model file)"))?;
            let path = base.join(&file);
            let model = Lvc::from_file(&path).map_err(|e| r.error("model.file", e.to_string()))?;
            ModelSpec::Lvc { path, model }
        }
        "molecule" => build_molecule(r, base)?,
        "harmonic" => {
            let w = require(
                r,
                "model.frequency_au",
                positive(r, "model.frequency_au")?,
                "the angular frequency",
            )?;
            ModelSpec::Harmonic(Harmonic {
                masses: vec![mass.unwrap_or(proton_mass)],
                omegas: vec![w],
                centres: vec![centre],
            })
        }
        _ => {
            let depth = require(
                r,
                "model.depth_hartree",
                positive(r, "model.depth_hartree")?,
                "the well depth",
            )?;
            let alpha = require(
                r,
                "model.range_per_bohr",
                positive(r, "model.range_per_bohr")?,
                "the range parameter",
            )?;
            ModelSpec::Morse(Morse {
                mass: mass.unwrap_or(proton_mass),
                depth,
                alpha,
                r_eq: centre,
            })
        }
    })
}

fn build_molecule(r: &Reader, base: &Path) -> Result<ModelSpec, ConfigError> {
    use crate::electronic::qc::backend::GradientMethod;
    use crate::electronic::qc::basis::{BasisSet, BasisSetData};
    use crate::electronic::qc::dft::grid::GridSpec;
    use crate::electronic::qc::dft::xc::{Functional, Spin};
    use crate::electronic::qc::gradient::numerical::ScfEnergy;
    use crate::electronic::qc::gradient::scf::Potential;
    use crate::electronic::qc::integrals::JkOptions;
    use crate::electronic::qc::response::davidson::DavidsonOptions;
    use crate::electronic::qc::scf::{nuclear_charge, Electrons, Reference, ScfOptions};
    let file = r
        .string("model.geometry")?
        .ok_or_else(|| r.error("model.geometry", "missing (the molecule's XYZ file)"))?;
    let path = base.join(&file);
    let molecule = crate::chem::xyz::read_single_xyz_file(&path)
        .map_err(|e| r.error("model.geometry", e.to_string()))?
        .molecule;
    let basis_name = r.string("model.basis")?.unwrap_or_else(|| "6-31G*".into());
    let basis_file = base.join(&basis_name);
    let data = if basis_file.is_file() {
        BasisSetData::from_file(
            &basis_file,
            crate::electronic::qc::basis::Harmonics::Spherical,
        )
    } else {
        BasisSetData::builtin(&basis_name)
    }
    .map_err(|e| r.error("model.basis", e.to_string()))?;
    let basis = BasisSet::new(&molecule, &data, None)
        .map_err(|e| r.error("model.basis", format!("{}: {e}", path.display())))?;
    let charge = match r.f64("model.charge")? {
        None => 0,
        Some(q) if q.fract() == 0.0 && q.abs() < 1000.0 => q as i64,
        Some(q) => {
            return Err(r.error("model.charge", format!("must be a whole number, found {q}")))
        }
    };
    let electrons = Electrons::from_charge_multiplicity(nuclear_charge(&basis), charge, 3)
        .map_err(|e| {
            r.error(
                "model.charge",
                format!("the triplet reference of charge {charge}: {e}"),
            )
        })?;
    let functional = r
        .string("model.functional")?
        .unwrap_or_else(|| "bhhlyp".into());
    let potential = if functional.eq_ignore_ascii_case("hf") {
        Potential::HartreeFock
    } else {
        Functional::preset_or_libxc(&functional, Spin::Polarized)
            .map_err(|e| r.error("model.functional", e.to_string()))?;
        let level = r.string("model.grid")?.unwrap_or_else(|| "medium".into());
        let grid = GridSpec::level(&level).map_err(|e| r.error("model.grid", e.to_string()))?;
        Potential::KohnSham {
            functional: functional.clone(),
            grid,
        }
    };
    if matches!(potential, Potential::HartreeFock) && r.has("model.grid") {
        return Err(r.error(
            "model.grid",
            "not used with functional = \"hf\" (no exchange–correlation grid)",
        ));
    }
    let singlets = r.u64("model.singlets")?.unwrap_or(3);
    if !(1..=50).contains(&singlets) {
        return Err(r.error(
            "model.singlets",
            format!("must be between 1 and 50, found {singlets}"),
        ));
    }
    let step = positive(r, "model.gradient_step_bohr")?.unwrap_or(1e-3);
    if step > 0.05 {
        return Err(r.error(
            "model.gradient_step_bohr",
            format!("{step} bohr is too large for a derivative (use 1e-4 to 1e-2)"),
        ));
    }
    let scf_tol = positive(r, "model.scf_tolerance")?.unwrap_or(1e-8);
    let response_tol = positive(r, "model.response_tolerance")?.unwrap_or(1e-6);
    for (key, v) in [
        ("model.scf_tolerance", scf_tol),
        ("model.response_tolerance", response_tol),
    ] {
        if v > 1e-3 {
            return Err(r.error(key, format!("{v} is too loose for dynamics (gradients are differences of energies; use ≤ 1e-5)")));
        }
    }
    let calculation = ScfEnergy {
        molecule,
        basis: data,
        harmonics: None,
        electrons,
        reference: Reference::RestrictedOpen,
        potential,
        scf: ScfOptions {
            gradient_tolerance: scf_tol,
            energy_tolerance: 1e-10,
            ..ScfOptions::default()
        },
        jk: JkOptions::default(),
        davidson: DavidsonOptions {
            residual_tolerance: response_tol,
            ..DavidsonOptions::default()
        },
    };
    // Refuse what cannot fit before any work: one calculation must fit in
    // the available memory; the displaced calculations of a gradient run in
    // parallel, so the log gives the total for the machine's cores too.
    let grid_spec = match &calculation.potential {
        Potential::KohnSham { grid, .. } => Some(grid),
        Potential::HartreeFock => None,
    };
    let estimate = crate::electronic::qc::estimate::memory(
        basis.nbf,
        calculation.molecule.len(),
        electrons.alpha + electrons.beta,
        grid_spec,
        singlets as usize,
        &calculation.jk,
    );
    if let Some(available) = crate::electronic::qc::estimate::available_memory() {
        if estimate.total() > available {
            return Err(r.error(
                "model.basis",
                format!(
                    "one calculation of {} basis functions needs about {estimate}, more than the {} available; use a smaller basis or grid",
                    basis.nbf,
                    crate::electronic::qc::estimate::human(available)
                ),
            ));
        }
        let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
        tracing::debug!(
            "memory per calculation about {estimate}; {cores} in parallel need {}",
            crate::electronic::qc::estimate::human(cores * estimate.total())
        );
    }
    let label = format!("MRSF-TDDFT {}/{}", functional.to_uppercase(), basis_name);
    let gradients = match r
        .choice("model.gradients", &["analytic", "numerical"])?
        .as_deref()
    {
        Some("numerical") => GradientMethod::Numerical { step },
        _ => GradientMethod::Analytic {
            zvector: Default::default(),
            coupling_step: step,
        },
    };
    let spec = MolecularSpec {
        calculation,
        singlets: singlets as usize,
        gradients,
        label,
    };
    Ok(ModelSpec::Molecule {
        path,
        spec: std::sync::Arc::new(spec),
    })
}

fn build_sampling(r: &Reader, model: &ModelSpec, base: &Path) -> Result<Sampling, ConfigError> {
    let kind = r
        .choice("start.sampling", &["fixed", "wigner", "file"])?
        .unwrap_or_else(|| "fixed".into());
    if kind == "file" {
        for key in [
            "start.position_bohr",
            "start.momentum_au",
            "start.width_bohr",
        ] {
            if r.has(key) {
                return Err(r.error(
                    key,
                    "not used with sampling = \"file\" (the file holds positions and velocities)",
                ));
            }
        }
        let file = r.string("start.initial_conditions")?.ok_or_else(|| {
            r.error(
                "start.initial_conditions",
                "missing (the file written by `flipswarm sample`)",
            )
        })?;
        let path = base.join(&file);
        let set = crate::sampling::files::InitialConditions::read(&path)
            .map_err(|e| r.error("start.initial_conditions", e.to_string()))?;
        let dof = model.n_dof();
        if set.masses.len() != dof {
            return Err(r.error(
                "start.initial_conditions",
                format!(
                    "{}: {} coordinates per initial condition but the model has {dof}",
                    path.display(),
                    set.masses.len()
                ),
            ));
        }
        let model_masses = model.masses();
        if let Some(k) = (0..dof).find(|&k| {
            (set.masses[k] - model_masses[k]).abs() > 1e-9 * model_masses[k].abs().max(1.0)
        }) {
            return Err(r.error(
                "start.initial_conditions",
                format!(
                    "{}: coordinate {k} has mass {} in the file but {} in the model",
                    path.display(),
                    set.masses[k],
                    model_masses[k]
                ),
            ));
        }
        let n_states = model.n_states();
        let rows: Vec<(Vec<f64>, Vec<f64>, Option<usize>)> = match &set.excitation {
            Some(x) => (0..set.len())
                .filter_map(|i| {
                    x.initial_state[i].map(|st| {
                        (
                            set.positions[i].clone(),
                            set.velocities[i].clone(),
                            Some(st),
                        )
                    })
                })
                .collect(),
            None => (0..set.len())
                .map(|i| (set.positions[i].clone(), set.velocities[i].clone(), None))
                .collect(),
        };
        if let Some(st) = rows.iter().filter_map(|r| r.2).find(|&s| s >= n_states) {
            return Err(r.error(
                "start.initial_conditions",
                format!(
                    "{}: initial state {st} but the model has {n_states} states",
                    path.display()
                ),
            ));
        }
        return Ok(Sampling::File {
            path,
            rows: std::sync::Arc::new(rows),
        });
    }
    if r.has("start.initial_conditions") {
        return Err(r.error(
            "start.initial_conditions",
            "only used with sampling = \"file\"",
        ));
    }
    if let ModelSpec::Molecule { .. } = model {
        for key in [
            "start.position_bohr",
            "start.momentum_au",
            "start.width_bohr",
        ] {
            if r.has(key) {
                return Err(r.error(key, "not used by molecules (they start from model.geometry at rest, or from an initial-conditions file)"));
            }
        }
        if kind == "wigner" {
            return Err(r.error(
                "start.sampling",
                "molecules are Wigner-sampled from their normal modes: run `flipswarm modes` and `flipswarm sample`, then use sampling = \"file\"",
            ));
        }
        return Ok(Sampling::Origin);
    }
    if !model.is_one_dimensional() {
        for key in [
            "start.position_bohr",
            "start.momentum_au",
            "start.width_bohr",
        ] {
            if r.has(key) {
                return Err(r.error(key, "not used by LVC models (they start from their reference geometry or its Wigner distribution)"));
            }
        }
        return Ok(if kind == "wigner" {
            Sampling::HarmonicGround
        } else {
            Sampling::Origin
        });
    }
    let position = require(
        r,
        "start.position_bohr",
        r.f64("start.position_bohr")?,
        "where the trajectories start",
    )?;
    let momentum = r.f64("start.momentum_au")?.unwrap_or(0.0);
    let width = positive(r, "start.width_bohr")?;
    match (kind.as_str(), width) {
        ("fixed", Some(_)) => {
            Err(r.error("start.width_bohr", "only used with sampling = \"wigner\""))
        }
        ("fixed", None) => Ok(Sampling::Fixed { position, momentum }),
        (_, None) => Err(r.error(
            "start.width_bohr",
            "missing (the wavepacket width is needed for sampling = \"wigner\")",
        )),
        (_, Some(width)) => Ok(Sampling::Wavepacket {
            position,
            momentum,
            width,
        }),
    }
}

fn one_of(r: &Reader, fs_key: &str, au_key: &str, what: &str) -> Result<f64, ConfigError> {
    match (positive(r, fs_key)?, positive(r, au_key)?) {
        (Some(_), Some(_)) => Err(r.error(
            au_key,
            format!("give the {what} once: both `{fs_key}` and `{au_key}` are set"),
        )),
        (Some(fs), None) => Ok(units::fs_to_au(fs)),
        (None, Some(au)) => Ok(au),
        (None, None) => Err(r.error(
            fs_key,
            format!("missing (the {what}, as `{fs_key}` or `{au_key}`)"),
        )),
    }
}

fn build_settings(
    r: &Reader,
    model: &ModelSpec,
    sampling: &Sampling,
) -> Result<Settings, ConfigError> {
    let dt = one_of(
        r,
        "dynamics.timestep_fs",
        "dynamics.timestep_au",
        "time step",
    )?;
    let duration = one_of(
        r,
        "dynamics.duration_fs",
        "dynamics.duration_au",
        "simulated time",
    )?;
    if duration < dt {
        let key = if r.has("dynamics.duration_fs") {
            "dynamics.duration_fs"
        } else {
            "dynamics.duration_au"
        };
        return Err(r.error(key, "shorter than one time step"));
    }
    let steps = duration / dt;
    if steps > 1e9 {
        let key = if r.has("dynamics.timestep_fs") {
            "dynamics.timestep_fs"
        } else {
            "dynamics.timestep_au"
        };
        return Err(r.error(key, format!("{steps:.3e} steps per trajectory is more than 10⁹; lengthen the time step or shorten the run")));
    }
    let substeps = r.u64("dynamics.substeps")?.unwrap_or(20);
    if !(1..=100_000).contains(&substeps) {
        return Err(r.error(
            "dynamics.substeps",
            format!("must be between 1 and 100 000, found {substeps}"),
        ));
    }
    let hop_direction = match r
        .choice(
            "dynamics.hop_direction",
            &["coupling", "velocity", "gradient-difference"],
        )?
        .as_deref()
    {
        Some("velocity") => HopDirection::Velocity,
        Some("gradient-difference") => HopDirection::GradientDifference,
        _ => HopDirection::Coupling,
    };
    let frustrated = match r
        .choice("dynamics.frustrated", &["keep", "reflect"])?
        .as_deref()
    {
        Some("reflect") => FrustratedHops::Reflect,
        _ => FrustratedHops::Keep,
    };
    let c = positive(r, "dynamics.decoherence_constant_hartree")?.unwrap_or(0.1);
    let decoherence = match r
        .choice("dynamics.decoherence", &["none", "energy-based"])?
        .as_deref()
    {
        Some("none") => DecoherenceScheme::None,
        _ => DecoherenceScheme::EnergyBased { c },
    };
    let drift = units::ev_to_hartree(positive(r, "dynamics.max_energy_drift_ev")?.unwrap_or(0.05));
    let min_overlap_determinant = match r.f64("dynamics.min_overlap_determinant")? {
        None => 0.3,
        Some(x) if (0.0..1.0).contains(&x) => x,
        Some(x) => {
            return Err(r.error(
                "dynamics.min_overlap_determinant",
                format!("must be at least 0 and below 1, found {x}"),
            ))
        }
    };
    let exit_region = r.pair("dynamics.exit_region_bohr")?;
    if let Some((lo, hi)) = exit_region {
        let key = "dynamics.exit_region_bohr";
        if !model.is_one_dimensional() {
            return Err(r.error(key, "only one-dimensional models have an exit region"));
        }
        if lo >= hi {
            return Err(r.error(key, format!("low end {lo} is not below high end {hi}")));
        }
        let x0 = match sampling {
            Sampling::Fixed { position, .. } | Sampling::Wavepacket { position, .. } => *position,
            _ => 0.0,
        };
        if x0 < lo || x0 > hi {
            return Err(r.error(key, format!("the start position {x0} bohr lies outside [{lo}, {hi}]: every trajectory would stop at once")));
        }
    }
    Ok(Settings {
        dt,
        substeps: substeps as usize,
        max_time: duration,
        hop_direction,
        frustrated,
        decoherence,
        energy_drift_limit: drift,
        min_overlap_determinant,
        exit_region,
    })
}
