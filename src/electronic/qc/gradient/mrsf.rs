//! Analytic nuclear gradients of MRSF-TDDFT states (singlets, triplets,
//! S0 included) of a triplet ROHF/ROKS reference, by the Lagrangian
//! (Z-vector) method. The structure follows the published analytic MRSF
//! gradient, J. Chem. Phys. 150, 184111 (2019) (from memory); the working
//! equations below were derived here from what
//! [`crate::electronic::qc::response`] computes, term by term, and are
//! checked against central differences of our own state energies in
//! `tests/mrsf_gradients.rs`.
//!
//! # The state energy as a function of the orbitals
//! Orbitals C (nbf × n_mo), partition C | O1 O2 | V as in the response
//! (MO rows/columns in that order), occupations n^↑ (1 on C ∪ O) and n^↓
//! (1 on C); ↑ is the spin with two more electrons (α for an Ms = +1
//! reference). D^σ = C n^σ Cᵀ, F^σ = h + J\[D\] − c_x K\[D^σ\] + V^σ_xc (the
//! AO Fock matrices of the SCF result), F̃^σ = Cᵀ F^σ C.
//!
//! A state is stored with its SF-frame amplitudes x⁺ (n_occ × n_vir, rows
//! C ∪ O, columns O ∪ V). With u = √2 x⁺, z_OO = x⁺ restricted to the four
//! OO entries divided by √2, z_n = √2 x⁺ without its OO entries and s = +1
//! for singlets, −1 for triplets, the eigenvalue of the spin-adapted block
//! (module docs of the response: σ_X = \[A z″\]_X + s κ C_X\[z\], σ_OO =
//! √2 Wᵀ([A z″]_OO − A_OO z_OO), z″ = u) is the quadratic form
//!
//! ```text
//!   ω = ⟨u|A|u⟩ − 2 ⟨z_OO|A|z_OO⟩ + s κ ⟨z_n|C|z_n⟩,
//!   ⟨x|A|x⟩ = tr(F̃^↓_vv xᵀx) − tr(F̃^↑_oo x xᵀ) − c_x X(T_x, T_x),
//! ```
//!
//! with T_x = C_o x C_vᵀ and the two AO contractions
//! X(P, Q) = Σ (μν|λσ) P_μλ Q_νσ (exchange type) and
//! J(P, Q) = Σ (μν|λσ) P_μν Q_λσ (Coulomb type). The cross-reference form
//! ⟨z_n|C|z_n⟩ is, from the table of the response docs (K^{lm}_pr =
//! (p l|r m), Δ = K^{O1O2} − K^{O2O1}, which is antisymmetric so the OV–CO
//! rows equal the CO–OV ones):
//!
//! ```text
//!   Σ_{k,k'} ε(k,k') [ Σ_{cc'} z_{ck} z_{c'k'} (c k̄'|c' k̄) + Σ_{ab} z_{ka} z_{k'b} (a k̄'|b k̄) ]
//!   + 2 Σ_k η(k) Σ_{cb} z_{ck} z_{k̄b} [(c O1|b O2) − (c O2|b O1)],
//! ```
//!
//! every term a Coulomb-type J(P, Q) of AO matrices P = C L_P Cᵀ. With
//! e_k = ε(k, O1) (so ε(k,k') = e_k e_k' and η(k) = e_k) the sums over
//! (k, k') factorise, and the whole form is three exchange-type terms:
//!
//! ```text
//!   ⟨z_n|C|z_n⟩ = X(R_C, R_Cᵀ) + X(R_V, R_Vᵀ) + 2 X(S, E_{O1O2} − E_{O2O1}),
//!   R_C = C L_C Cᵀ,  L_C[c, k̄] = Σ_k e_k z_{ck};   R_V: L_V[a, k̄] = Σ_k e_k z_{ka};
//!   S:  L_S[c, a] = Σ_k e_k z_{ck} z_{k̄a};   E_{pq} the MO unit matrix,
//! ```
//!
//! (J(a o_lᵀ, b o_mᵀ) = X(a bᵀ, o_l o_mᵀ) regroups the CO–OV rows; the
//! CO–CO and OV–OV sums become Σ (μν|λσ) R_μσ R_λν = X(R, Rᵀ)).
//! So ω is a sum of Fock terms tr(F̃^σ L^σ) (L^↑ = −(u uᵀ − 2 z_OO z_OOᵀ)
//! on C∪O, L^↓ = uᵀu − 2 z_OOᵀ z_OO on O∪V) and exchange terms
//! c X(C L_P Cᵀ, C L_Q Cᵀ): the A exchange (−c_x, T_u, T_u),
//! (2 c_x, T_zOO, T_zOO) and the three cross terms with coefficient s κ
//! (the code also accepts Coulomb terms c J(C L_P Cᵀ, C L_Q Cᵀ)). The
//! code evaluates ω from this list and checks it against the Davidson
//! eigenvalue (a wrong term list is an error, not a wrong gradient).
//!
//! # Orbital derivative Y
//! For any such E(C), Y_pq = Σ_μ C_μp ∂E/∂C_μq (fixed AO integrals). With
//! G̃ = Cᵀ G C:
//! * tr(G C L Cᵀ): Y = G̃ᵀ Lᵀ + G̃ L;
//! * Fock terms: 2 F̃^σ L^σ, plus through D^τ = C n^τ Cᵀ the response of
//!   F^σ, 2 Ṽ^τ diag(n^τ) with V^τ = ∂/∂D^τ Σ_σ tr(F^σ Γ^σ) =
//!   J[Γ^↑ + Γ^↓] − c_x K[Γ^τ] + Σ_σ f^{τσ}_xc[Γ^σ] (Γ^σ = C L^σ Cᵀ);
//! * J(P, Q): J̃\[Q\](L_P + L_Pᵀ) + J̃\[P\](L_Q + L_Qᵀ);
//! * X(P, Q): G = K\[Q\]ᵀ with L_P and G = K\[P\]ᵀ with L_Q.
//!
//! Under C → C e^Z (Z antisymmetric), dE = Σ_{p<q} (Y − Yᵀ)_pq Z_pq; under
//! the orthonormality connection C → C(1 − ½ S^R_MO), dE = −½ Σ Y_pq S^R_pq.
//!
//! # Lagrangian and Z-vector
//! L = E_ROKS + ω + Σ_{NR} Z_pq g_pq, with g the ROKS orbital gradient over
//! the non-redundant rotations C–O, C–V, O–V (the ROKS stationarity
//! conditions of [`crate::electronic::qc::scf`]). Σ Z g is the derivative
//! of E_ROKS along C e^{tZ}: Λ = Σ_σ tr(F^σ Δ^σ), Δ^σ = C M^σ Cᵀ,
//! M^σ = Z n^σ − n^σ Z (symmetric) — a Fock term with L^σ = M^σ. Its
//! orbital derivative Y^Λ is linear in Z and (Y^Λ − Y^Λᵀ) on the NR pairs
//! is the ROKS orbital Hessian acting on Z (the commutator part vanishes at
//! stationarity). Stationarity of L in the rotations gives the Z-vector
//! equations
//!
//! ```text
//!   (Y^Λ[Z] − Y^Λ[Z]ᵀ)_pq = −(Y^ω − Y^ωᵀ)_pq,   (p, q) ∈ C–O, C–V, O–V,
//! ```
//!
//! solved by preconditioned conjugate gradients, all requested states at
//! once (one batched J/K build per iteration; preconditioner
//! 2 Σ_σ (n^σ_p − n^σ_q)(F̃^σ_qq − F̃^σ_pp)). The ROKS Hessian is positive
//! definite at a minimum of the reference, so CG applies.
//!
//! **Redundant rotations.** C–C and V–V rotations leave the union space
//! and ω invariant. O1–O2 rotations: the reference, the SF space of each
//! reference, the union space and the OO subspaces of each parity (T0 is the
//! trace of the OO block, invariant under U x Uᵀ) are all invariant, and
//! the cross-reference table is the exact matrix element of a spin-free
//! two-electron operator, scaled by a constant κ, so ω is invariant for
//! any κ and c_x. At fixed (stationary) amplitudes this means Y^ω − Y^ωᵀ
//! vanishes on the C–C, O–O and V–V blocks: the code reports this
//! asymmetry ([`StateGradient::redundant_asymmetry`]) and the tests check it
//! is at round-off level; no multiplier is needed for O1–O2.
//!
//! # The gradient
//! With the symmetric connection and L stationary in everything,
//!
//! ```text
//!   dE_I/dR = dE_ROKS/dR                        (as in scf::scf_gradient)
//!     + tr(h^R P) + Σ (μν|λσ)^R Γ_μνλσ [+ XC terms]     (fixed AO matrices)
//!     − tr(W S^R),   W = ½ C sym(Y^ω + Y^Λ) Cᵀ,
//!   P = C (L^↑ + L^↓ + M^↑ + M^↓) Cᵀ,
//! ```
//!
//! where the two-electron part contracts [`integrals::eri_gradient_pairs`]
//! with J(D, P + ½D), −c_x X(D^σ, Γ^σ + Δ^σ + ½D^σ) (the reference E₂
//! folded in) and the exchange terms of ω, all in one pass over the
//! derivative integrals for every requested state. The reference part
//! without E₂ (tr(D h^R), −tr(W_ref S^R), E_xc^R, nuclei) is that of
//! [`super::scf`].
//!
//! # Kohn–Sham references (ROKS, e.g. BH&HLYP)
//! F^σ contains V^σ_xc[D^↑, D^↓], so the Fock terms of ω and Λ bring
//! (i) the XC kernel in Y (V^τ above gains Σ_σ f^{τσ}_xc[Γ^σ]; the kernel is
//! symmetric, so this is the derivative of V^τ_xc along (Γ^↑, Γ^↓)) and in
//! the Z-vector Hessian (along (Δ^↑, Δ^↓)), and (ii) the fixed-matrix
//! geometric derivative of Σ_σ tr(Γ'^σ V^σ_xc\[D\]) (Γ' = Γ + Δ): basis-
//! function, kernel (through ∂ρ/∂R) and grid-weight terms. Since
//! Σ_σ tr(Γ'^σ V^σ_xc\[D\]) = d/dt E_xc\[D + tΓ'\] at t = 0, (ii) is the
//! derivative along Γ' of the XC energy gradient at fixed densities, which
//! [`super::xc::xc_gradient`] computes (with the grid-weight term). The
//! exact exchange c_x and κ (both from the excited states; κ = c_x by
//! default) enter as in the HF case. No third derivatives of E_xc appear:
//! the collinear spin-flip kernel is zero, so ω has no explicit XC term.
//!
//! Both are analytic by default ([`XcKernel::Analytic`]). (i): the second
//! derivatives of the functional (libxc order 2) at the reference density
//! are evaluated once per call on every grid block and contracted with all
//! trial densities of a Z-vector iteration in one pass;
//! δV^s = ∫ [δv_ρs φφ + δ(2 v_σss ∇ρ_s + v_σαβ ∇ρ_s̄)·∇(φφ)], the
//! derivative of the potential formula of the XC module docs. (ii): the
//! directional derivative of the XC gradient formula along Γ', from the
//! same second derivatives, computed for all states in the pass that gives
//! the reference XC gradient ([`super::xc::xc_gradient_and_directional`]:
//! one evaluation of the AO values, their derivatives and the partition-
//! weight gradient for the reference and every state).
//! [`XcKernel::Differences`] takes both instead as central differences in
//! density space — (i) of the SCF's own V_xc along the trial density, (ii)
//! of the XC gradient at D ± e Γ' with e chosen so that the largest element
//! of the perturbation is [`XC_STEP`] = 1e−4 (two extra XC-gradient passes
//! per state) — a cross-check: the tests find the two paths within the
//! differences' O(e²) step error (1.1e−8 Eh/bohr at e = 1e−4, 1.0e−9 at
//! 3e−5).
//!
//! Other departures from the published scheme: none intended.
//!
//! # Scope and checks
//! * Tested (`tests/mrsf_gradients.rs`): ROHF, ROKS BH&HLYP (GGA) and a
//!   hybrid LDA reference, S0, S1, S2 and T1 of CH2, H2O, H2CO with 3-21G,
//!   6-31G and 6-31G* and of twisted-pyramidalised ethylene 0.29 eV from its
//!   S1/S0 crossing (6-31G*), against central differences (1e−6 Eh/bohr at
//!   h = 1e−3 bohr, measured ≤ 5.5e−7; ~1e−8 after Richardson
//!   extrapolation), translation and rotation.
//! * Not tested: Ms = −1 references (handled by exchanging the spin labels,
//!   as the response does; the SCF builds only Ms = +1 references, so no
//!   caller reaches it), [`crate::electronic::qc::response::Mrsf::with_singlet_cv`]`(false)`
//!   states and κ ≠ c_x (all go through the same code paths).
//! * Cost: one pass over the unique shell quartets of derivative ERIs
//!   (both centres of a pair from one kernel call) for the reference and all
//!   states ([`integrals::eri_gradient_pairs`]); Z-vector iterations cost
//!   one batched J/K build (and one kernel pass) each.

use super::scf::{energy_weighted_density, Potential};
use super::{nuclear_repulsion_gradient, xc, GradientError};
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::dft::ao_values::{AoBasis, AoValues, COMP_VALUE, COMP_X};
use crate::electronic::qc::dft::ks::{KohnSham, KsOptions};
use crate::electronic::qc::dft::xc::{Family, Functional, Spin, XcInput, XcOutput};
use crate::electronic::qc::integrals::{self, DensityPairs, JkOptions};
use crate::electronic::qc::response::{ExcitedStates, Method, StateSpin};
use crate::electronic::qc::scf::fock::JkEngine;
use crate::electronic::qc::scf::{Reference, ScfResult};
use nalgebra::{DMatrix, DMatrixView};
use rayon::prelude::*;

/// Largest number of matrices per J/K build.
const MAX_BATCH: usize = 32;

/// Step of the density-space differences of the XC potential and
/// XC gradient (largest element of the perturbation of D^σ).
pub const XC_STEP: f64 = 1e-4;

/// The integral engine and, for Kohn–Sham, the XC evaluator (same grid
/// and functional as the SCF).
enum Ctx {
    HartreeFock(Box<JkEngine>),
    KohnSham(Box<KohnSham>),
}

impl Ctx {
    fn new(
        basis: &BasisSet,
        potential: &Potential,
        jk: &JkOptions,
        engine: Option<JkEngine>,
    ) -> Result<Ctx, GradientError> {
        Ok(match potential {
            Potential::HartreeFock => Ctx::HartreeFock(Box::new(
                engine.unwrap_or_else(|| JkEngine::new(basis, jk.clone())),
            )),
            Potential::KohnSham { functional, grid } => {
                let opts = KsOptions {
                    functional: functional.clone(),
                    grid: grid.clone(),
                    jk: jk.clone(),
                };
                Ctx::KohnSham(Box::new(KohnSham::with_engine(
                    basis,
                    Reference::RestrictedOpen,
                    &opts,
                    engine,
                )?))
            }
        })
    }

    fn into_engine(self) -> JkEngine {
        match self {
            Ctx::HartreeFock(e) => *e,
            Ctx::KohnSham(k) => k.into_engine(),
        }
    }

    fn engine(&mut self) -> &mut JkEngine {
        match self {
            Ctx::HartreeFock(e) => e,
            Ctx::KohnSham(k) => k.engine_mut(),
        }
    }

    /// The KS builder if the functional has a semilocal part.
    fn xc(&self) -> Option<&KohnSham> {
        match self {
            Ctx::KohnSham(k) if !k.functional().is_hf_only() => Some(k),
            _ => None,
        }
    }
}

/// Options of the Z-vector (coupled-perturbed ROKS) solver.
#[derive(Clone, Debug, PartialEq)]
pub struct ZVectorOptions {
    /// Converged when the 2-norm of each state's residual is below this
    /// (default 1e−9).
    pub residual_tolerance: f64,
    /// Iteration limit (default 200).
    pub max_iterations: usize,
    /// How the XC kernel f_xc is contracted with trial densities (Kohn–Sham
    /// references only; default analytic).
    pub xc_kernel: XcKernel,
}

impl Default for ZVectorOptions {
    fn default() -> Self {
        ZVectorOptions {
            residual_tolerance: 1e-9,
            max_iterations: 200,
            xc_kernel: XcKernel::Analytic,
        }
    }
}

/// Evaluation of the XC kernel contractions Σ_σ f^{τσ}_xc G^σ.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum XcKernel {
    /// Second derivatives of the functional (libxc order 2), one grid pass
    /// for all trial densities of an iteration.
    Analytic,
    /// Central differences of the SCF's V_xc along the trial density
    /// (step [`XC_STEP`]); two potential evaluations per trial density.
    Differences,
}

/// The gradient of one state with diagnostics.
#[derive(Clone, Debug)]
pub struct StateGradient {
    /// Index into [`ExcitedStates::states`].
    pub state: usize,
    /// dE/dR per atom (Eh/bohr).
    pub gradient: Vec<[f64; 3]>,
    /// ω re-evaluated from the orbital-dependent term list (Eh); equals the
    /// state's ω up to round-off.
    pub omega: f64,
    /// Z-vector iterations.
    pub z_iterations: usize,
    /// Final Z-vector residual norm.
    pub z_residual: f64,
    /// max |(Y − Yᵀ)_pq| of the full Lagrangian over the redundant blocks
    /// C–C, O–O (the O1–O2 rotation) and V–V: zero when ω is invariant
    /// under these rotations.
    pub redundant_asymmetry: [f64; 3],
}

/// Analytic gradients of the MRSF states `state_indices` (indices into
/// `excited.states`) of the triplet ROHF/ROKS reference `scf` at the
/// geometry of `basis`, per state per atom in Eh/bohr. The reference parts
/// (SCF gradient, derivative integrals) are shared; the Z-vector equations
/// of all states are solved together.
pub fn mrsf_state_gradients(
    basis: &BasisSet,
    scf: &ScfResult,
    excited: &ExcitedStates,
    state_indices: &[usize],
    potential: &Potential,
    jk: &JkOptions,
    opts: &ZVectorOptions,
) -> Result<Vec<Vec<[f64; 3]>>, GradientError> {
    Ok(
        mrsf_state_gradients_detailed(basis, scf, excited, state_indices, potential, jk, opts)?
            .into_iter()
            .map(|s| s.gradient)
            .collect(),
    )
}

/// A gradient per atom (Eh/bohr).
pub type PerAtom = Vec<[f64; 3]>;

/// As [`mrsf_state_gradients`], reusing the J/K engine of the SCF and
/// response at this geometry (same basis and [`JkOptions`]; its in-core
/// integral store is not rebuilt), which is handed back.
#[allow(clippy::too_many_arguments)]
pub fn mrsf_state_gradients_reusing(
    basis: &BasisSet,
    scf: &ScfResult,
    excited: &ExcitedStates,
    state_indices: &[usize],
    potential: &Potential,
    jk: &JkOptions,
    engine: JkEngine,
    opts: &ZVectorOptions,
) -> Result<(Vec<PerAtom>, JkEngine), GradientError> {
    let (g, engine) = gradients_with(
        basis,
        scf,
        excited,
        state_indices,
        potential,
        jk,
        Some(engine),
        opts,
    )?;
    Ok((g.into_iter().map(|s| s.gradient).collect(), engine))
}

/// [`mrsf_state_gradients`] with per-state diagnostics.
pub fn mrsf_state_gradients_detailed(
    basis: &BasisSet,
    scf: &ScfResult,
    excited: &ExcitedStates,
    state_indices: &[usize],
    potential: &Potential,
    jk: &JkOptions,
    opts: &ZVectorOptions,
) -> Result<Vec<StateGradient>, GradientError> {
    gradients_with(
        basis,
        scf,
        excited,
        state_indices,
        potential,
        jk,
        None,
        opts,
    )
    .map(|r| r.0)
}

#[allow(clippy::too_many_arguments)]
fn gradients_with(
    basis: &BasisSet,
    scf: &ScfResult,
    excited: &ExcitedStates,
    state_indices: &[usize],
    potential: &Potential,
    jk: &JkOptions,
    engine: Option<JkEngine>,
    opts: &ZVectorOptions,
) -> Result<(Vec<StateGradient>, JkEngine), GradientError> {
    let mut setup = Setup::new(basis, scf, excited, potential)?;
    setup.kernel = opts.xc_kernel;
    for &i in state_indices {
        if i >= excited.states.len() {
            let available: Vec<String> = (0..excited.states.len())
                .map(|k| format!("{k} ({})", excited.label(k).unwrap_or_default()))
                .collect();
            return Err(GradientError::StateNotComputed {
                requested: format!("index {i}"),
                available: if available.is_empty() {
                    "none".into()
                } else {
                    available.join(", ")
                },
            });
        }
    }
    if !(opts.residual_tolerance.is_finite() && opts.residual_tolerance > 0.0)
        || opts.max_iterations == 0
    {
        return Err(GradientError::Input(format!(
            "Z-vector options: residual tolerance {} must be positive and max_iterations {} at least 1",
            opts.residual_tolerance, opts.max_iterations
        )));
    }
    let span = tracing::info_span!(
        "mrsf_gradient",
        states = state_indices.len(),
        nbf = basis.nbf
    );
    let _guard = span.enter();
    let t0 = std::time::Instant::now();
    let mut ctx = Ctx::new(basis, potential, jk, engine)?;
    let t_setup = t0.elapsed().as_secs_f64();

    // ω, its term list and Y^ω for every state.
    let mut terms = Vec::with_capacity(state_indices.len());
    let mut yw = Vec::with_capacity(state_indices.len());
    let mut omegas = Vec::with_capacity(state_indices.len());
    for &i in state_indices {
        let st = &excited.states[i];
        let t = setup.terms(&st.x_plus, st.spin)?;
        let (omega, y) = setup.evaluate(&mut ctx, &t)?;
        if (omega - st.omega).abs() > 1e-6 * (1.0 + st.omega.abs()) {
            return Err(GradientError::Response(format!(
                "state {i}: ω from its amplitudes is {omega:.10} Eh but the state has {:.10} Eh \
                 (amplitudes and reference do not fit together)",
                st.omega
            )));
        }
        tracing::debug!("state {i}: ω = {omega:.12} (Davidson {:.12})", st.omega);
        omegas.push(omega);
        terms.push(t);
        yw.push(y);
    }

    // Z-vector equations.
    let rhs: Vec<DMatrix<f64>> = yw
        .iter()
        .map(|y| setup.nr_part(&(y - y.transpose())) * -1.0)
        .collect();
    let t_omega = t0.elapsed().as_secs_f64();
    let (zs, iters, residuals) = setup.solve_z(&mut ctx, &rhs, opts)?;
    let ylam = setup.lambda_y(&mut ctx, &zs)?;

    // Fixed-AO-matrix contributions.
    let t_z = t0.elapsed().as_secs_f64();
    // The reference gradient without its two-electron part (that is folded
    // into the state's pairs below, one pass over the derivative integrals):
    // tr(D h^R) − tr(W_ref S^R) + E_xc^R + dE_nuc/dR (as scf::scf_gradient).
    let dh = integrals::core_hamiltonian_nuclear_derivatives(basis);
    let ds = integrals::overlap_nuclear_derivatives(basis);
    let natoms = basis.natoms();
    let reference = {
        let dt = &scf.density_alpha + &scf.density_beta;
        let w_ref = energy_weighted_density(scf);
        let mut g = nuclear_repulsion_gradient(basis);
        for a in 0..natoms {
            for k in 0..3 {
                g[a][k] += dt.dot(&dh[3 * a + k]) - w_ref.dot(&ds[3 * a + k]);
            }
        }
        g
    };
    // Γ' = Γ + Δ of every state (↑, ↓), for the explicit XC term.
    let gammas: Vec<(DMatrix<f64>, DMatrix<f64>)> = terms
        .iter()
        .zip(&zs)
        .map(|(t, z)| {
            let (m_up, m_dn) = setup.m_of(z);
            (
                setup.to_ao(&(&t.l_up + &m_up)),
                setup.to_ao(&(&t.l_dn + &m_dn)),
            )
        })
        .collect();
    // The reference XC gradient and the explicit XC term of every state:
    // one analytic pass (default), or the reference pass plus central
    // differences in density space (XcKernel::Differences, the cross-check).
    let (xc_ref, xc_states) = match ctx.xc() {
        None => (None, vec![None; gammas.len()]),
        Some(ks) => match setup.kernel {
            XcKernel::Analytic => {
                let (da, db) = setup.spins(&setup.d_up, &setup.d_dn);
                let trials: Vec<(&DMatrix<f64>, &DMatrix<f64>)> =
                    gammas.iter().map(|(u, d)| setup.spins(u, d)).collect();
                let (r, t) = xc::xc_gradient_and_directional(
                    basis,
                    ks.grid(),
                    ks.functional(),
                    da,
                    db,
                    &trials,
                )?;
                (Some(r.total), t.into_iter().map(Some).collect())
            }
            XcKernel::Differences => {
                let r = xc::xc_gradient(
                    basis,
                    ks.grid(),
                    ks.functional(),
                    &scf.density_alpha,
                    &scf.density_beta,
                    false,
                )?
                .total;
                let mut t = Vec::with_capacity(gammas.len());
                for (u, d) in &gammas {
                    t.push(setup.xc_explicit(basis, &ctx, u, d)?);
                }
                (Some(r), t)
            }
        },
    };
    let reference = {
        let mut g = reference;
        if let Some(x) = &xc_ref {
            for (ga, xa) in g.iter_mut().zip(x) {
                for k in 0..3 {
                    ga[k] += xa[k];
                }
            }
        }
        g
    };
    let t_ref = t0.elapsed().as_secs_f64();
    let mut groups = Vec::with_capacity(terms.len());
    let mut out = Vec::with_capacity(terms.len());
    for (s, t) in terms.iter().enumerate() {
        let ytot = &yw[s] + &ylam[s];
        let asym = &ytot - ytot.transpose();
        let blocks = [
            (0, setup.nc),
            (setup.nc, setup.nc + 2),
            (setup.nc + 2, setup.nmo),
        ];
        let redundant = blocks.map(|(a, b)| {
            let mut m = 0.0f64;
            for p in a..b {
                for q in a..b {
                    m = m.max(asym[(p, q)].abs());
                }
            }
            m
        });
        let nr_left = setup.nr_part(&asym).amax();
        tracing::debug!(
            "state {}: NR asymmetry {nr_left:.2e}, redundant (C,O,V) {redundant:?}",
            state_indices[s]
        );
        let mut w = setup.to_ao(&((&ytot + ytot.transpose()) * 0.5)) * 0.5;
        let wt = w.transpose();
        w = (&w + wt) * 0.5;
        let (gam_up, gam_dn) = gammas[s].clone();
        let p1 = &gam_up + &gam_dn;
        let xc_part = &xc_states[s];
        let mut g = reference.clone();
        for a in 0..natoms {
            for k in 0..3 {
                g[a][k] += p1.dot(&dh[3 * a + k]) - w.dot(&ds[3 * a + k]);
                if let Some(x) = &xc_part {
                    g[a][k] += x[a][k];
                }
            }
        }
        let dt = &setup.d_up + &setup.d_dn;
        let mut pairs = DensityPairs::default();
        // Reference E₂ = ½ J(D, D) − ½ c_x Σ_σ X(D^σ, D^σ), merged with the
        // Fock-type terms of ω and Λ.
        pairs.coulomb.push((1.0, dt.clone(), &p1 + &dt * 0.5));
        if setup.cx != 0.0 {
            pairs
                .exchange
                .push((-setup.cx, setup.d_up.clone(), gam_up + &setup.d_up * 0.5));
            pairs
                .exchange
                .push((-setup.cx, setup.d_dn.clone(), gam_dn + &setup.d_dn * 0.5));
        }
        for (c, lp, lq) in &t.coulomb {
            pairs.coulomb.push((*c, setup.to_ao(lp), setup.to_ao(lq)));
        }
        for (c, lp, lq) in &t.exchange {
            pairs.exchange.push((*c, setup.to_ao(lp), setup.to_ao(lq)));
        }
        groups.push(pairs);
        out.push(StateGradient {
            state: state_indices[s],
            gradient: g,
            omega: omegas[s],
            z_iterations: iters,
            z_residual: residuals[s],
            redundant_asymmetry: redundant,
        });
    }
    drop(dh);
    drop(ds);
    let t_one = t0.elapsed().as_secs_f64();
    let eri = integrals::eri_gradient_pairs(basis, &groups)?;
    let t_eri = t0.elapsed().as_secs_f64();
    tracing::info!(
        "MRSF gradient timings (cumulative, s): set-up {t_setup:.3}, ω and Y {t_omega:.3}, Z-vector {t_z:.3}, \
         reference and XC gradients {t_ref:.3}, one-electron {t_one:.3}, ERI derivatives {t_eri:.3}"
    );
    for (o, e) in out.iter_mut().zip(&eri) {
        for (a, v) in o.gradient.iter_mut().zip(e) {
            for k in 0..3 {
                a[k] += v[k];
            }
        }
    }
    Ok((out, ctx.into_engine()))
}

/// A pair of AO matrices (↑, ↓).
type SpinPair = (DMatrix<f64>, DMatrix<f64>);

/// One MO matrix pair of a two-electron term: (coefficient, L_P, L_Q).
type Pair = (f64, DMatrix<f64>, DMatrix<f64>);

/// ω of one state as a list of orbital-dependent terms (module docs).
struct Terms {
    /// Fock term of the ↑ spin (MO, symmetric).
    l_up: DMatrix<f64>,
    /// Fock term of the ↓ spin.
    l_dn: DMatrix<f64>,
    /// Coulomb-type terms c J(C L_P Cᵀ, C L_Q Cᵀ).
    coulomb: Vec<Pair>,
    /// Exchange-type terms c X(C L_P Cᵀ, C L_Q Cᵀ).
    exchange: Vec<Pair>,
}

/// What every state shares.
struct Setup {
    c: DMatrix<f64>,
    nc: usize,
    nmo: usize,
    n_up: Vec<f64>,
    n_dn: Vec<f64>,
    f_up: DMatrix<f64>,
    f_dn: DMatrix<f64>,
    d_up: DMatrix<f64>,
    d_dn: DMatrix<f64>,
    cx: f64,
    kappa: f64,
    up_is_alpha: bool,
    kernel: XcKernel,
    basis: BasisSet,
    /// Reference-density kernel data (built at the first analytic kernel use).
    kernel_data: std::sync::OnceLock<KernelData>,
}

fn scale_columns(m: &DMatrix<f64>, n: &[f64]) -> DMatrix<f64> {
    let mut out = m.clone();
    for (q, &f) in n.iter().enumerate() {
        out.column_mut(q).scale_mut(f);
    }
    out
}

fn scale_rows(m: &DMatrix<f64>, n: &[f64]) -> DMatrix<f64> {
    let mut out = m.clone();
    for (p, &f) in n.iter().enumerate() {
        out.row_mut(p).scale_mut(f);
    }
    out
}

impl Setup {
    fn new(
        basis: &BasisSet,
        scf: &ScfResult,
        excited: &ExcitedStates,
        potential: &Potential,
    ) -> Result<Setup, GradientError> {
        if scf.reference != Reference::RestrictedOpen {
            return Err(GradientError::NotTripletReference(format!(
                "the reference is {:?}; MRSF gradients need a restricted open-shell (ROHF/ROKS) triplet",
                scf.reference
            )));
        }
        let (na, nb) = (scf.electrons.alpha, scf.electrons.beta);
        if na.abs_diff(nb) != 2 {
            return Err(GradientError::NotTripletReference(format!(
                "{na} α and {nb} β electrons (multiplicity {}); MRSF gradients need a triplet (|N_α − N_β| = 2)",
                na.abs_diff(nb) + 1
            )));
        }
        if excited.method != Method::Mrsf {
            return Err(GradientError::Input(format!(
                "analytic gradients are for MRSF states, the excited states are {:?}",
                excited.method
            )));
        }
        let cx = match potential {
            Potential::HartreeFock => 1.0,
            Potential::KohnSham { functional, .. } => {
                Functional::preset_or_libxc(functional, Spin::Polarized)
                    .map_err(|e| GradientError::Ks(e.into()))?
                    .exact_exchange()
            }
        };
        if (excited.exact_exchange - cx).abs() > 1e-12 {
            return Err(GradientError::Input(format!(
                "the excited states were computed with c_x = {} but the potential has c_x = {cx}",
                excited.exact_exchange
            )));
        }
        let c = excited.orbitals.clone();
        let nbf = basis.nbf;
        let nmo = c.ncols();
        let nc = na.min(nb);
        if c.nrows() != nbf
            || scf.orbitals_alpha.shape() != c.shape()
            || (&scf.orbitals_alpha - &c).amax() > 1e-12
        {
            return Err(GradientError::Input(
                "the excited states were not computed from this SCF result (orbitals differ)"
                    .into(),
            ));
        }
        if excited.partition.n_core != nc || excited.partition.n_mo != nmo {
            return Err(GradientError::Input(format!(
                "the excited states' partition {:?} does not fit {nc} core and {nmo} orbitals",
                excited.partition
            )));
        }
        let (fu, fd) = if na > nb {
            (&scf.fock_alpha, &scf.fock_beta)
        } else {
            (&scf.fock_beta, &scf.fock_alpha)
        };
        let n_up: Vec<f64> = (0..nmo)
            .map(|p| if p < nc + 2 { 1.0 } else { 0.0 })
            .collect();
        let n_dn: Vec<f64> = (0..nmo).map(|p| if p < nc { 1.0 } else { 0.0 }).collect();
        let co = c.columns(0, nc + 2);
        let cc = c.columns(0, nc);
        Ok(Setup {
            f_up: c.transpose() * fu * &c,
            f_dn: c.transpose() * fd * &c,
            d_up: co * co.transpose(),
            d_dn: cc * cc.transpose(),
            c,
            nc,
            nmo,
            n_up,
            n_dn,
            cx,
            kappa: excited.cross_coupling_scale,
            up_is_alpha: na > nb,
            kernel: XcKernel::Analytic,
            basis: basis.clone(),
            kernel_data: std::sync::OnceLock::new(),
        })
    }

    fn to_ao(&self, l: &DMatrix<f64>) -> DMatrix<f64> {
        &self.c * l * self.c.transpose()
    }

    fn to_mo(&self, a: &DMatrix<f64>) -> DMatrix<f64> {
        self.c.transpose() * a * &self.c
    }

    /// Embed an SF matrix (rows C∪O, columns O∪V) into an MO matrix.
    fn embed(&self, x: &DMatrix<f64>) -> DMatrix<f64> {
        let mut l = DMatrix::zeros(self.nmo, self.nmo);
        l.view_mut((0, self.nc), x.shape()).copy_from(x);
        l
    }

    /// The term list of ω for a state with SF amplitudes x⁺ and spin.
    fn terms(&self, xp: &DMatrix<f64>, spin: StateSpin) -> Result<Terms, GradientError> {
        let nc = self.nc;
        let nocc = nc + 2;
        let nvir = self.nmo - nc;
        let nv = nvir - 2;
        if xp.shape() != (nocc, nvir) {
            return Err(GradientError::Input(format!(
                "amplitudes of shape {:?}, expected {nocc} × {nvir}",
                xp.shape()
            )));
        }
        let s = match spin {
            StateSpin::Singlet => 1.0,
            StateSpin::Triplet => -1.0,
            StateSpin::Unadapted => {
                return Err(GradientError::Input(
                    "a spin-unadapted state is not an MRSF state".into(),
                ))
            }
        };
        let r2 = std::f64::consts::SQRT_2;
        let u = xp * r2;
        let mut zoo = DMatrix::zeros(nocc, nvir);
        for k in 0..2 {
            for l in 0..2 {
                zoo[(nc + k, l)] = xp[(nc + k, l)] / r2;
            }
        }
        let mut zn = u.clone();
        for k in 0..2 {
            for l in 0..2 {
                zn[(nc + k, l)] = 0.0;
            }
        }
        // Fock terms.
        let mut l_up = DMatrix::zeros(self.nmo, self.nmo);
        let bup = &u * u.transpose() - (&zoo * zoo.transpose()) * 2.0;
        l_up.view_mut((0, 0), (nocc, nocc)).copy_from(&(-bup));
        let mut l_dn = DMatrix::zeros(self.nmo, self.nmo);
        let bdn = u.transpose() * &u - (zoo.transpose() * &zoo) * 2.0;
        l_dn.view_mut((nc, nc), (nvir, nvir)).copy_from(&bdn);
        // Exchange terms of A.
        let mut exchange = Vec::new();
        if self.cx != 0.0 {
            let tu = self.embed(&u);
            exchange.push((-self.cx, tu.clone(), tu));
            let to = self.embed(&zoo);
            exchange.push((2.0 * self.cx, to.clone(), to));
        }
        // Cross-reference terms, coefficient s κ, regrouped as three
        // exchange-type contractions (module docs).
        let coulomb = Vec::new();
        let sk = s * self.kappa;
        if sk != 0.0 {
            let o = |k: usize| nc + k;
            let e = |k: usize| if k == 0 { 1.0 } else { -1.0 };
            let mut rc = DMatrix::zeros(self.nmo, self.nmo);
            let mut rv = DMatrix::zeros(self.nmo, self.nmo);
            let mut ls = DMatrix::zeros(self.nmo, self.nmo);
            for k in 0..2 {
                let kb = 1 - k;
                for c in 0..nc {
                    rc[(c, o(kb))] += e(k) * zn[(c, k)];
                }
                for a in 0..nv {
                    rv[(nc + 2 + a, o(kb))] += e(k) * zn[(nc + k, 2 + a)];
                }
                for c in 0..nc {
                    for a in 0..nv {
                        ls[(c, nc + 2 + a)] += e(k) * zn[(c, k)] * zn[(nc + kb, 2 + a)];
                    }
                }
            }
            if nc > 0 {
                let t = rc.transpose();
                exchange.push((sk, rc, t));
            }
            if nv > 0 {
                let t = rv.transpose();
                exchange.push((sk, rv, t));
            }
            if nc > 0 && nv > 0 {
                let mut lq = DMatrix::zeros(self.nmo, self.nmo);
                lq[(o(0), o(1))] = 1.0;
                lq[(o(1), o(0))] = -1.0;
                exchange.push((2.0 * sk, ls, lq));
            }
        }
        Ok(Terms {
            l_up,
            l_dn,
            coulomb,
            exchange,
        })
    }

    /// J of several matrices (symmetrised first; J[P] = J[P_s]).
    fn j_of(
        &self,
        ctx: &mut Ctx,
        mats: &[DMatrix<f64>],
    ) -> Result<Vec<DMatrix<f64>>, GradientError> {
        let mut out = Vec::with_capacity(mats.len());
        for chunk in mats.chunks(MAX_BATCH) {
            let sym: Vec<DMatrix<f64>> = chunk.iter().map(|m| (m + m.transpose()) * 0.5).collect();
            out.extend(ctx.engine().jk(&sym, false, true)?.0);
        }
        Ok(out)
    }

    /// K of several (possibly non-symmetric) matrices.
    fn k_of(
        &self,
        ctx: &mut Ctx,
        mats: &[DMatrix<f64>],
    ) -> Result<Vec<DMatrix<f64>>, GradientError> {
        let mut out = Vec::with_capacity(mats.len());
        for chunk in mats.chunks(MAX_BATCH) {
            out.extend(ctx.engine().k_only(chunk)?);
        }
        Ok(out)
    }

    /// Y of a pair of Fock-type terms through D (2 Ṽ^τ diag n^τ), from the
    /// J of Γ^↑ + Γ^↓ and the K of Γ^↑, Γ^↓ (AO).
    fn density_response_y(
        &self,
        j_t: &DMatrix<f64>,
        k_up: &DMatrix<f64>,
        k_dn: &DMatrix<f64>,
        fxc: Option<&(DMatrix<f64>, DMatrix<f64>)>,
    ) -> DMatrix<f64> {
        let jt = self.to_mo(j_t);
        let mut vu = jt.clone();
        let mut vd = jt;
        if self.cx != 0.0 {
            vu -= self.to_mo(k_up) * self.cx;
            vd -= self.to_mo(k_dn) * self.cx;
        }
        if let Some((fu, fd)) = fxc {
            vu += self.to_mo(fu);
            vd += self.to_mo(fd);
        }
        (scale_columns(&vu, &self.n_up) + scale_columns(&vd, &self.n_dn)) * 2.0
    }

    /// (α, β) spin densities from (↑, ↓) ones.
    fn spins<'a>(
        &self,
        up: &'a DMatrix<f64>,
        dn: &'a DMatrix<f64>,
    ) -> (&'a DMatrix<f64>, &'a DMatrix<f64>) {
        if self.up_is_alpha {
            (up, dn)
        } else {
            (dn, up)
        }
    }

    /// The step and the two displaced spin-density pairs (α, β) D ± e Γ.
    #[allow(clippy::type_complexity)]
    fn displaced(
        &self,
        g_up: &DMatrix<f64>,
        g_dn: &DMatrix<f64>,
    ) -> Option<(f64, [(DMatrix<f64>, DMatrix<f64>); 2])> {
        let scale = g_up.amax().max(g_dn.amax());
        if scale == 0.0 {
            return None;
        }
        let e = XC_STEP / scale;
        let mk = |sign: f64| {
            let u = &self.d_up + g_up * (sign * e);
            let d = &self.d_dn + g_dn * (sign * e);
            let (a, b) = self.spins(&u, &d);
            (a.clone(), b.clone())
        };
        Some((e, [mk(1.0), mk(-1.0)]))
    }

    /// The XC kernel contracted with spin matrices (Γ^↑, Γ^↓) (AO), for
    /// several at once: Σ_σ f^{τσ}_xc Γ^σ for τ = ↑, ↓ (None without a
    /// semilocal functional), analytic or by central differences of V^τ_xc
    /// along Γ in density space ([`XcKernel`]).
    fn fxc(
        &self,
        ctx: &Ctx,
        trials: &[(&DMatrix<f64>, &DMatrix<f64>)],
    ) -> Result<Option<Vec<SpinPair>>, GradientError> {
        let Some(ks) = ctx.xc() else { return Ok(None) };
        let mut out = Vec::with_capacity(trials.len());
        match self.kernel {
            XcKernel::Analytic => {
                let (da, db) = self.spins(&self.d_up, &self.d_dn);
                let t: Vec<SpinPair> = trials
                    .iter()
                    .map(|(u, d)| {
                        let (a, b) = self.spins(u, d);
                        (a.clone(), b.clone())
                    })
                    .collect();
                let data = match self.kernel_data.get() {
                    Some(d) => d,
                    None => {
                        let d = KernelData::build(&self.basis, ks, da, db)?;
                        self.kernel_data.get_or_init(|| d)
                    }
                };
                for (fa, fb) in data.contract(&t) {
                    out.push(if self.up_is_alpha { (fa, fb) } else { (fb, fa) });
                }
            }
            XcKernel::Differences => {
                for (g_up, g_dn) in trials {
                    let n = g_up.nrows();
                    let Some((e, [(pa, pb), (ma, mb)])) = self.displaced(g_up, g_dn) else {
                        out.push((DMatrix::zeros(n, n), DMatrix::zeros(n, n)));
                        continue;
                    };
                    let (vpa, vpb) = ks.xc_potential(&pa, &pb)?;
                    let (vma, vmb) = ks.xc_potential(&ma, &mb)?;
                    let fa = (vpa - vma) / (2.0 * e);
                    let fb = (vpb - vmb) / (2.0 * e);
                    out.push(if self.up_is_alpha { (fa, fb) } else { (fb, fa) });
                }
            }
        }
        Ok(Some(out))
    }

    /// d/dR at fixed AO matrices of Σ_σ tr(Γ^σ V^σ_xc[D]) (basis functions,
    /// kernel and grid weights): the central difference along Γ of the XC
    /// energy gradient at fixed densities.
    fn xc_explicit(
        &self,
        basis: &BasisSet,
        ctx: &Ctx,
        g_up: &DMatrix<f64>,
        g_dn: &DMatrix<f64>,
    ) -> Result<Option<Vec<[f64; 3]>>, GradientError> {
        let Some(ks) = ctx.xc() else { return Ok(None) };
        let Some((e, [(pa, pb), (ma, mb)])) = self.displaced(g_up, g_dn) else {
            return Ok(None);
        };
        let gp = xc::xc_gradient(basis, ks.grid(), ks.functional(), &pa, &pb, false)?.total;
        let gm = xc::xc_gradient(basis, ks.grid(), ks.functional(), &ma, &mb, false)?.total;
        Ok(Some(
            gp.iter()
                .zip(&gm)
                .map(|(a, b)| std::array::from_fn(|k| (a[k] - b[k]) / (2.0 * e)))
                .collect(),
        ))
    }

    /// ω and Y^ω of one term list.
    fn evaluate(&self, ctx: &mut Ctx, t: &Terms) -> Result<(f64, DMatrix<f64>), GradientError> {
        let gu = self.to_ao(&t.l_up);
        let gd = self.to_ao(&t.l_dn);
        let mut jm = vec![&gu + &gd];
        for (_, lp, lq) in &t.coulomb {
            jm.push(self.to_ao(lp));
            jm.push(self.to_ao(lq));
        }
        let mut km = vec![gu.clone(), gd.clone()];
        for (_, lp, lq) in &t.exchange {
            km.push(self.to_ao(lp));
            km.push(self.to_ao(lq));
        }
        let j = self.j_of(ctx, &jm)?;
        let k = if self.cx != 0.0 || !t.exchange.is_empty() {
            self.k_of(ctx, &km)?
        } else {
            vec![DMatrix::zeros(gu.nrows(), gu.ncols()); km.len()]
        };
        let fx = self.fxc(ctx, &[(&gu, &gd)])?.map(|mut v| v.swap_remove(0));
        let mut omega = self.f_up.dot(&t.l_up) + self.f_dn.dot(&t.l_dn);
        let mut y = (&self.f_up * &t.l_up + &self.f_dn * &t.l_dn) * 2.0;
        y += self.density_response_y(&j[0], &k[0], &k[1], fx.as_ref());
        for (n, (c, lp, lq)) in t.coulomb.iter().enumerate() {
            let (jp, jq) = (&j[1 + 2 * n], &j[2 + 2 * n]);
            omega += c * jp.dot(&jm[2 + 2 * n]);
            y += (self.to_mo(jq) * (lp + lp.transpose()) + self.to_mo(jp) * (lq + lq.transpose()))
                * *c;
        }
        for (n, (c, lp, lq)) in t.exchange.iter().enumerate() {
            let (kp, kq) = (&k[2 + 2 * n], &k[3 + 2 * n]);
            // X(P, Q) = Σ P_μλ K[Q]_μλ
            omega += c * km[2 + 2 * n].dot(kq);
            let g = self.to_mo(&kq.transpose());
            let gp = self.to_mo(&kp.transpose());
            y += (g.transpose() * lp.transpose()
                + &g * lp
                + gp.transpose() * lq.transpose()
                + &gp * lq)
                * *c;
        }
        Ok((omega, y))
    }

    fn block(&self, p: usize) -> usize {
        if p < self.nc {
            0
        } else if p < self.nc + 2 {
            1
        } else {
            2
        }
    }

    /// The non-redundant upper-triangle part (p < q in different blocks).
    fn nr_part(&self, m: &DMatrix<f64>) -> DMatrix<f64> {
        DMatrix::from_fn(self.nmo, self.nmo, |p, q| {
            if self.block(p) < self.block(q) {
                m[(p, q)]
            } else {
                0.0
            }
        })
    }

    /// M^σ = Z n^σ − n^σ Z for the antisymmetric Z = U − Uᵀ.
    fn m_of(&self, u: &DMatrix<f64>) -> (DMatrix<f64>, DMatrix<f64>) {
        let z = u - u.transpose();
        let mu = scale_columns(&z, &self.n_up) - scale_rows(&z, &self.n_up);
        let md = scale_columns(&z, &self.n_dn) - scale_rows(&z, &self.n_dn);
        (mu, md)
    }

    /// Y^Λ for several Z (upper NR parts), one batched J/K build.
    fn lambda_y(
        &self,
        ctx: &mut Ctx,
        us: &[DMatrix<f64>],
    ) -> Result<Vec<DMatrix<f64>>, GradientError> {
        let ms: Vec<(DMatrix<f64>, DMatrix<f64>)> = us.iter().map(|u| self.m_of(u)).collect();
        let aos: Vec<(DMatrix<f64>, DMatrix<f64>)> = ms
            .iter()
            .map(|(a, b)| (self.to_ao(a), self.to_ao(b)))
            .collect();
        let jm: Vec<DMatrix<f64>> = aos.iter().map(|(a, b)| a + b).collect();
        let j = self.j_of(ctx, &jm)?;
        let k = if self.cx != 0.0 {
            let km: Vec<DMatrix<f64>> = aos
                .iter()
                .flat_map(|(a, b)| [a.clone(), b.clone()])
                .collect();
            self.k_of(ctx, &km)?
        } else {
            vec![DMatrix::zeros(1, 1); 2 * us.len()]
        };
        let trials: Vec<(&DMatrix<f64>, &DMatrix<f64>)> = aos.iter().map(|(a, b)| (a, b)).collect();
        let fxs = self.fxc(ctx, &trials)?;
        let mut out = Vec::with_capacity(ms.len());
        for (s, (mu, md)) in ms.iter().enumerate() {
            let fx = fxs.as_ref().map(|v| &v[s]);
            let mut y = (&self.f_up * mu + &self.f_dn * md) * 2.0;
            if self.cx != 0.0 {
                y += self.density_response_y(&j[s], &k[2 * s], &k[2 * s + 1], fx);
            } else {
                y += self.density_response_y(&j[s], &j[s], &j[s], fx);
            }
            out.push(y);
        }
        Ok(out)
    }

    /// The ROKS orbital Hessian on NR rotations: (Y^Λ − Y^Λᵀ) on NR pairs.
    fn hessian(
        &self,
        ctx: &mut Ctx,
        us: &[DMatrix<f64>],
    ) -> Result<Vec<DMatrix<f64>>, GradientError> {
        Ok(self
            .lambda_y(ctx, us)?
            .iter()
            .map(|y| self.nr_part(&(y - y.transpose())))
            .collect())
    }

    /// Diagonal preconditioner 2 Σ_σ (n_p − n_q)(F_qq − F_pp) on NR pairs.
    fn preconditioner(&self) -> DMatrix<f64> {
        DMatrix::from_fn(self.nmo, self.nmo, |p, q| {
            if self.block(p) >= self.block(q) {
                return 0.0;
            }
            let mut d = 0.0;
            for (n, f) in [(&self.n_up, &self.f_up), (&self.n_dn, &self.f_dn)] {
                d += 2.0 * (n[p] - n[q]) * (f[(q, q)] - f[(p, p)]);
            }
            1.0 / d.abs().max(1e-2)
        })
    }

    /// Block preconditioned CG for H Z = b, one system per state.
    #[allow(clippy::type_complexity)]
    fn solve_z(
        &self,
        ctx: &mut Ctx,
        rhs: &[DMatrix<f64>],
        opts: &ZVectorOptions,
    ) -> Result<(Vec<DMatrix<f64>>, usize, Vec<f64>), GradientError> {
        let ns = rhs.len();
        let prec = self.preconditioner();
        let apply_prec = |r: &DMatrix<f64>| r.component_mul(&prec);
        let mut x: Vec<DMatrix<f64>> = rhs.iter().map(&apply_prec).collect();
        let ax = self.hessian(ctx, &x)?;
        let mut r: Vec<DMatrix<f64>> = rhs.iter().zip(&ax).map(|(b, a)| b - a).collect();
        let mut zr: Vec<DMatrix<f64>> = r.iter().map(&apply_prec).collect();
        let mut p = zr.clone();
        let mut rz: Vec<f64> = r.iter().zip(&zr).map(|(a, b)| a.dot(b)).collect();
        let mut norms: Vec<f64> = r.iter().map(|m| m.norm()).collect();
        let mut done: Vec<bool> = norms.iter().map(|&n| n < opts.residual_tolerance).collect();
        let mut it = 0;
        while done.iter().any(|d| !d) {
            if it >= opts.max_iterations {
                return Err(GradientError::ZVectorNotConverged {
                    iterations: it,
                    residuals: norms,
                    tolerance: opts.residual_tolerance,
                });
            }
            it += 1;
            let active: Vec<usize> = (0..ns).filter(|&s| !done[s]).collect();
            let ps: Vec<DMatrix<f64>> = active.iter().map(|&s| p[s].clone()).collect();
            let aps = self.hessian(ctx, &ps)?;
            for (&s, ap) in active.iter().zip(&aps) {
                let pap = p[s].dot(ap);
                if pap.is_nan() || pap <= 0.0 {
                    return Err(GradientError::ZVectorNotConverged {
                        iterations: it,
                        residuals: norms,
                        tolerance: opts.residual_tolerance,
                    });
                }
                let alpha = rz[s] / pap;
                x[s] += &p[s] * alpha;
                r[s] -= ap * alpha;
                norms[s] = r[s].norm();
                if norms[s] < opts.residual_tolerance {
                    done[s] = true;
                    continue;
                }
                zr[s] = apply_prec(&r[s]);
                let rz_new = r[s].dot(&zr[s]);
                let beta = rz_new / rz[s];
                rz[s] = rz_new;
                p[s] = &zr[s] + &p[s] * beta;
            }
            tracing::debug!("z-vector iteration {it}: residuals {norms:?}");
        }
        tracing::info!("z-vector converged in {it} iterations, residuals {norms:?}");
        Ok((x, it, norms))
    }
}

/// Blocks of grid points per parallel chunk of the analytic kernel.
const KERNEL_CHUNKS: usize = 16;

/// Reference-density data of one grid block for the analytic kernel.
struct KernelBlock {
    values: AoValues,
    weights: Vec<f64>,
    /// ∇ρ_α, ∇ρ_β (GGA).
    grad: Option<[[Vec<f64>; 3]; 2]>,
    /// v_σ (3 per point), v2rho2 (3), v2rhosigma (6), v2sigma2 (6).
    vsigma: Vec<f64>,
    v2rho2: Vec<f64>,
    v2rhosigma: Vec<f64>,
    v2sigma2: Vec<f64>,
}

/// AO values and second derivatives of the functional at the reference
/// density on every grid block, computed once per gradient call.
struct KernelData {
    nbf: usize,
    gga: bool,
    blocks: Vec<KernelBlock>,
}

/// ρ and (GGA) ∇ρ on a block of a symmetric AO matrix `d` (AO values `v`).
fn block_density(v: &AoValues, d: &DMatrix<f64>, gga: bool) -> (Vec<f64>, Option<[Vec<f64>; 3]>) {
    let np = v.npts();
    let aos = v.aos();
    let na = aos.len();
    let phi = DMatrixView::from_slice(v.component(COMP_VALUE), np, na);
    let sub = DMatrix::from_fn(na, na, |i, j| d[(aos[i], aos[j])]);
    let t = phi * sub;
    let ts = t.as_slice();
    let ps = v.component(COMP_VALUE);
    let mut rho = vec![0.0; np];
    for j in 0..na {
        for p in 0..np {
            rho[p] += ts[j * np + p] * ps[j * np + p];
        }
    }
    let grad = gga.then(|| {
        std::array::from_fn(|k| {
            let dk = v.component(COMP_X + k);
            let mut g = vec![0.0; np];
            for j in 0..na {
                for p in 0..np {
                    g[p] += 2.0 * ts[j * np + p] * dk[j * np + p];
                }
            }
            g
        })
    });
    (rho, grad)
}

fn dot3(x: &[Vec<f64>; 3], y: &[Vec<f64>; 3], p: usize) -> f64 {
    x[0][p] * y[0][p] + x[1][p] * y[1][p] + x[2][p] * y[2][p]
}

impl KernelData {
    /// Evaluate the functional to second order at (D^α, D^β) on `ks`'s grid.
    fn build(
        basis: &BasisSet,
        ks: &KohnSham,
        da: &DMatrix<f64>,
        db: &DMatrix<f64>,
    ) -> Result<KernelData, GradientError> {
        let functional = ks.functional();
        let grid = ks.grid();
        let gga = functional.family() == Family::Gga;
        let ao = AoBasis::new(basis).map_err(|e| GradientError::Ks(e.into()))?;
        let nblocks = grid.blocks.len();
        let chunk = nblocks.div_ceil(KERNEL_CHUNKS).max(1);
        let ranges: Vec<std::ops::Range<usize>> = (0..nblocks)
            .step_by(chunk)
            .map(|s| s..(s + chunk).min(nblocks))
            .collect();
        let mut funcs = Vec::with_capacity(ranges.len());
        for _ in 0..ranges.len() {
            funcs.push(
                functional
                    .try_clone()
                    .map_err(|e| GradientError::Xc(e.to_string()))?,
            );
        }
        let parts: Vec<Result<Vec<KernelBlock>, GradientError>> = ranges
            .into_par_iter()
            .zip(funcs.into_par_iter())
            .map(|(range, func)| {
                let mut blocks = Vec::new();
                let mut out = XcOutput::new();
                for blk in range {
                    let block = &grid.blocks[blk];
                    let mut values = AoValues::new();
                    ao.eval_block(grid, block, if gga { 1 } else { 0 }, &mut values)
                        .map_err(|e| GradientError::Ks(e.into()))?;
                    if values.nao() == 0 {
                        continue;
                    }
                    let np = values.npts();
                    let (ra, ga) = block_density(&values, da, gga);
                    let (rb, gb) = block_density(&values, db, gga);
                    let mut rho = Vec::with_capacity(2 * np);
                    for p in 0..np {
                        rho.push(ra[p]);
                        rho.push(rb[p]);
                    }
                    let mut sigma = Vec::new();
                    let grad = match (ga, gb) {
                        (Some(ga), Some(gb)) => {
                            for p in 0..np {
                                sigma.push(dot3(&ga, &ga, p));
                                sigma.push(dot3(&ga, &gb, p));
                                sigma.push(dot3(&gb, &gb, p));
                            }
                            Some([ga, gb])
                        }
                        _ => None,
                    };
                    let input = XcInput {
                        rho: &rho,
                        sigma: &sigma,
                    };
                    func.eval(&input, 2, &mut out)
                        .map_err(|e| GradientError::Xc(e.to_string()))?;
                    blocks.push(KernelBlock {
                        values,
                        weights: grid.weights[block.range.clone()].to_vec(),
                        grad,
                        vsigma: out.vsigma.clone(),
                        v2rho2: out.v2rho2.clone(),
                        v2rhosigma: out.v2rhosigma.clone(),
                        v2sigma2: out.v2sigma2.clone(),
                    });
                }
                Ok(blocks)
            })
            .collect();
        let mut blocks = Vec::with_capacity(nblocks);
        for p in parts {
            blocks.extend(p?);
        }
        Ok(KernelData {
            nbf: basis.nbf,
            gga,
            blocks,
        })
    }

    /// The spin-polarised kernel contracted with trial spin matrices: for
    /// each (G^α, G^β), δV^s_μν = ∫ [δv_ρs φ_μφ_ν + δ(2 v_σss ∇ρ_s +
    /// v_σαβ ∇ρ_s̄)·∇(φ_μφ_ν)], δv from the second derivatives of the
    /// functional times (δρ_t, δσ_x), δσ_ss = 2 ∇ρ_s·∇δρ_s, δσ_αβ =
    /// ∇ρ_α·∇δρ_β + ∇δρ_α·∇ρ_β (the derivative of the potential formula of
    /// the XC module docs). One pass over the blocks for all trials.
    #[allow(clippy::needless_range_loop)] // point-indexed kernel formulas
    fn contract(&self, trials: &[SpinPair]) -> Vec<SpinPair> {
        let n = self.nbf;
        let gga = self.gga;
        let chunk = self.blocks.len().div_ceil(KERNEL_CHUNKS).max(1);
        let zero = || -> Vec<SpinPair> {
            trials
                .iter()
                .map(|_| (DMatrix::zeros(n, n), DMatrix::zeros(n, n)))
                .collect()
        };
        let parts: Vec<Vec<SpinPair>> = self
            .blocks
            .par_chunks(chunk)
            .map(|blocks| {
                let mut acc = zero();
                for kb in blocks {
                    let v = &kb.values;
                    let np = v.npts();
                    let na = v.nao();
                    let aos = v.aos();
                    let w = &kb.weights;
                    let ps = v.component(COMP_VALUE);
                    let phi = DMatrixView::from_slice(ps, np, na);
                    let r2 = |s: usize, t: usize| s + t;
                    let s2 = |x: usize, y: usize| {
                        let (a, b) = if x <= y { (x, y) } else { (y, x) };
                        [[0, 1, 2], [1, 3, 4], [2, 4, 5]][a][b]
                    };
                    for (ti, (gta, gtb)) in trials.iter().enumerate() {
                        let (dra, dga) = block_density(v, gta, gga);
                        let (drb, dgb) = block_density(v, gtb, gga);
                        let drho = [&dra, &drb];
                        for spin in 0..2 {
                            let mut a = vec![0.0; np];
                            let mut c: Option<[Vec<f64>; 3]> =
                                gga.then(|| std::array::from_fn(|_| vec![0.0; np]));
                            for p in 0..np {
                                let dsig = match (&kb.grad, &dga, &dgb) {
                                    (Some([ga, gb]), Some(dga), Some(dgb)) => [
                                        2.0 * dot3(ga, dga, p),
                                        dot3(ga, dgb, p) + dot3(dga, gb, p),
                                        2.0 * dot3(gb, dgb, p),
                                    ],
                                    _ => [0.0; 3],
                                };
                                let mut dvr = 0.0;
                                for t in 0..2 {
                                    dvr += kb.v2rho2[3 * p + r2(spin, t)] * drho[t][p];
                                }
                                if gga {
                                    for (x, ds) in dsig.iter().enumerate() {
                                        dvr += kb.v2rhosigma[6 * p + 3 * spin + x] * ds;
                                    }
                                }
                                a[p] = 0.5 * w[p] * dvr;
                                if let (Some(c), Some([ga, gb]), Some(dga), Some(dgb)) =
                                    (c.as_mut(), &kb.grad, &dga, &dgb)
                                {
                                    let mut dvs = [0.0; 3];
                                    for (x, d) in dvs.iter_mut().enumerate() {
                                        for t in 0..2 {
                                            *d += kb.v2rhosigma[6 * p + 3 * t + x] * drho[t][p];
                                        }
                                        for (y, ds) in dsig.iter().enumerate() {
                                            *d += kb.v2sigma2[6 * p + s2(x, y)] * ds;
                                        }
                                    }
                                    let (own, other, down, dother, ix) = if spin == 0 {
                                        (ga, gb, dga, dgb, 0)
                                    } else {
                                        (gb, ga, dgb, dga, 2)
                                    };
                                    let vss = kb.vsigma[3 * p + ix];
                                    let vab = kb.vsigma[3 * p + 1];
                                    for k in 0..3 {
                                        c[k][p] = w[p]
                                            * (2.0 * dvs[ix] * own[k][p]
                                                + 2.0 * vss * down[k][p]
                                                + dvs[1] * other[k][p]
                                                + vab * dother[k][p]);
                                    }
                                }
                            }
                            // u = a Φ + c·∇Φ, sub = Φᵀ u, V += sub + subᵀ.
                            let mut u = DMatrix::<f64>::zeros(np, na);
                            {
                                let us = u.as_mut_slice();
                                for j in 0..na {
                                    let uc = &mut us[j * np..(j + 1) * np];
                                    let pc = &ps[j * np..(j + 1) * np];
                                    for p in 0..np {
                                        uc[p] = a[p] * pc[p];
                                    }
                                    if let Some(c) = &c {
                                        for k in 0..3 {
                                            let dk = &v.component(COMP_X + k)[j * np..(j + 1) * np];
                                            for p in 0..np {
                                                uc[p] += c[k][p] * dk[p];
                                            }
                                        }
                                    }
                                }
                            }
                            let sub = phi.transpose() * u;
                            let target = if spin == 0 {
                                &mut acc[ti].0
                            } else {
                                &mut acc[ti].1
                            };
                            for (j, &gj) in aos.iter().enumerate() {
                                for (i, &gi) in aos.iter().enumerate() {
                                    target[(gi, gj)] += sub[(i, j)] + sub[(j, i)];
                                }
                            }
                        }
                    }
                }
                acc
            })
            .collect();
        let mut total = zero();
        for p in parts {
            for (t, x) in total.iter_mut().zip(p) {
                t.0 += x.0;
                t.1 += x.1;
            }
        }
        total
    }
}
