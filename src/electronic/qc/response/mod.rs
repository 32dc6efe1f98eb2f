//! Spin-flip response from a high-spin triplet ROKS (or ROHF) reference:
//! collinear SF-TDA ([`SpinFlip`]) and MRSF-TDDFT ([`Mrsf`]).
//!
//! Sources: collinear SF-TDDFT, J. Chem. Phys. 118, 4807 (2003) (from
//! memory); MRSF-TDDFT, J. Chem. Phys. 149, 104101 (2018) (from memory),
//! review Acc. Chem. Res. 58, 208 (2025). The working equations below were
//! derived here from the definitions (Slater–Condon rules in the
//! exact-exchange limit) and checked against a brute-force determinant CI in
//! `tests/mrsf.rs`.
//!
//! # Orbitals and the reference
//! One set of ROKS orbitals φ_p (AO coefficients C, nbf × nmo), partitioned
//! into core C (i, j, c; doubly occupied), the two open shells O = {O1, O2}
//! (k, l; α only) and virtuals V (a, b). The reference is the Ms = +1 triplet
//!
//! ```text
//!   |T+> = [Π_c a†_{cα} a†_{cβ}] a†_{O1α} a†_{O2α} |vac>,
//!   |T−> = [Π_c a†_{cα} a†_{cβ}] a†_{O1β} a†_{O2β} |vac>  (its Ms = −1 image),
//! ```
//!
//! with E_ref = E_ROKS. F^α, F^β are the α and β Kohn–Sham Fock matrices of
//! the ROKS density (AO matrices of the SCF result, taken to the MO basis with
//! all off-diagonal elements kept). The ROKS canonicalising eigenvalues are
//! never used: F^β_aa − F^α_ii differs from them by up to ~1 Eh.
//! An Ms = −1 reference (N_β = N_α + 2) is accepted too: the spin labels are
//! exchanged and everything below applies with T− in the role of T+ (the
//! equations are the same, since the functional is spin-symmetric).
//!
//! # Collinear SF-TDA (Ms = +1 → Ms = 0)
//! Configurations Φ+(i→a) = a†_{aβ} a_{iα}|T+>, i ∈ C∪O, a ∈ O∪V (types CO,
//! CV, OV and the four OO), N_SF = (n_C + 2)(n_mo − n_C). Vectors are stored as
//! n_occ × n_vir matrices X (rows: C then O1, O2; columns: O1, O2 then V).
//!
//! ```text
//!   A_{ia,jb} = δ_ij F^β_ab − δ_ab F^α_ji − c_x (ij|ab),     E_I = E_ref + ω_I,
//!   σ = A X = X F^β_vv − F^α_oo X − c_x C_oᵀ K[C_o X C_vᵀ] C_v,
//! ```
//!
//! with K\[D\]_μλ = Σ_νσ (μν|λσ) D_νσ (non-symmetric D). With c_x = 1 and
//! F^σ = h + J − K^σ this is exactly <Φ+X|H − E_ref|Φ+Y> (Slater–Condon);
//! the collinear kernel has no spin-flip element, so the functional enters
//! only through F^α, F^β and the orbitals. ω may be negative (S0 below the
//! reference triplet). One K build per trial vector, all trial vectors of a
//! Davidson iteration in one call
//! ([`JkEngine::jk`](crate::electronic::qc::scf::fock::JkEngine::jk)).
//!
//! # MRSF: the two references and the spin rotation
//! Let R = exp(−iπ S_y), the rotation by π about y in spin space:
//! R a†_{pα} R⁻¹ = a†_{pβ}, R a†_{pβ} R⁻¹ = −a†_{pα}. It commutes with the
//! (spin-free) Hamiltonian, R T+ = T−, R² = 1 on even electron numbers, and on
//! Ms = 0 states R|S,0> = (−1)^S |S,0>. We **define** the T− configurations
//! as the exact images
//!
//! ```text
//!   Φ−(i→a) := R Φ+(i→a) = − a†_{aα} a_{iβ} |T−>.
//! ```
//!
//! The four OO determinants are shared by both references: R Φ+(O1→O1) =
//! −Φ+(O2→O2), R Φ+(O1→O2) = +Φ+(O1→O2) (the closed shell O2²),
//! R Φ+(O2→O1) = +Φ+(O2→O1) (O1²). The union space (dimension 2N_SF − 4) is
//! closed under R, so H splits into R-even and R-odd blocks:
//!
//! * **singlet block** (R = +1): (Φ+X + Φ−X)/√2 for X ∈ CO, OV, CV, and the OO
//!   combinations O1² = Φ+(O2→O1), O2² = Φ+(O1→O2) and the open-shell singlet
//!   (Φ+(O1→O1) − Φ+(O2→O2))/√2; dimension N_SF − 1;
//! * **triplet block** (R = −1): (Φ+X − Φ−X)/√2 for X ∈ CO, OV, CV and the
//!   Ms = 0 component of the reference (Φ+(O1→O1) + Φ+(O2→O2))/√2; dimension
//!   N_SF − 3.
//!
//! R-odd states are pure triplets (the space holds S ≤ 2 and quintets are
//! R-even). R-even CO, OV and OO combinations are pure singlets, but the
//! R-even CV combination (four open shells) is 2/3 singlet + 1/3 quintet, so
//! a singlet-block state has <S²> = 2 w_CV exactly (w_CV its CV weight) — we
//! report it; this is the one spin impurity the union space cannot remove.
//!
//! With C̃_XY = <Φ+X|H R|Φ+Y> over the SF space, and z the SF-space vector of
//! a spin-adapted vector v (z_X = v_X for X ∉ OO, z_OO = W v_OO/√2, W the
//! orthonormal OO basis of the block's parity), the block matrices are
//!
//! ```text
//!   M_s = Tᵀ (A + s C̃) T,   s = +1 singlet, −1 triplet, and in practice
//!   σ_X   = [A z″]_X + s C_X[z]                      (X ∉ OO)
//!   σ_OO  = √2 Wᵀ ([A z″]_OO − A_OO z_OO)            with z″ = z + z_OO,
//! ```
//!
//! one SF product per trial vector plus the cross-reference term C (below),
//! which costs only dense n² algebra: the MRSF operator costs the same
//! integral work as SF-TDA.
//!
//! # The cross-reference couplings (spin-pairing terms)
//! By Slater–Condon rules (and checked against the determinant CI), with
//! k̄ the other open shell, ε(k,k′) = +1 if k = k′ and −1 otherwise,
//! η(O1) = +1, η(O2) = −1, and the MO matrices K^{lm}_pr = (p l|r m)
//! (l, m ∈ O; from four K builds once per geometry), Δ = K^{O1O2} − K^{O2O1}:
//!
//! | element <Φ+X\|H\|Φ−Y> | value |
//! |---|---|
//! | CO(c→k) – CO(c′→k′) | ε(k,k′) (c k̄′\|c′ k̄) = ε K^{k̄′k̄}_{cc′} |
//! | OV(k→a) – OV(k′→b) | ε(k,k′) (a k̄′\|b k̄) = ε K^{k̄′k̄}_{ab} |
//! | CO(c→k) – OV(k̄→b) | (c k\|b k̄) − (c k̄\|b k) = η(k) Δ_cb |
//! | OV(k→a) – CO(c′→k̄) | (a k\|c′ k̄) − (a k̄\|c′ k) = η(k) Δ_ac′ |
//! | CO(c→k) – OV(k→b), CV – anything | 0 (triple/quadruple substitutions) |
//!
//! (The project's working notes give this table with the opposite overall
//! sign, for T− written as a plain determinant with α creators first: a
//! phase convention, not a difference in physics.) Couplings through the
//! shared OO determinants are ordinary A elements (they enter via A z″
//! above), including OO–CV, which is not small (the notes report up to
//! 0.065 Eh in water).
//!
//! **Into DFT.** The table's elements are pure two-electron exchange-type
//! integrals between the two references; in the Kohn–Sham response they are
//! multiplied by a constant κ, [`Mrsf::cross_coupling_scale`], by default
//! κ = c_x (the exact-exchange fraction, as the −c_x (ij|ab) term of A; our
//! reading of the published method, from memory — its further "intrinsic
//! parameters" are not used). With κ = c_x = 1 and a ROHF reference, the
//! MRSF singlets ∪ triplets are exactly the eigenvalues of the determinant CI
//! over the union space, and SF-TDA those of the CI over Φ+ (tested).
//!
//! # Properties and conventions
//! * States are normalised, with the sign fixed so that the largest
//!   spin-adapted amplitude is positive.
//! * Determinant expansion of a state: ψ = Σ x⁺_ia Φ+(i→a) + Σ x⁻_ia Φ−(i→a)
//!   with Φ−(i→a) = R Φ+(i→a) as above ([`ExcitedState::x_plus`],
//!   [`ExcitedState::x_minus`]; x⁻ = 0 for SF-TDA and on OO for MRSF).
//! * <S²>: SF-TDA, |S+ψ|² = (x_{O1O1} + x_{O2O2})² + Σ_{i∈C∪O,a∈V} x_ia² +
//!   Σ_{i∈C,a∈O∪V} x_ia² (pure CO or OV configurations give 1); MRSF, 2 w_CV
//!   for singlets and 2 for triplets.
//! * One-particle (transition) densities γ^{IJ}_pq = <ψ_I|Σ_σ a†_{pσ} a_{qσ}|ψ_J>,
//!   AO D = C γ Cᵀ, so <ψ_I|Ô|ψ_J> = Σ_μν D_μν O_μν; between SF configurations
//!   γ^α_ij = δ_ij <x|y> − (y xᵀ)_ij (i, j ∈ C∪O), γ^β_cc′ = δ_cc′ <x|y>,
//!   γ^β_ab = (xᵀ y)_ab (a, b ∈ O∪V) — call this T(x, y), spin-summed. For
//!   MRSF, with R x the OO part of x mapped by R (zero elsewhere; the only
//!   one-electron links between the two references run through the shared
//!   OO determinants), γ^{IJ} = T(x⁺_I, x⁺_J) + T(x⁻_I, x⁻_J) +
//!   T(R x⁺_I, x⁻_J) + T(x⁻_I, R x⁺_J); MRSF states have equal α and β
//!   densities. Difference density: state minus the reference determinant.
//! * Transition dipole μ_IJ = −Σ_μν D^{IJ}_μν <μ|r|ν> (electron charge −1,
//!   a.u.), oscillator strength f = (2/3) (E_J − E_I) |μ_IJ|².
//! * Dominant configurations: weights v_X² of the spin-adapted (MRSF) or SF
//!   amplitudes, labelled with open shells O1, O2, core `C<n>` and virtuals
//!   `V<n>` (n the 1-based MO number).
//!
//! The solver is a block Davidson on the matrix-free operators (design note
//! 7) with a dense fallback for small spaces ([`davidson`]); `solve_from`
//! warm-starts it from the previous geometry's states. [`tracking`] follows
//! the character of the reference triplet between steps.
//!
//! The response needs its own [`JkEngine`]
//! (or any engine of the same geometry): four builds at set-up, then one
//! exchange build per trial vector.
//!
//! # What the tests established (corrections to the working notes)
//! * The cross-reference table of the notes holds with the opposite overall
//!   sign in our convention (T− the exact spin-rotated image), and then the
//!   singlet is the R-even (+) combination — as the notes anticipated.
//! * CV configurations: their couplings to the other reference vanish; they
//!   enter both blocks with plain A elements (and the OO–CV links). Kept in
//!   the singlet block (default), the singlet block is the exact R-even half
//!   of the union CI in the exact-exchange limit, and singlets carry
//!   <S²> = 2 w_CV (BH&HLYP formaldehyde/6-31G: 2.5e−3 to 1.3e−2 for the
//!   lowest six). [`Mrsf::with_singlet_cv`]`(false)` drops them: every
//!   singlet is then exactly pure, energies rise by 1–5 mEh there.
//! * With a semilocal part in the functional, the Ms = 0 partner of the
//!   reference, T0 = (Φ+(O1→O1) + Φ+(O2→O2))/√2, is **not** at the
//!   reference energy: <T0|A|T0> = ½ Σ_k (V^β_xc − V^α_xc)_kk (k ∈ O; the
//!   c_x parts cancel), because the collinear kernel has no spin-flip element
//!   to cancel it (+0.87 eV for BH&HLYP formaldehyde/6-31G, where the lowest
//!   MRSF triplet root sits 0.73 eV above E_ROKS; similar in ethylene).
//!   With c_x = 1 and no XC the element is exactly 0 (tested; the lowest
//!   triplet root then lies slightly below E_ROHF, −0.13 eV in water, from
//!   correlation inside the union space). Triplet excitation energies are
//!   therefore best taken relative to S0 or within the triplet block, not
//!   relative to E_ROKS.
//! * The diagonal used for guesses/preconditioning omits −c_x (cc|aa) for CV
//!   configurations (the only integrals not available from the open-shell
//!   Coulomb matrices); exact elsewhere.
//! * Dense eigenvectors are checked and re-paired with their Rayleigh
//!   quotients ([`davidson::symmetric_eigen`]): nalgebra 0.33.3 returned
//!   mismatched pairs on a 53-dimensional MRSF block.
//!
//! ```
//! use flipswarm::chem::{Element, Molecule};
//! use flipswarm::electronic::qc::basis::BasisSet;
//! use flipswarm::electronic::qc::integrals::JkOptions;
//! use flipswarm::electronic::qc::scf::{self, fock::JkEngine, Electrons, Guess, Reference, ScfOptions};
//! use flipswarm::electronic::qc::response::{davidson::DavidsonOptions, Mrsf};
//! let h = Element::from_symbol("H").unwrap();
//! let mol = Molecule::from_elements_positions_bohr(&[h, h], &[[0.0; 3], [0.0, 0.0, 1.4]]).unwrap();
//! let basis = BasisSet::builtin(&mol, "STO-3G").unwrap();
//! let el = Electrons { alpha: 2, beta: 0 };
//! let rohf = scf::hartree_fock(&basis, el, Reference::RestrictedOpen, &Guess::Core,
//!     &ScfOptions::default(), JkOptions::default()).unwrap();
//! let mut engine = JkEngine::new(&basis, JkOptions::default());
//! let mut mrsf = Mrsf::new(&basis, &rohf, 1.0, &mut engine).unwrap();
//! let states = mrsf.solve(2, 1, &DavidsonOptions::default()).unwrap();
//! // Szabo & Ostlund §4: full CI of H2/STO-3G at 1.4 bohr, −1.1373 Eh.
//! assert!((states.states[0].energy + 1.1373).abs() < 1e-4);
//! ```

pub mod davidson;
mod kernel;
mod mrsf;
pub mod overlap;
mod properties;
mod sf;
pub mod tracking;

pub use kernel::Partition;
pub use mrsf::Mrsf;
pub use properties::{ExcitedState, ExcitedStates, Method, StateSpin, Transition};
pub use sf::SpinFlip;

use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::integrals::TwoElectronError;
use crate::electronic::qc::scf::fock::JkEngine;
use crate::electronic::qc::scf::{Reference, ScfResult};

/// What a front end asks for.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct StateRequest {
    /// SF-TDA or MRSF.
    pub method: Method,
    /// MRSF singlets (SF: added to `triplets` for the number of states).
    pub singlets: usize,
    /// MRSF triplets.
    pub triplets: usize,
}

/// One call for a front end: MRSF with the requested singlets and
/// triplets, or SF-TDA with the `singlets + triplets` lowest
/// (spin-unadapted) states; κ = c_x = `exact_exchange`.
pub fn excited_states(
    basis: &BasisSet,
    scf: &ScfResult,
    exact_exchange: f64,
    engine: &mut JkEngine,
    request: StateRequest,
    opts: &davidson::DavidsonOptions,
) -> Result<ExcitedStates, ResponseError> {
    let StateRequest {
        method,
        singlets,
        triplets,
    } = request;
    match method {
        Method::Mrsf => {
            Mrsf::new(basis, scf, exact_exchange, engine)?.solve(singlets, triplets, opts)
        }
        Method::SpinFlip => {
            SpinFlip::new(basis, scf, exact_exchange, engine)?.solve(singlets + triplets, opts)
        }
    }
}

/// Errors of the spin-flip response.
#[derive(Debug, thiserror::Error)]
pub enum ResponseError {
    /// The reference has an odd number of electrons.
    #[error("spin-flip response needs an even number of electrons (a triplet reference), got {electrons}")]
    OddElectrons {
        /// Total electrons.
        electrons: usize,
    },
    /// The reference is not a high-spin triplet.
    #[error(
        "spin-flip response needs a triplet reference (|N_α − N_β| = 2), got {alpha} α and {beta} β electrons \
         (multiplicity {})", alpha.abs_diff(*beta) + 1
    )]
    NotTriplet {
        /// α electrons.
        alpha: usize,
        /// β electrons.
        beta: usize,
    },
    /// The reference is not restricted open-shell.
    #[error("spin-flip response needs a restricted open-shell (ROHF/ROKS) reference, got {0:?}")]
    NotRestrictedOpen(Reference),
    /// Matrices of the SCF result do not fit together.
    #[error("inconsistent reference: {0}")]
    Inconsistent(String),
    /// More roots requested than the space holds.
    #[error("{requested} {kind} states requested but the {kind} space has only {available} configurations")]
    TooManyRoots {
        /// Roots asked for.
        requested: usize,
        /// Dimension of the space.
        available: usize,
        /// "singlet", "triplet" or "spin-flip".
        kind: &'static str,
    },
    /// An unusable option value.
    #[error("invalid option: {0}")]
    InvalidOption(String),
    /// The eigensolver did not converge.
    #[error(
        "Davidson not converged after {iterations} iterations ({products} products); residual norms {residuals:?}"
    )]
    NotConverged {
        /// Iterations done.
        iterations: usize,
        /// Operator products done.
        products: usize,
        /// Residual norms of the requested roots at the end.
        residuals: Vec<f64>,
    },
    /// A non-finite number in the operator or its eigenvalues.
    #[error("non-finite value in the response operator ({0})")]
    NonFinite(&'static str),
    /// A state index out of range.
    #[error("state index {index} out of range ({count} states)")]
    StateIndex {
        /// The index.
        index: usize,
        /// Number of states.
        count: usize,
    },
    /// The Coulomb/exchange build.
    #[error("two-electron build: {0}")]
    TwoElectron(#[from] TwoElectronError),
}
