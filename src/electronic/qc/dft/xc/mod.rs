//! Exchange–correlation functionals through libxc (SoftwareX 7, 1 (2018),
//! from memory), by a thin FFI layer of our own over the stable C entry
//! points of libxc 5.2 (the system library `libxc.so`, Debian `libxc-dev`
//! 5.2.3; see [`libxc_version`]).
//!
//! A [`Functional`] is a weighted sum of libxc components plus a fraction of
//! exact (Hartree–Fock) exchange. It is built from a preset or a libxc name
//! ([`Functional::preset_or_libxc`]) and evaluated on batches of grid points
//! ([`Functional::eval`]) into a caller-owned [`XcOutput`] workspace.
//!
//! # Presets
//!
//! Case-insensitive:
//!
//! | preset | libxc components | exact exchange |
//! |---|---|---|
//! | `bhhlyp` (project default) | `HYB_GGA_XC_BHANDHLYP` (436) = 0.5 B88 + LYP | 0.5 |
//! | `b3lyp` | `HYB_GGA_XC_B3LYP` (402) = 0.08 LDA_X + 0.72 B88 + 0.19 `LDA_C_VWN_RPA` + 0.81 LYP | 0.2 |
//! | `pbe0` | `HYB_GGA_XC_PBEH` (406) = 0.75 PBE exchange + PBE correlation | 0.25 |
//! | `pbe` | `GGA_X_PBE` (101) + `GGA_C_PBE` (130) | 0 |
//! | `hf` | none | 1 |
//!
//! libxc's B3LYP uses the RPA parametrisation of VWN correlation
//! (`LDA_C_VWN_RPA`, id 8): its mixture lists `lda_c_vwn_rpa` with weight
//! 0.19, and libxc's `xc_funcs.h` describes `HYB_GGA_XC_B3LYP5` (id 475) as
//! "B3LYP with VWN functional 5 instead of RPA" (checked in `tests/xc.rs`).
//! The mixture coefficients in the table are those libxc 5.2 reports for its
//! mixtures ([`Component::mixture`]); the B3 form is that of
//! J. Chem. Phys. 98, 5648 (1993) (from memory).
//!
//! # Names
//!
//! Besides the presets, any libxc name is accepted (case-insensitive, with or
//! without the `XC_` prefix: `GGA_X_B88`, `hyb_gga_xc_b3lyp`, …), and several
//! terms can be joined by `+`, each with an optional weight `w*NAME` (or
//! `NAME*w`): `0.5*GGA_X_B88+GGA_C_LYP`, `0.5*HF+0.5*GGA_X_B88+GGA_C_LYP`
//! (which is BH&HLYP again). `HF` stands for exact exchange, so `0.5*HF`
//! adds 0.5 to [`Functional::exact_exchange`]; a preset inside a sum is
//! scaled as a whole (`0.5*b3lyp`). Negative weights are written as
//! `+-0.1*NAME`. Supported: LDA and GGA functionals, global hybrids of both.
//! Meta-GGAs, range-separated hybrids, non-local (VV10) correlation, kinetic
//! functionals, model potentials without an energy, and 1D/2D functionals are
//! rejected with [`XcError::Unsupported`] ("not supported yet").
//!
//! # What is computed
//!
//! The exchange–correlation energy of the density part is
//! E_xc = ∫ e(r) d³r, with the energy density per volume e = ρ ε, where
//! ρ = ρ_α + ρ_β is the total density and ε the energy per particle.
//! [`XcOutput::e_per_particle`] holds ε (libxc's `zk`); e per volume at a
//! point is `rho_total * e_per_particle` ([`XcOutput::energy`] integrates it
//! with quadrature weights). All derivatives are partial derivatives of e
//! (per volume) with respect to the density variables, libxc's convention:
//!
//! * unpolarised ([`Spin::Unpolarized`]): variables ρ (total density) and
//!   σ = ∇ρ·∇ρ = |∇ρ|²; `vrho` = ∂e/∂ρ, `vsigma` = ∂e/∂σ, `v2rho2` = ∂²e/∂ρ²,
//!   `v2rhosigma` = ∂²e/∂ρ∂σ, `v2sigma2` = ∂²e/∂σ²; one number per point.
//! * polarised ([`Spin::Polarized`]): variables ρ_α, ρ_β and
//!   σ_αα = ∇ρ_α·∇ρ_α, σ_αβ = ∇ρ_α·∇ρ_β, σ_ββ = ∇ρ_β·∇ρ_β. Per point,
//!   interleaved (point-major), the layout of libxc:
//!   - input `rho`: (α, β), 2 per point; `sigma`: (αα, αβ, ββ), 3 per point;
//!   - `vrho`: ∂e/∂ρ_s (α, β); `vsigma`: ∂e/∂σ_st (αα, αβ, ββ);
//!   - `v2rho2`: (αα, αβ, ββ); `v2rhosigma`: ∂²e/∂ρ_s∂σ_tu in the order
//!     (α_αα, α_αβ, α_ββ, β_αα, β_αβ, β_ββ); `v2sigma2`:
//!     (αα_αα, αα_αβ, αα_ββ, αβ_αβ, αβ_ββ, ββ_ββ).
//!
//! Note that σ_αβ is an independent variable: `vsigma[αβ]` is ∂e/∂σ_αβ, not
//! half of it. The Kohn–Sham matrix of a GGA follows from the chain rule
//! (common practice): for spin α
//! V^α_μν = ∫ [ v_ρα φ_μ φ_ν + (2 v_σαα ∇ρ_α + v_σαβ ∇ρ_β)·∇(φ_μ φ_ν) ] d³r,
//! and unpolarised V_μν = ∫ [ v_ρ φ_μ φ_ν + 2 v_σ ∇ρ·∇(φ_μ φ_ν) ] d³r
//! (the same matrix for both spins).
//!
//! The two spin cases are related by the identity (common practice) that a
//! polarised evaluation at ρ_α = ρ_β = ρ/2, σ_αα = σ_αβ = σ_ββ = σ/4 (i.e.
//! ∇ρ_α = ∇ρ_β = ∇ρ/2) gives the unpolarised e, with vrho_α = vrho_β = vrho and
//! vsigma = (vsigma_αα + vsigma_αβ + vsigma_ββ)/4. Exchange obeys the
//! spin-scaling relation E_x(ρ_α, ρ_β) = ½ (E_x(2ρ_α) + E_x(2ρ_β))
//! (Phys. Rev. A 20, 397 (1979), from memory), which libxc uses to build
//! polarised exchange from the unpolarised form; correlation has no such
//! relation and is a genuine function of both spin densities.
//!
//! Mixed sums: a [`Functional`] whose components include a GGA is a GGA
//! ([`Functional::family`]); it needs `sigma`, and its LDA components add
//! nothing to `vsigma`, `v2rhosigma`, `v2sigma2`. An LDA-only functional
//! ignores `sigma` (it may be empty) and leaves the σ buffers empty.
//!
//! # Exact exchange
//!
//! A hybrid's total energy is E = E_xc[ρ_α, ρ_β] + a_x E_x^HF with
//! E_x^HF = −½ Σ_s Σ_{i,j ∈ s} (ij|ji), so the Fock matrix of spin s gets
//! −a_x K_s. [`Functional::exact_exchange`] returns a_x: the sum over
//! components of weight × libxc's `xc_hyb_exx_coef` (for hybrid components),
//! plus the weights of `HF` terms. BH&HLYP 0.5, B3LYP 0.2, PBE0 0.25, PBE 0,
//! HF 1.
//!
//! # Small densities: the conventions
//!
//! libxc handles small densities itself, and this layer keeps its defaults
//! (each component's own `dens_threshold`, changeable with
//! [`Functional::set_density_threshold`]). Measured with libxc 5.2.3 (and
//! identical, bit for bit, in the libxc 7.0.0 build inside PySCF 2.14.0 on
//! the fixture points of `tests/xc.rs`):
//!
//! * a point whose **total** density ρ_α + ρ_β (or ρ) is below a component's
//!   `dens_threshold` contributes exactly zero (energy and all derivatives).
//!   Defaults: 1e−15 for LDA_X, VWN, B88, PBE exchange, 1e−14 for LYP,
//!   1e−12 for PBE correlation; the parts of a libxc mixture (B3LYP …) keep
//!   their own.
//! * otherwise a spin density below the threshold, zero or negative (from
//!   numerical noise), is replaced by the threshold (results at ρ_β = 0,
//!   −10⁻³ and 10⁻¹⁵ are identical for LYP and PBE correlation); σ_ss is
//!   raised to `sigma_threshold`², σ_αβ is clipped to the range allowed by
//!   |∇ρ_α ± ∇ρ_β|² ≥ 0, and |ζ| is limited to 1 − `zeta_threshold` (the
//!   machine epsilon). Non-finite input is an error ([`XcError::NonFinite`]).
//! * **fully polarised points** (ρ_β = 0 exactly, and σ_αβ = σ_ββ = 0;
//!   likewise ρ_α = 0). The convention, libxc's: the point is evaluated at
//!   ρ_β = `dens_threshold`. So
//!   - the energy density and the derivatives in the occupied channel are
//!     the fully polarised values up to O(threshold/ρ_α): LYP, which has no
//!     same-spin correlation and should give exactly 0, gives ε of about
//!     1e−12 of the exchange energy at ρ_α = 2e−4 and 1e−16 at ρ_α = 9;
//!   - the first derivatives in the empty channel are finite one-sided
//!     limits: vrho_β of PBE correlation is 12.9 at ρ_α = 0.3,
//!     σ_αα = 0.05 (LYP −0.24); of exchange 0 up to rounding (the potential
//!     of an empty exchange channel vanishes);
//!   - second derivatives in the empty channel diverge as ρ_β → 0 for
//!     correlation (and in σ_ββ) and come out as large, threshold-dependent
//!     numbers (about 1e9 for VWN and LYP, 4e12 for PBE correlation at
//!     ρ_α = 0.3): not limits, but libxc's convention (agreeing between 5.2.3
//!     and 7.0.0 because both use the same thresholds). A response kernel
//!     must weight them by the density response of that channel, which
//!     vanishes there; exchange second derivatives in the empty channel are
//!     0 (up to rounding).
//!
//! # Threads
//!
//! A [`Functional`] is `Send` but not `Sync`: one thread evaluates it at a
//! time. For parallel grid batches give each worker its own copy
//! ([`Functional::try_clone`]); [`XcOutput`] is a per-worker workspace whose
//! buffers are resized (never shrunk in capacity) on each call.
//!
//! ```
//! use flipswarm::electronic::qc::dft::xc::{Functional, Spin, XcInput, XcOutput};
//! let f = Functional::preset_or_libxc("bhhlyp", Spin::Unpolarized).unwrap();
//! assert_eq!(f.exact_exchange(), 0.5);
//! let (rho, sigma) = ([0.1, 1.0], [0.01, 0.3]);
//! let mut out = XcOutput::new();
//! f.eval(&XcInput { rho: &rho, sigma: &sigma }, 1, &mut out).unwrap();
//! assert_eq!(out.vrho.len(), 2);
//! assert!(out.e_per_particle.iter().all(|&e| e < 0.0));
//! ```

mod ffi;

use thiserror::Error;

use crate::config::suggest;

/// Spin treatment of an evaluation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Spin {
    /// One total density ρ and σ = |∇ρ|² per point.
    Unpolarized,
    /// Spin densities (ρ_α, ρ_β) and (σ_αα, σ_αβ, σ_ββ) per point.
    Polarized,
}

impl Spin {
    /// Density values per point (1 or 2).
    pub fn rho_per_point(self) -> usize {
        match self {
            Spin::Unpolarized => 1,
            Spin::Polarized => 2,
        }
    }

    /// σ values per point (1 or 3).
    pub fn sigma_per_point(self) -> usize {
        match self {
            Spin::Unpolarized => 1,
            Spin::Polarized => 3,
        }
    }

    fn nspin(self) -> i32 {
        match self {
            Spin::Unpolarized => ffi::XC_UNPOLARIZED,
            Spin::Polarized => ffi::XC_POLARIZED,
        }
    }

    /// Sizes per point of (vrho, vsigma, v2rho2, v2rhosigma, v2sigma2).
    fn dims(self) -> [usize; 5] {
        match self {
            Spin::Unpolarized => [1, 1, 1, 1, 1],
            Spin::Polarized => [2, 3, 3, 6, 6],
        }
    }
}

/// Family of a functional (the ingredients it needs).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Family {
    /// Local: the density only.
    Lda,
    /// Generalised gradient: the density and σ.
    Gga,
}

/// Errors of building or evaluating a functional.
#[derive(Debug, Error)]
pub enum XcError {
    /// A name that is neither a preset, `HF`, nor a libxc functional.
    #[error("unknown exchange–correlation functional `{name}` (not a preset: bhhlyp, b3lyp, pbe0, pbe, hf; nor a libxc name); did you mean `{suggestion}`?")]
    UnknownName {
        /// The term as given.
        name: String,
        /// The closest preset (or libxc name, if one is very close).
        suggestion: String,
    },
    /// A libxc functional of a kind this layer does not handle (yet).
    #[error("functional `{name}` is {what}: not supported yet (LDA and GGA functionals and their global hybrids are)")]
    Unsupported {
        /// libxc name.
        name: String,
        /// What it is, e.g. "a meta-GGA".
        what: String,
    },
    /// A malformed term of a `+`-joined expression.
    #[error("functional `{expression}`: term `{term}`: {reason}")]
    BadTerm {
        /// The whole expression.
        expression: String,
        /// The offending term.
        term: String,
        /// What is wrong with it.
        reason: String,
    },
    /// libxc refused to initialise a functional it knows by name.
    #[error("libxc could not initialise functional `{name}` (id {id}) for {spin:?}")]
    InitFailed {
        /// libxc name.
        name: String,
        /// libxc id.
        id: i32,
        /// Requested spin treatment.
        spin: Spin,
    },
    /// `rho` has a length that is not a whole number of points.
    #[error(
        "rho has {len} values, not a multiple of {per_point} ({spin:?}: {per_point} per point)"
    )]
    RhoLength {
        /// Length given.
        len: usize,
        /// Values per point.
        per_point: usize,
        /// Spin treatment of the functional.
        spin: Spin,
    },
    /// `sigma` does not match `rho`.
    #[error("sigma has {len} values but {points} points need {expected} ({spin:?}: {per_point} per point){hint}")]
    SigmaLength {
        /// Length given.
        len: usize,
        /// Points implied by `rho`.
        points: usize,
        /// Length required.
        expected: usize,
        /// Values per point.
        per_point: usize,
        /// Spin treatment of the functional.
        spin: Spin,
        /// Extra explanation.
        hint: &'static str,
    },
    /// A derivative order other than 0, 1, 2.
    #[error(
        "derivative order {order} is not available (0: energy, 1: first, 2: second derivatives)"
    )]
    Order {
        /// Order requested.
        order: usize,
    },
    /// libxc does not implement a requested derivative for a component.
    #[error("libxc has no {what} for functional `{name}`")]
    MissingDerivative {
        /// libxc name.
        name: String,
        /// "energy", "first derivatives" or "second derivatives".
        what: &'static str,
    },
    /// NaN or infinity in the input.
    #[error("{what}[{index}] = {value} is not finite")]
    NonFinite {
        /// "rho" or "sigma".
        what: &'static str,
        /// Index in the buffer.
        index: usize,
        /// The value.
        value: f64,
    },
    /// An unusable density threshold.
    #[error("density threshold {value} must be positive and finite")]
    BadThreshold {
        /// The value given.
        value: f64,
    },
    /// Integration weights that do not match the evaluated points.
    #[error("{len} quadrature weights for {points} evaluated points")]
    WeightLength {
        /// Length given.
        len: usize,
        /// Points of the last evaluation.
        points: usize,
    },
}

/// Input of one evaluation: borrowed density variables in libxc's layout
/// (module docs): unpolarised `rho[np]`, `sigma[np]`; polarised
/// `rho[2 np]` (α, β interleaved) and `sigma[3 np]` (αα, αβ, ββ).
/// `sigma` may be empty for an LDA-only functional.
#[derive(Debug, Clone, Copy)]
pub struct XcInput<'a> {
    /// Densities (bohr⁻³).
    pub rho: &'a [f64],
    /// Contracted gradients σ (bohr⁻⁸).
    pub sigma: &'a [f64],
}

/// Results of an evaluation, in libxc's layout (module docs), summed over
/// the components with their weights. A reusable workspace: each call of
/// [`Functional::eval`] resizes the buffers to the points evaluated (keeping
/// their allocation); buffers of derivatives not requested, and the σ
/// buffers of an LDA-only functional, are left empty.
#[derive(Debug, Clone, Default)]
pub struct XcOutput {
    /// Energy per particle ε (libxc's `zk`), one per point; the energy
    /// density per volume is e = (ρ_α + ρ_β) ε.
    pub e_per_particle: Vec<f64>,
    /// ∂e/∂ρ (1 or 2 per point).
    pub vrho: Vec<f64>,
    /// ∂e/∂σ (1 or 3 per point).
    pub vsigma: Vec<f64>,
    /// ∂²e/∂ρ² (1 or 3 per point).
    pub v2rho2: Vec<f64>,
    /// ∂²e/∂ρ∂σ (1 or 6 per point).
    pub v2rhosigma: Vec<f64>,
    /// ∂²e/∂σ² (1 or 6 per point).
    pub v2sigma2: Vec<f64>,
    points: usize,
    spin: Option<Spin>,
    scratch: Box<Scratch>,
}

/// Per-component buffers before weighting.
#[derive(Debug, Clone, Default)]
struct Scratch {
    zk: Vec<f64>,
    vrho: Vec<f64>,
    vsigma: Vec<f64>,
    v2rho2: Vec<f64>,
    v2rhosigma: Vec<f64>,
    v2sigma2: Vec<f64>,
}

impl XcOutput {
    /// An empty workspace.
    pub fn new() -> XcOutput {
        XcOutput::default()
    }

    /// Number of points of the last evaluation.
    pub fn points(&self) -> usize {
        self.points
    }

    /// Spin treatment of the last evaluation (`None` before the first).
    pub fn spin(&self) -> Option<Spin> {
        self.spin
    }

    /// Σ_i w_i ρ_i ε_i: the quadrature of the energy density over the points
    /// of the last evaluation, with `input` the same densities (ρ_i is the
    /// total density, ρ_α + ρ_β when polarised).
    pub fn energy(&self, input: &XcInput, weights: &[f64]) -> Result<f64, XcError> {
        let spin = self.spin.unwrap_or(Spin::Unpolarized);
        let nr = spin.rho_per_point();
        if weights.len() != self.points {
            return Err(XcError::WeightLength {
                len: weights.len(),
                points: self.points,
            });
        }
        if input.rho.len() != self.points * nr {
            return Err(XcError::RhoLength {
                len: input.rho.len(),
                per_point: nr,
                spin,
            });
        }
        Ok(weights
            .iter()
            .zip(input.rho.chunks_exact(nr))
            .zip(&self.e_per_particle)
            .map(|((w, r), e)| w * r.iter().sum::<f64>() * e)
            .sum())
    }
}

/// One libxc functional of a [`Functional`], with its weight.
pub struct Component {
    /// libxc id (e.g. 436 for `HYB_GGA_XC_BHANDHLYP`).
    pub libxc_id: i32,
    /// libxc's name, lower case (e.g. `hyb_gga_xc_bhandhlyp`).
    pub libxc_name: String,
    /// libxc's description (e.g. "Becke half-and-half").
    pub description: String,
    /// Weight in the sum.
    pub weight: f64,
    /// LDA or GGA.
    pub family: Family,
    /// Exact-exchange fraction of this component alone (libxc's
    /// `xc_hyb_exx_coef` for hybrids, 0 otherwise), before the weight.
    pub exact_exchange: f64,
    flags: i32,
    func: ffi::Func,
}

impl Component {
    /// The parts of a libxc mixture, (libxc name, weight), as libxc reports
    /// them (`xc_aux_func_ids` / `xc_aux_func_weights`); empty for a
    /// functional that is not a mixture.
    pub fn mixture(&self) -> Vec<(String, f64)> {
        self.func
            .aux()
            .into_iter()
            .map(|(id, w)| {
                (
                    ffi::name_of_number(id).unwrap_or_else(|| format!("id {id}")),
                    w,
                )
            })
            .collect()
    }
}

impl std::fmt::Debug for Component {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Component")
            .field("libxc_id", &self.libxc_id)
            .field("libxc_name", &self.libxc_name)
            .field("weight", &self.weight)
            .field("family", &self.family)
            .field("exact_exchange", &self.exact_exchange)
            .finish()
    }
}

/// An exchange–correlation functional: a weighted sum of libxc components
/// and a fraction of exact exchange. Owns its libxc objects (freed on drop).
#[derive(Debug)]
pub struct Functional {
    name: String,
    spin: Spin,
    components: Vec<Component>,
    exact_exchange: f64,
    /// Exact exchange from `HF` terms (and the `hf` preset).
    exx_terms: f64,
    family: Family,
    dens_threshold: Option<f64>,
}

// SAFETY: the libxc objects behind the components are heap memory owned
// exclusively by this value (allocated by `xc_func_alloc`, never shared or
// aliased); libxc keeps no reference to the creating thread and no
// thread-local state for them, so moving the owner to another thread and
// using or freeing the objects there is sound. Not `Sync`: evaluation from
// two threads at once through `&Functional` is not promised by libxc's
// documentation, so each thread gets its own copy (`try_clone`).
unsafe impl Send for Functional {}

/// A preset: name, libxc components (id, weight), extra exact exchange.
type Preset = (&'static str, &'static [(i32, f64)], f64);

/// The presets (ids as in libxc 5.2's `xc_funcs.h`).
const PRESETS: &[Preset] = &[
    ("bhhlyp", &[(436, 1.0)], 0.0),
    ("b3lyp", &[(402, 1.0)], 0.0),
    ("pbe0", &[(406, 1.0)], 0.0),
    ("pbe", &[(101, 1.0), (130, 1.0)], 0.0),
    ("hf", &[], 1.0),
];

/// The preset names, in the order of the module docs.
pub const PRESET_NAMES: [&str; 5] = ["bhhlyp", "b3lyp", "pbe0", "pbe", "hf"];

/// The version of the linked libxc (e.g. "5.2.3").
pub fn libxc_version() -> String {
    ffi::version_string()
}

/// (major, minor, micro) version numbers of the linked libxc.
pub fn libxc_version_numbers() -> (i32, i32, i32) {
    ffi::version()
}

impl Functional {
    /// Builds a functional from a preset (`bhhlyp`, `b3lyp`, `pbe0`, `pbe`,
    /// `hf`, case-insensitive), a libxc name, or a `+`-joined weighted sum
    /// of these and `HF` (module docs).
    pub fn preset_or_libxc(name: &str, spin: Spin) -> Result<Functional, XcError> {
        let expression = name.trim();
        let terms = split_terms(expression);
        if terms.iter().all(|t| t.trim().is_empty()) {
            return Err(XcError::BadTerm {
                expression: expression.to_string(),
                term: String::new(),
                reason: "empty functional name".into(),
            });
        }
        // (id, weight) to initialise, and exact exchange from HF terms
        let mut ids: Vec<(i32, f64)> = Vec::new();
        let mut exx_terms = 0.0;
        for term in terms {
            let (weight, word) = parse_term(expression, term)?;
            let lower = word.to_ascii_lowercase();
            if lower == "hf" {
                exx_terms += weight;
            } else if let Some((_, comps, exx)) = PRESETS.iter().find(|(p, _, _)| *p == lower) {
                ids.extend(comps.iter().map(|&(id, w)| (id, weight * w)));
                exx_terms += weight * exx;
            } else if let Some(id) = ffi::number_of_name(word) {
                ids.push((id, weight));
            } else {
                return Err(unknown_name(word));
            }
        }
        let mut components = Vec::with_capacity(ids.len());
        for (id, weight) in ids {
            components.push(make_component(id, weight, spin)?);
        }
        Ok(Functional::assemble(
            expression.to_string(),
            spin,
            components,
            exx_terms,
            None,
        ))
    }

    fn assemble(
        name: String,
        spin: Spin,
        components: Vec<Component>,
        exx_terms: f64,
        dens_threshold: Option<f64>,
    ) -> Functional {
        let exact_exchange = exx_terms
            + components
                .iter()
                .map(|c| c.weight * c.exact_exchange)
                .sum::<f64>();
        let family = components
            .iter()
            .map(|c| c.family)
            .max()
            .unwrap_or(Family::Lda);
        Functional {
            name,
            spin,
            components,
            exact_exchange,
            exx_terms,
            family,
            dens_threshold,
        }
    }

    /// An independent copy (new libxc objects, same components, weights and
    /// density threshold), e.g. one per worker thread.
    pub fn try_clone(&self) -> Result<Functional, XcError> {
        let mut components = Vec::with_capacity(self.components.len());
        for c in &self.components {
            components.push(make_component(c.libxc_id, c.weight, self.spin)?);
        }
        let mut f = Functional::assemble(
            self.name.clone(),
            self.spin,
            components,
            self.exx_terms,
            None,
        );
        if let Some(t) = self.dens_threshold {
            f.set_density_threshold(t)?;
        }
        Ok(f)
    }

    /// Fraction a_x of exact exchange (module docs): weight × libxc's
    /// `xc_hyb_exx_coef` summed over hybrid components, plus `HF` terms.
    pub fn exact_exchange(&self) -> f64 {
        self.exact_exchange
    }

    /// The highest family among the components: [`Family::Gga`] if any
    /// component is a GGA. A functional without density part (`hf`) reports
    /// [`Family::Lda`] (it needs no σ; its evaluation gives zeros); check
    /// [`Functional::is_hf_only`] to skip the grid altogether.
    pub fn family(&self) -> Family {
        self.family
    }

    /// True when there is no libxc component (pure exact exchange, e.g. `hf`
    /// or `0.5*HF`): no grid work is needed.
    pub fn is_hf_only(&self) -> bool {
        self.components.is_empty()
    }

    /// The name as given (trimmed).
    pub fn name(&self) -> &str {
        &self.name
    }

    /// Spin treatment chosen at construction.
    pub fn spin(&self) -> Spin {
        self.spin
    }

    /// The libxc components with their weights.
    pub fn components(&self) -> &[Component] {
        &self.components
    }

    /// Sets libxc's density threshold on every component (module docs;
    /// libxc's per-functional defaults otherwise).
    pub fn set_density_threshold(&mut self, threshold: f64) -> Result<(), XcError> {
        if !(threshold.is_finite() && threshold > 0.0) {
            return Err(XcError::BadThreshold { value: threshold });
        }
        for c in &mut self.components {
            c.func.set_dens_threshold(threshold);
        }
        self.dens_threshold = Some(threshold);
        Ok(())
    }

    /// Evaluates the energy per particle and, for `order` ≥ 1, the first and,
    /// for `order` = 2, the second derivatives of e = ρε at all points of
    /// `input`, summed over components with their weights, into `out`
    /// (layout in the module docs). The number of points is
    /// `rho.len() / spin.rho_per_point()`.
    pub fn eval(&self, input: &XcInput, order: usize, out: &mut XcOutput) -> Result<(), XcError> {
        if order > 2 {
            return Err(XcError::Order { order });
        }
        let spin = self.spin;
        let [nr, ns, nrr, nrs, nss] = spin.dims();
        if input.rho.len() % nr != 0 {
            return Err(XcError::RhoLength {
                len: input.rho.len(),
                per_point: nr,
                spin,
            });
        }
        let np = input.rho.len() / nr;
        let gga = self.family == Family::Gga;
        let sigma_ok = input.sigma.len() == np * ns || (!gga && input.sigma.is_empty());
        if !sigma_ok {
            return Err(XcError::SigmaLength {
                len: input.sigma.len(),
                points: np,
                expected: np * ns,
                per_point: ns,
                spin,
                hint: if gga {
                    ""
                } else {
                    " (or none for an LDA-only functional)"
                },
            });
        }
        check_finite("rho", input.rho)?;
        if gga {
            check_finite("sigma", input.sigma)?;
        }
        for c in &self.components {
            let need = [
                (ffi::XC_FLAGS_HAVE_EXC, "energy"),
                (ffi::XC_FLAGS_HAVE_VXC, "first derivatives"),
                (ffi::XC_FLAGS_HAVE_FXC, "second derivatives"),
            ];
            for &(flag, what) in &need[..=order] {
                if c.flags & flag == 0 {
                    return Err(XcError::MissingDerivative {
                        name: c.libxc_name.clone(),
                        what,
                    });
                }
            }
        }

        // resize the outputs (zeroed), keep allocations
        let gsize = |n: usize| if gga { n } else { 0 };
        reset(&mut out.e_per_particle, np);
        reset(&mut out.vrho, if order >= 1 { np * nr } else { 0 });
        reset(&mut out.vsigma, if order >= 1 { gsize(np * ns) } else { 0 });
        reset(&mut out.v2rho2, if order >= 2 { np * nrr } else { 0 });
        reset(
            &mut out.v2rhosigma,
            if order >= 2 { gsize(np * nrs) } else { 0 },
        );
        reset(
            &mut out.v2sigma2,
            if order >= 2 { gsize(np * nss) } else { 0 },
        );
        out.points = np;
        out.spin = Some(spin);

        let s = &mut *out.scratch;
        for c in &self.components {
            if c.weight == 0.0 || np == 0 {
                continue;
            }
            let cg = c.family == Family::Gga;
            let csize = |n: usize| if cg { n } else { 0 };
            reset(&mut s.zk, np);
            reset(&mut s.vrho, if order >= 1 { np * nr } else { 0 });
            reset(&mut s.vsigma, if order >= 1 { csize(np * ns) } else { 0 });
            reset(&mut s.v2rho2, if order >= 2 { np * nrr } else { 0 });
            reset(
                &mut s.v2rhosigma,
                if order >= 2 { csize(np * nrs) } else { 0 },
            );
            reset(
                &mut s.v2sigma2,
                if order >= 2 { csize(np * nss) } else { 0 },
            );
            if cg {
                let first = (order >= 1).then_some((&mut s.vrho[..], &mut s.vsigma[..]));
                let second = (order >= 2).then_some((
                    &mut s.v2rho2[..],
                    &mut s.v2rhosigma[..],
                    &mut s.v2sigma2[..],
                ));
                c.func
                    .gga(np, input.rho, input.sigma, &mut s.zk, first, second);
            } else {
                let first = (order >= 1).then_some(&mut s.vrho[..]);
                let second = (order >= 2).then_some(&mut s.v2rho2[..]);
                c.func.lda(np, input.rho, &mut s.zk, first, second);
            }
            let w = c.weight;
            axpy(&mut out.e_per_particle, w, &s.zk);
            axpy(&mut out.vrho, w, &s.vrho);
            axpy(&mut out.v2rho2, w, &s.v2rho2);
            if cg {
                axpy(&mut out.vsigma, w, &s.vsigma);
                axpy(&mut out.v2rhosigma, w, &s.v2rhosigma);
                axpy(&mut out.v2sigma2, w, &s.v2sigma2);
            }
        }
        Ok(())
    }
}

/// Clears and zero-fills `v` to length `n`, keeping its allocation.
fn reset(v: &mut Vec<f64>, n: usize) {
    v.clear();
    v.resize(n, 0.0);
}

/// y += w x over the common length (x is empty or as long as y).
fn axpy(y: &mut [f64], w: f64, x: &[f64]) {
    if w == 1.0 {
        y.iter_mut().zip(x).for_each(|(y, x)| *y += x);
    } else {
        y.iter_mut().zip(x).for_each(|(y, x)| *y += w * x);
    }
}

fn check_finite(what: &'static str, v: &[f64]) -> Result<(), XcError> {
    match v.iter().position(|x| !x.is_finite()) {
        Some(index) => Err(XcError::NonFinite {
            what,
            index,
            value: v[index],
        }),
        None => Ok(()),
    }
}

/// Splits at `+`, except the `+` of an exponent inside a leading number
/// (`1e+2*HF`).
fn split_terms(expr: &str) -> Vec<&str> {
    let mut terms = Vec::new();
    let mut start = 0;
    for (i, ch) in expr.char_indices() {
        if ch != '+' {
            continue;
        }
        let sofar = expr[start..i].trim();
        let in_exponent = sofar.len() >= 2
            && sofar.ends_with(['e', 'E'])
            && sofar[..sofar.len() - 1]
                .trim_start_matches(['-', '+'])
                .chars()
                .all(|c| c.is_ascii_digit() || c == '.')
            && !sofar[..sofar.len() - 1]
                .trim_start_matches(['-', '+'])
                .is_empty();
        if !in_exponent {
            terms.push(&expr[start..i]);
            start = i + 1;
        }
    }
    terms.push(&expr[start..]);
    terms
}

/// (weight, name) of one term: `NAME`, `w*NAME` or `NAME*w`.
fn parse_term<'a>(expression: &str, term: &'a str) -> Result<(f64, &'a str), XcError> {
    let bad = |reason: &str| XcError::BadTerm {
        expression: expression.to_string(),
        term: term.trim().to_string(),
        reason: reason.to_string(),
    };
    let t = term.trim();
    if t.is_empty() {
        return Err(bad("empty term (two `+` in a row, or one at an end)"));
    }
    let (weight, name) = match t.split_once('*') {
        None => (1.0, t),
        Some((a, b)) => {
            let (a, b) = (a.trim(), b.trim());
            if let Ok(w) = a.parse::<f64>() {
                (w, b)
            } else if let Ok(w) = b.parse::<f64>() {
                (w, a)
            } else {
                return Err(bad("expected `weight*NAME` with a number for the weight"));
            }
        }
    };
    if !weight.is_finite() {
        return Err(bad("the weight is not finite"));
    }
    if name.is_empty() || name.contains('*') {
        return Err(bad("expected one name and at most one weight"));
    }
    Ok((weight, name))
}

fn unknown_name(word: &str) -> XcError {
    let lower = word.to_ascii_lowercase();
    let bare = lower.strip_prefix("xc_").unwrap_or(&lower);
    let libxc = ffi::all_names()
        .into_iter()
        .map(|n| (suggest::distance(bare, &n), n))
        .min_by_key(|(d, _)| *d);
    let preset = PRESET_NAMES
        .iter()
        .map(|p| (suggest::distance(bare, p), *p))
        .min_by_key(|(d, _)| *d)
        .map(|(_, p)| p)
        .unwrap_or("bhhlyp");
    let suggestion = match libxc {
        Some((d, n)) if d <= 2 && d < suggest::distance(bare, preset) => n.to_ascii_uppercase(),
        _ => preset.to_string(),
    };
    XcError::UnknownName {
        name: word.to_string(),
        suggestion,
    }
}

/// Initialises libxc functional `id` and checks that this layer supports it.
fn make_component(id: i32, weight: f64, spin: Spin) -> Result<Component, XcError> {
    let libxc_name = ffi::name_of_number(id).unwrap_or_else(|| format!("id {id}"));
    let upper = libxc_name.to_ascii_uppercase();
    let func = ffi::Func::new(id, spin.nspin()).ok_or_else(|| XcError::InitFailed {
        name: upper.clone(),
        id,
        spin,
    })?;
    let info = func.info();
    let unsupported = |what: &str| XcError::Unsupported {
        name: upper.clone(),
        what: what.to_string(),
    };
    let (family, hybrid) = match info.family {
        ffi::XC_FAMILY_LDA => (Family::Lda, false),
        ffi::XC_FAMILY_HYB_LDA => (Family::Lda, true),
        ffi::XC_FAMILY_GGA => (Family::Gga, false),
        ffi::XC_FAMILY_HYB_GGA => (Family::Gga, true),
        ffi::XC_FAMILY_MGGA | ffi::XC_FAMILY_HYB_MGGA => return Err(unsupported("a meta-GGA")),
        ffi::XC_FAMILY_LCA => return Err(unsupported("a current-density functional (LCA)")),
        ffi::XC_FAMILY_OEP => {
            return Err(unsupported("an optimised-effective-potential functional"))
        }
        _ => return Err(unsupported("of an unknown libxc family")),
    };
    let range_separated = ffi::XC_FLAGS_HYB_CAM
        | ffi::XC_FLAGS_HYB_CAMY
        | ffi::XC_FLAGS_HYB_LC
        | ffi::XC_FLAGS_HYB_LCY;
    if info.flags & range_separated != 0 {
        return Err(unsupported("a range-separated hybrid"));
    }
    if info.flags & ffi::XC_FLAGS_VV10 != 0 {
        return Err(unsupported(
            "a functional with non-local (VV10) correlation",
        ));
    }
    if info.flags & ffi::XC_FLAGS_3D == 0 {
        return Err(unsupported("not a three-dimensional functional"));
    }
    match info.kind {
        ffi::XC_EXCHANGE | ffi::XC_CORRELATION | ffi::XC_EXCHANGE_CORRELATION => {}
        ffi::XC_KINETIC => return Err(unsupported("a kinetic-energy functional")),
        _ => return Err(unsupported("of an unknown kind")),
    }
    if info.flags & ffi::XC_FLAGS_HAVE_EXC == 0 {
        return Err(unsupported("a model potential without an energy"));
    }
    let exact_exchange = if hybrid { func.exx_coef() } else { 0.0 };
    Ok(Component {
        libxc_id: id,
        libxc_name,
        description: func.description(),
        weight,
        family,
        exact_exchange,
        flags: info.flags,
        func,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Parsing rules of this module (no outside source: the syntax is ours).
    #[test]
    fn split_and_parse_terms() {
        assert_eq!(split_terms("0.5*A+B"), vec!["0.5*A", "B"]);
        assert_eq!(
            split_terms("1e+2*HF+GGA_X_PBE"),
            vec!["1e+2*HF", "GGA_X_PBE"]
        );
        assert_eq!(
            split_terms("GGA_X_PBE+GGA_C_PBE"),
            vec!["GGA_X_PBE", "GGA_C_PBE"]
        );
        assert_eq!(parse_term("e", " 0.25 * hf ").unwrap(), (0.25, "hf"));
        assert_eq!(parse_term("e", "GGA_C_LYP*2").unwrap(), (2.0, "GGA_C_LYP"));
        assert!(parse_term("e", "a*b").is_err());
        assert!(parse_term("e", "0.5*").is_err());
        assert!(parse_term("e", " ").is_err());
    }
}
