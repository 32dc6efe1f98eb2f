//! Self-consistent field: RHF/UHF/ROHF and, with a Kohn–Sham
//! [`fock::FockBuilder`], RKS/UKS/ROKS.
//!
//! # The driver
//! One function, [`run`], over replaceable steps (design note 4): the core
//! Hamiltonian h = T + V is fixed; the two-electron potential G^σ[D^α, D^β]
//! and its energy come from a [`fock::FockBuilder`] (Hartree–Fock here; the
//! Kohn–Sham builder in `dft` adds V_xc and E_xc and scales the exchange);
//! F^σ = h + G^σ; the effective Fock matrix of the reference is formed and
//! extrapolated (DIIS), diagonalised and occupied (aufbau); the densities
//! follow. Everything between builds happens in an orthonormal basis
//! χ' = χ X: symmetric (Löwdin) orthogonalisation X = S^{−½}, or canonical
//! orthogonalisation that drops overlap eigenvalues below
//! [`ScfOptions::linear_dependence`] when the basis is nearly dependent.
//!
//! Energy: E = tr((D^α + D^β) h) + E_2[D^α, D^β] + E_nuc.
//!
//! # References
//! * **Restricted** (RHF/RKS): D^α = D^β, closed shell.
//! * **Unrestricted** (UHF/UKS): separate α and β orbitals; <S²> is reported
//!   as s(s+1) + N_β − Σ_ij |⟨φ^α_i|φ^β_j⟩|² (Szabo & Ostlund, Modern Quantum
//!   Chemistry, eq. 3.366 (1989), from memory).
//! * **Restricted open shell** (ROHF/ROKS, high spin): core C (doubly
//!   occupied), open O (α only), virtual V, one set of orbitals. The energy
//!   is stationary when the C–O block of F^β, the O–V block of F^α and the C–V
//!   block of F^c = ½(F^α + F^β) vanish. **Canonicalisation convention**: the
//!   effective Fock matrix has F^c in all three diagonal blocks and those
//!   stationarity blocks off the diagonal:
//!
//!   ```text
//!            C     O     V
//!       C   F^c   F^β   F^c
//!       O   F^β   F^c   F^α
//!       V   F^c   F^α   F^c
//!   ```
//!
//!   Why this one: it is the symmetric choice (α and β treated alike, so the
//!   orbital energies of the open shells are not biased towards either spin),
//!   its eigenvectors make the three stationarity blocks zero at convergence,
//!   and nothing downstream depends on the diagonal blocks — the energy and
//!   density are invariant, and the spin-flip response uses F^α and F^β
//!   themselves (with their off-diagonal elements), never these eigenvalues.
//!   The matrix is built with the orthonormal-basis projectors p_C = S'D^β,
//!   p_O = S'(D^α − D^β), p_V = 1 − S'D^α, so no virtual orbitals of the
//!   previous step are needed: F_eff = F^c + (p_C (F^β − F^c) p_O + h.c.)
//!   + (p_O (F^α − F^c) p_V + h.c.).
//!
//! # Convergence and fallbacks
//! Converged when |ΔE| < [`ScfOptions::energy_tolerance`] and the largest
//! element of the orbital gradient, the commutator F D − D F in the
//! orthonormal basis (D the total density; for ROHF this vanishes exactly when
//! the three stationarity blocks do), is below
//! [`ScfOptions::gradient_tolerance`]. Strategy: DIIS from the second
//! iteration; if a stage makes no progress (the gradient has not fallen below
//! a tenth of its value at the stage's start within
//! [`ScfOptions::stage_iterations`]), the next stage takes over with a fresh
//! DIIS subspace: (1) DIIS; (2) DIIS with a level shift of 0.3 Eh on the
//! virtual (and half of it on the open) orbitals; (3) level shift 1.0 Eh and
//! Fock damping 0.5 until the gradient is below 10⁻³, then DIIS again.
//! Not converging after [`ScfOptions::max_iterations`] is
//! [`ScfError::NotConverged`] carrying the last iterations.

pub mod diis;
pub mod fock;
pub mod guess;

use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::integrals::{self, JkOptions, TwoElectronError};
use diis::Diis;
use fock::{FockBuilder, HartreeFock, JkEngine};
use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

/// Spin treatment of the determinant.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Reference {
    /// Closed shell, D^α = D^β.
    Restricted,
    /// High-spin open shell with one set of orbitals.
    RestrictedOpen,
    /// Separate α and β orbitals.
    Unrestricted,
}

/// Numbers of α and β electrons.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Electrons {
    /// α electrons.
    pub alpha: usize,
    /// β electrons (≤ α).
    pub beta: usize,
}

impl Electrons {
    /// From the sum of nuclear charges, the molecular charge and the spin
    /// multiplicity 2S+1 (high spin: N_α − N_β = 2S).
    pub fn from_charge_multiplicity(
        nuclear_charge: usize,
        charge: i64,
        multiplicity: usize,
    ) -> Result<Electrons, ScfError> {
        let n = nuclear_charge as i64 - charge;
        if n < 0 {
            return Err(ScfError::Electrons(format!(
                "charge {charge} leaves {n} electrons (nuclear charge {nuclear_charge})"
            )));
        }
        if multiplicity == 0 {
            return Err(ScfError::Electrons(
                "multiplicity must be at least 1 (2S+1)".into(),
            ));
        }
        let unpaired = multiplicity as i64 - 1;
        if unpaired > n || (n - unpaired) % 2 != 0 {
            return Err(ScfError::Electrons(format!(
                "{n} electrons cannot have multiplicity {multiplicity} \
                 ({} unpaired electrons needed, parity must match)",
                unpaired
            )));
        }
        Ok(Electrons {
            alpha: ((n + unpaired) / 2) as usize,
            beta: ((n - unpaired) / 2) as usize,
        })
    }

    /// Total number of electrons.
    pub fn total(&self) -> usize {
        self.alpha + self.beta
    }
}

/// Where the iterations start.
#[derive(Clone, Debug)]
pub enum Guess {
    /// Orbitals of the core Hamiltonian.
    Core,
    /// Superposition of atomic densities (the default).
    AtomicSuperposition,
    /// Given spin densities (AO basis of this geometry).
    Densities {
        /// D^α.
        alpha: DMatrix<f64>,
        /// D^β.
        beta: DMatrix<f64>,
    },
    /// Occupied orbitals from another geometry with the same basis layout
    /// (AO coefficients, nbf × N_σ), re-orthonormalised here.
    Orbitals {
        /// Occupied α orbitals.
        alpha: DMatrix<f64>,
        /// Occupied β orbitals.
        beta: DMatrix<f64>,
    },
}

/// Tunables of [`run`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ScfOptions {
    /// Iteration limit (default 128).
    pub max_iterations: usize,
    /// |ΔE| threshold in Eh (default 1e−10).
    pub energy_tolerance: f64,
    /// Largest orbital-gradient element threshold (default 1e−7).
    pub gradient_tolerance: f64,
    /// DIIS subspace size (default 12).
    pub diis_size: usize,
    /// Iterations a fallback stage may run without progress (default 24).
    pub stage_iterations: usize,
    /// Overlap eigenvalues below this are dropped (default 1e−7).
    pub linear_dependence: f64,
    /// Iteration records kept for the error report (default 12).
    pub history_length: usize,
}

impl Default for ScfOptions {
    fn default() -> Self {
        ScfOptions {
            max_iterations: 128,
            energy_tolerance: 1e-10,
            gradient_tolerance: 1e-7,
            diis_size: 12,
            stage_iterations: 24,
            linear_dependence: 1e-7,
            history_length: 12,
        }
    }
}

/// One SCF iteration, for progress lines and error reports.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct IterationRecord {
    /// 1-based iteration number.
    pub iteration: usize,
    /// Total energy (Eh) of the density the Fock matrix was built from.
    pub energy: f64,
    /// Change from the previous iteration (Eh).
    pub delta_energy: f64,
    /// Largest orbital-gradient element.
    pub gradient: f64,
    /// DIIS subspace size used.
    pub diis: usize,
    /// Level shift applied (Eh).
    pub level_shift: f64,
    /// Fock damping factor applied.
    pub damping: f64,
}

impl std::fmt::Display for IterationRecord {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{:4}  E = {:+.10} Eh  dE = {:+.2e}  gradient = {:.2e}  diis {}  shift {:.2}  damping {:.2}",
            self.iteration,
            self.energy,
            self.delta_energy,
            self.gradient,
            self.diis,
            self.level_shift,
            self.damping
        )
    }
}

/// Errors of the SCF.
#[derive(Debug, thiserror::Error)]
pub enum ScfError {
    /// Impossible electron count or multiplicity (set-up error).
    #[error("electrons: {0}")]
    Electrons(String),
    /// More electrons of one spin than orbitals.
    #[error("{electrons} {spin} electrons but only {orbitals} independent orbitals in this basis")]
    TooFewOrbitals {
        /// Electrons of that spin.
        electrons: usize,
        /// "alpha" or "beta".
        spin: &'static str,
        /// Orbitals after removing linear dependencies.
        orbitals: usize,
    },
    /// A guess that does not fit the basis.
    #[error("guess: {0}")]
    Guess(String),
    /// The iterations did not converge.
    #[error("SCF not converged in {iterations} iterations; last iterations:\n{}", format_history(.history))]
    NotConverged {
        /// Iterations done.
        iterations: usize,
        /// The last iterations.
        history: Vec<IterationRecord>,
    },
    /// A non-finite energy or Fock matrix.
    #[error("SCF produced a non-finite energy or Fock matrix at iteration {iteration}")]
    NonFinite {
        /// Iteration.
        iteration: usize,
    },
    /// Integral or potential build failed.
    #[error("two-electron build: {0}")]
    TwoElectron(#[from] TwoElectronError),
    /// Exchange–correlation evaluation failed.
    #[error("exchange-correlation: {0}")]
    Xc(String),
}

fn format_history(h: &[IterationRecord]) -> String {
    h.iter()
        .map(|r| format!("  {r}"))
        .collect::<Vec<_>>()
        .join("\n")
}

/// A converged SCF.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ScfResult {
    /// Spin treatment.
    pub reference: Reference,
    /// Electron counts.
    pub electrons: Electrons,
    /// Total energy (Eh).
    pub energy: f64,
    /// Nuclear repulsion (Eh).
    pub nuclear_repulsion: f64,
    /// One-electron energy tr(D h) (Eh).
    pub one_electron: f64,
    /// Coulomb energy (Eh).
    pub coulomb: f64,
    /// Exact-exchange energy (Eh).
    pub exchange: f64,
    /// Exchange–correlation energy (Eh).
    pub xc: f64,
    /// Electrons counted by the grid (KS only).
    pub grid_electrons: Option<f64>,
    /// α orbital energies (Eh), ascending (ROHF: eigenvalues of the
    /// effective Fock matrix).
    pub orbital_energies_alpha: Vec<f64>,
    /// β orbital energies (equal to α except for UHF).
    pub orbital_energies_beta: Vec<f64>,
    /// α orbitals (AO coefficients, nbf × nmo).
    pub orbitals_alpha: DMatrix<f64>,
    /// β orbitals (equal to α except for UHF).
    pub orbitals_beta: DMatrix<f64>,
    /// α density (AO).
    pub density_alpha: DMatrix<f64>,
    /// β density (AO).
    pub density_beta: DMatrix<f64>,
    /// F^α including h (AO).
    pub fock_alpha: DMatrix<f64>,
    /// F^β including h (AO).
    pub fock_beta: DMatrix<f64>,
    /// <S²>.
    pub s_squared: f64,
    /// Iterations needed.
    pub iterations: usize,
    /// All iterations.
    pub history: Vec<IterationRecord>,
    /// Whether the integrals were held in memory.
    pub in_core: bool,
}

impl ScfResult {
    /// Occupation (0, 1 or 2 for restricted; 0/1 per spin) of each orbital:
    /// (α, β) lists.
    pub fn occupations(&self) -> (Vec<f64>, Vec<f64>) {
        let nmo = self.orbital_energies_alpha.len();
        let a = (0..nmo)
            .map(|k| if k < self.electrons.alpha { 1.0 } else { 0.0 })
            .collect();
        let b = (0..nmo)
            .map(|k| if k < self.electrons.beta { 1.0 } else { 0.0 })
            .collect();
        (a, b)
    }
}

/// Orthogonaliser X with Xᵀ S X = 1: symmetric S^{−½} if no overlap
/// eigenvalue is below `threshold`, else canonical (fewer columns).
pub fn orthogonalizer(s: &DMatrix<f64>, threshold: f64) -> DMatrix<f64> {
    let e = s.clone().symmetric_eigen();
    let keep: Vec<usize> = (0..e.eigenvalues.len())
        .filter(|&k| e.eigenvalues[k] >= threshold)
        .collect();
    let n = s.nrows();
    if keep.len() == n {
        let d = DMatrix::from_diagonal(&e.eigenvalues.map(|v| 1.0 / v.sqrt()));
        &e.eigenvectors * d * e.eigenvectors.transpose()
    } else {
        let mut x = DMatrix::zeros(n, keep.len());
        for (c, &k) in keep.iter().enumerate() {
            let f = 1.0 / e.eigenvalues[k].sqrt();
            for r in 0..n {
                x[(r, c)] = e.eigenvectors[(r, k)] * f;
            }
        }
        x
    }
}

/// Eigenvalues (ascending) and eigenvectors of a symmetric matrix, with each
/// pair checked by its residual (nalgebra's solver was seen to mis-pair
/// eigenvalues and eigenvectors; see
/// [`crate::electronic::qc::response::davidson::symmetric_eigen`]).
pub fn sorted_eigen(m: &DMatrix<f64>) -> (Vec<f64>, DMatrix<f64>) {
    crate::electronic::qc::response::davidson::symmetric_eigen(m)
}

/// Orbital energies and AO coefficients of an AO Fock matrix in the
/// orthonormal basis of X.
pub fn diagonalize_in(f_ao: &DMatrix<f64>, x: &DMatrix<f64>) -> (Vec<f64>, DMatrix<f64>) {
    let fp = x.transpose() * f_ao * x;
    let (e, c) = sorted_eigen(&fp);
    (e, x * c)
}

fn symmetrize(m: &mut DMatrix<f64>) {
    let t = m.transpose();
    *m += t;
    *m *= 0.5;
}

/// Density of the first `n` columns of `c`.
pub(crate) fn occupied_density(c: &DMatrix<f64>, n: usize) -> DMatrix<f64> {
    let co = c.columns(0, n);
    co * co.transpose()
}

/// <S²> of a single determinant.
pub fn spin_squared(
    electrons: Electrons,
    c_alpha: &DMatrix<f64>,
    c_beta: &DMatrix<f64>,
    s: &DMatrix<f64>,
) -> f64 {
    let sz = 0.5 * (electrons.alpha as f64 - electrons.beta as f64);
    let ca = c_alpha.columns(0, electrons.alpha);
    let cb = c_beta.columns(0, electrons.beta);
    let m = ca.transpose() * s * cb;
    sz * (sz + 1.0) + electrons.beta as f64 - m.norm_squared()
}

/// The orthonormal-basis quantities of one iteration.
struct Stage {
    level_shift: f64,
    damping: f64,
    diis: bool,
}

const STAGES: [Stage; 3] = [
    Stage {
        level_shift: 0.0,
        damping: 0.0,
        diis: true,
    },
    Stage {
        level_shift: 0.3,
        damping: 0.0,
        diis: true,
    },
    Stage {
        level_shift: 1.0,
        damping: 0.5,
        diis: false,
    },
];

/// Run the SCF with the potential `builder` (Hartree–Fock or Kohn–Sham).
/// Progress is logged at `debug` level per iteration.
pub fn run(
    basis: &BasisSet,
    electrons: Electrons,
    reference: Reference,
    builder: &mut dyn FockBuilder,
    guess: &Guess,
    opts: &ScfOptions,
) -> Result<ScfResult, ScfError> {
    if reference == Reference::Restricted && electrons.alpha != electrons.beta {
        return Err(ScfError::Electrons(format!(
            "a restricted closed-shell calculation needs equal α and β electrons, got {} and {}",
            electrons.alpha, electrons.beta
        )));
    }
    let s = integrals::overlap(basis);
    let h = integrals::core_hamiltonian(basis);
    let e_nuc = integrals::nuclear_repulsion(basis);
    let x = orthogonalizer(&s, opts.linear_dependence);
    let nmo = x.ncols();
    for (n, spin) in [(electrons.alpha, "alpha"), (electrons.beta, "beta")] {
        if n > nmo {
            return Err(ScfError::TooFewOrbitals {
                electrons: n,
                spin,
                orbitals: nmo,
            });
        }
    }
    let nbf = basis.nbf;
    // S X maps AO densities to orthonormal ones: D' = (SX)ᵀ D (SX).
    let sx = &s * &x;
    let to_ortho = |d: &DMatrix<f64>| sx.transpose() * d * &sx;
    let restricted = reference == Reference::Restricted;

    // Initial densities.
    let (mut da, mut db) = match guess {
        Guess::Core => {
            let da = guess::core_density(&h, &x, electrons.alpha);
            let db = guess::core_density(&h, &x, electrons.beta);
            (da, db)
        }
        Guess::AtomicSuperposition => {
            let d = guess::atomic_superposition(basis) * 0.5;
            (d.clone(), d)
        }
        Guess::Densities { alpha, beta } => {
            if alpha.shape() != (nbf, nbf) || beta.shape() != (nbf, nbf) {
                return Err(ScfError::Guess(format!(
                    "densities of shape {:?} and {:?} do not fit {nbf} basis functions",
                    alpha.shape(),
                    beta.shape()
                )));
            }
            (alpha.clone(), beta.clone())
        }
        Guess::Orbitals { alpha, beta } => {
            if alpha.nrows() != nbf || beta.nrows() != nbf {
                return Err(ScfError::Guess(format!(
                    "orbitals with {} and {} rows do not fit {nbf} basis functions",
                    alpha.nrows(),
                    beta.nrows()
                )));
            }
            if alpha.ncols() < electrons.alpha || beta.ncols() < electrons.beta {
                return Err(ScfError::Guess(format!(
                    "{} α and {} β guess orbitals for {} α and {} β electrons",
                    alpha.ncols(),
                    beta.ncols(),
                    electrons.alpha,
                    electrons.beta
                )));
            }
            let ca = guess::reorthonormalize(&alpha.columns(0, electrons.alpha).into_owned(), &s)
                .ok_or_else(|| {
                ScfError::Guess("the α guess orbitals became linearly dependent".into())
            })?;
            let cb = if electrons.beta == 0 {
                DMatrix::zeros(nbf, 0)
            } else {
                guess::reorthonormalize(&beta.columns(0, electrons.beta).into_owned(), &s)
                    .ok_or_else(|| {
                        ScfError::Guess("the β guess orbitals became linearly dependent".into())
                    })?
            };
            (&ca * ca.transpose(), &cb * cb.transpose())
        }
    };
    if restricted {
        let d = (&da + &db) * 0.5;
        da = d.clone();
        db = d;
    }

    let mut diis = Diis::new(opts.diis_size);
    let mut history: Vec<IterationRecord> = Vec::new();
    let mut e_prev = f64::NAN;
    let mut stage = 0usize;
    let mut stage_start = 1usize;
    let mut stage_start_gradient = f64::INFINITY;
    let mut previous_fock: Option<Vec<DMatrix<f64>>> = None;
    let mut last: Option<(f64, fock::TwoElectronTerms, f64)> = None;
    let mut converged = false;
    let mut orbitals: Option<Orbitals> = None;

    for it in 1..=opts.max_iterations {
        let terms = builder.build(&da, &db, restricted, it == 1)?;
        let fa = &h + &terms.g_alpha;
        let fb = &h + &terms.g_beta;
        let one = (&da + &db).dot(&h);
        let energy = one + terms.energy() + e_nuc;
        if !energy.is_finite() || fa.iter().chain(fb.iter()).any(|v| !v.is_finite()) {
            return Err(ScfError::NonFinite { iteration: it });
        }
        // Orthonormal-basis Fock matrices and orbital gradients.
        let fa_o = x.transpose() * &fa * &x;
        let fb_o = x.transpose() * &fb * &x;
        let pa = to_ortho(&da);
        let pb = to_ortho(&db);
        let (focks, errors): (Vec<DMatrix<f64>>, Vec<DMatrix<f64>>) = match reference {
            Reference::Restricted => {
                let e = &fa_o * &pa - &pa * &fa_o;
                (vec![fa_o.clone()], vec![e])
            }
            Reference::Unrestricted => {
                let ea = &fa_o * &pa - &pa * &fa_o;
                let eb = &fb_o * &pb - &pb * &fb_o;
                (vec![fa_o.clone(), fb_o.clone()], vec![ea, eb])
            }
            Reference::RestrictedOpen => {
                let fc = (&fa_o + &fb_o) * 0.5;
                let id = DMatrix::<f64>::identity(nmo, nmo);
                let p_c = pb.clone();
                let p_o = &pa - &pb;
                let p_v = &id - &pa;
                let mut co = &p_c * (&fb_o - &fc) * &p_o;
                let mut ov = &p_o * (&fa_o - &fc) * &p_v;
                co += co.transpose();
                ov += ov.transpose();
                let mut feff = &fc + co + ov;
                symmetrize(&mut feff);
                let pt = &pa + &pb;
                let e = &feff * &pt - &pt * &feff;
                (vec![feff], vec![e])
            }
        };
        let gradient = errors.iter().map(|e| e.amax()).fold(0.0, f64::max);
        let delta = energy - e_prev;
        let st = &STAGES[stage];
        let use_diis = st.diis || gradient < 1e-3;
        let damping = if use_diis && !st.diis {
            0.0
        } else {
            st.damping
        };
        let record = IterationRecord {
            iteration: it,
            energy,
            delta_energy: if it == 1 { 0.0 } else { delta },
            gradient,
            diis: if use_diis {
                (diis.len() + 1).min(opts.diis_size.max(2))
            } else {
                0
            },
            level_shift: st.level_shift,
            damping,
        };
        tracing::debug!("scf {record}");
        history.push(record);
        last = Some((energy, terms, one));
        if it > 1 && delta.abs() < opts.energy_tolerance && gradient < opts.gradient_tolerance {
            converged = true;
            // Canonical orbitals of the final Fock matrices (no shift, no DIIS).
            orbitals = Some(canonical_orbitals(&focks, &x));
            break;
        }
        e_prev = energy;
        // Fallback stages.
        if it == stage_start {
            stage_start_gradient = gradient;
        } else if stage + 1 < STAGES.len()
            && it - stage_start >= opts.stage_iterations
            && gradient > 0.1 * stage_start_gradient
        {
            stage += 1;
            stage_start = it + 1;
            diis.clear();
            tracing::debug!(
                "scf: no progress, switching to fallback stage {}",
                stage + 1
            );
        }
        let mut new_focks = if use_diis {
            diis.extrapolate(focks, errors)
        } else {
            focks
        };
        if damping > 0.0 {
            if let Some(prev) = &previous_fock {
                for (f, p) in new_focks.iter_mut().zip(prev) {
                    *f = &*f * (1.0 - damping) + p * damping;
                }
            }
        }
        previous_fock = Some(new_focks.clone());
        let shift = st.level_shift;
        if shift > 0.0 {
            let id = DMatrix::<f64>::identity(nmo, nmo);
            match reference {
                Reference::Restricted => new_focks[0] += (&id - &pa) * shift,
                Reference::Unrestricted => {
                    new_focks[0] += (&id - &pa) * shift;
                    new_focks[1] += (&id - &pb) * shift;
                }
                Reference::RestrictedOpen => {
                    new_focks[0] += (&id - &pa) * shift + (&pa - &pb) * (0.5 * shift)
                }
            }
        }
        let (ea, ca, eb, cb) = canonical_orbitals(&new_focks, &x);
        da = occupied_density(&ca, electrons.alpha);
        db = occupied_density(&cb, electrons.beta);
        if restricted {
            db = da.clone();
        }
        orbitals = Some((ea, ca, eb, cb));
    }
    let iterations = history.len();
    if !converged {
        let keep = history.len().saturating_sub(opts.history_length);
        return Err(ScfError::NotConverged {
            iterations,
            history: history[keep..].to_vec(),
        });
    }
    let (energy, terms, one) = last.expect("at least one iteration");
    let (ea, ca, eb, cb) = orbitals.expect("set on convergence");
    let s_squared = spin_squared(electrons, &ca, &cb, &s);
    Ok(ScfResult {
        reference,
        electrons,
        energy,
        nuclear_repulsion: e_nuc,
        one_electron: one,
        coulomb: terms.coulomb,
        exchange: terms.exchange,
        xc: terms.xc,
        grid_electrons: terms.grid_electrons,
        orbital_energies_alpha: ea,
        orbital_energies_beta: eb,
        orbitals_alpha: ca,
        orbitals_beta: cb,
        fock_alpha: &h + &terms.g_alpha,
        fock_beta: &h + &terms.g_beta,
        density_alpha: da,
        density_beta: db,
        s_squared,
        iterations,
        history,
        in_core: builder.in_core(),
    })
}

/// α energies, α orbitals, β energies, β orbitals.
type Orbitals = (Vec<f64>, DMatrix<f64>, Vec<f64>, DMatrix<f64>);

/// Diagonalise one (restricted) or two (unrestricted) orthonormal-basis Fock
/// matrices; returns α and β energies and AO coefficients.
fn canonical_orbitals(focks: &[DMatrix<f64>], x: &DMatrix<f64>) -> Orbitals {
    let (ea, ca) = sorted_eigen(&focks[0]);
    let ca = x * ca;
    if focks.len() == 2 {
        let (eb, cb) = sorted_eigen(&focks[1]);
        (ea, ca, eb, x * cb)
    } else {
        (ea.clone(), ca.clone(), ea, ca)
    }
}

/// Hartree–Fock with the default options of the integral engine.
pub fn hartree_fock(
    basis: &BasisSet,
    electrons: Electrons,
    reference: Reference,
    guess: &Guess,
    opts: &ScfOptions,
    jk: JkOptions,
) -> Result<ScfResult, ScfError> {
    let mut builder = HartreeFock {
        engine: JkEngine::new(basis, jk),
        exchange_fraction: 1.0,
    };
    run(basis, electrons, reference, &mut builder, guess, opts)
}

/// Sum of nuclear charges of a basis' molecule (for [`Electrons`]).
pub fn nuclear_charge(basis: &BasisSet) -> usize {
    basis.nuclei.iter().map(|(z, _)| z.round() as usize).sum()
}
