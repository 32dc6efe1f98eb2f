//! Numerical nuclear gradients by central differences:
//! ∂E/∂x ≈ [E(x + h) − E(x − h)] / 2h, error O(h²) plus the energy noise
//! divided by 2h (common practice). With SCF energies converged to 1e−10 Eh
//! the default step h = 1e−3 bohr gives about 1e−7 Eh/bohr.
//!
//! The 6N displaced energies are independent and run in parallel (rayon);
//! [`ScfEnergy`] starts each displaced SCF from the occupied orbitals of the
//! reference geometry ([`Guess::Orbitals`]), which keeps the displaced
//! solutions on the same electronic state and saves iterations.
//!
//! # Noise of response energies
//! An SCF energy is variational in the orbitals, so its error is quadratic in
//! the residual orbital gradient; an MRSF state energy is not, and its error
//! is linear in it. With the default SCF threshold (1e−7) the MRSF energies
//! carry ~1e−9 Eh of noise, i.e. ~1e−6 Eh/bohr in a gradient with h = 1e−3
//! (measured: the translational sum of an S1 gradient of triplet methylene
//! was 3.8e−6 with an SCF threshold of 1e−8 and h = 5e−4 bohr, and 5e−9
//! with 1e−10 and h = 1e−3). For
//! [`Target::Mrsf`] use an SCF gradient threshold of 1e−10 and a Davidson
//! residual of 1e−8 (what `tests/gradients.rs` does).

use super::scf::{scf_gradient, Potential};
use super::GradientError;
use crate::chem::Molecule;
use crate::electronic::qc::basis::{BasisSet, BasisSetData, Harmonics};
use crate::electronic::qc::dft::ks::{KohnSham, KsOptions};
use crate::electronic::qc::integrals::JkOptions;
use crate::electronic::qc::response::{
    self, davidson::DavidsonOptions, ExcitedStates, Method, StateRequest,
};
use crate::electronic::qc::scf::fock::{HartreeFock, JkEngine};
use crate::electronic::qc::scf::{self, Electrons, Guess, Reference, ScfOptions, ScfResult};
use rayon::prelude::*;

/// Default central-difference step (bohr).
pub const DEFAULT_STEP: f64 = 1e-3;

const AXES: [&str; 3] = ["x", "y", "z"];

/// Central-difference gradient of `energy` at `positions` (bohr), per atom.
/// `energy` gets the displaced positions and returns the energy (Eh) or a
/// message; all 6N evaluations run in parallel.
pub fn central_differences<F>(
    positions: &[[f64; 3]],
    step: f64,
    energy: F,
) -> Result<Vec<[f64; 3]>, GradientError>
where
    F: Fn(&[[f64; 3]]) -> Result<f64, String> + Sync,
{
    let mut g = central_differences_many(positions, step, 1, |p| energy(p).map(|e| vec![e]))?;
    Ok(g.swap_remove(0))
}

/// Central differences of several energies from the same displaced
/// calculations (e.g. several excited states): `energies` returns `count`
/// values per geometry; the result has one gradient per value.
pub fn central_differences_many<F>(
    positions: &[[f64; 3]],
    step: f64,
    count: usize,
    energies: F,
) -> Result<Vec<Vec<[f64; 3]>>, GradientError>
where
    F: Fn(&[[f64; 3]]) -> Result<Vec<f64>, String> + Sync,
{
    if !(step.is_finite() && step > 0.0) {
        return Err(GradientError::Input(format!(
            "the finite-difference step must be positive, got {step}"
        )));
    }
    let n = positions.len();
    let jobs: Vec<(usize, f64)> = (0..3 * n).flat_map(|i| [(i, step), (i, -step)]).collect();
    let results: Vec<Result<Vec<f64>, GradientError>> = jobs
        .par_iter()
        .map(|&(i, h)| {
            let mut p = positions.to_vec();
            p[i / 3][i % 3] += h;
            let fail = |message: String| GradientError::Displacement {
                displacement: i,
                atom: i / 3,
                axis: AXES[i % 3],
                sign: if h > 0.0 { "+" } else { "−" },
                message,
            };
            let e = energies(&p).map_err(fail)?;
            if e.len() != count {
                return Err(fail(format!(
                    "{} energies returned, {count} expected",
                    e.len()
                )));
            }
            Ok(e)
        })
        .collect();
    let mut values = Vec::with_capacity(results.len());
    for r in results {
        values.push(r?);
    }
    let mut g = vec![vec![[0.0; 3]; n]; count];
    for i in 0..3 * n {
        for (s, gs) in g.iter_mut().enumerate() {
            gs[i / 3][i % 3] = (values[2 * i][s] - values[2 * i + 1][s]) / (2.0 * step);
        }
    }
    Ok(g)
}

/// Which energy of a calculation is differentiated.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Target {
    /// The SCF energy.
    Ground,
    /// An MRSF-TDDFT state of the (triplet ROHF/ROKS) reference, by label
    /// (`S0`, `S1`, …, `T1`, … as [`ExcitedStates::label`]), with the
    /// numbers of singlet and triplet roots to solve for.
    Mrsf {
        /// State label.
        label: String,
        /// Singlet roots.
        singlets: usize,
        /// Triplet roots.
        triplets: usize,
    },
}

/// Everything needed to compute an SCF (or MRSF state) energy at any
/// geometry of one molecule.
#[derive(Clone, Debug, PartialEq)]
pub struct ScfEnergy {
    /// The molecule (elements; positions are replaced per call).
    pub molecule: Molecule,
    /// Basis-set data.
    pub basis: BasisSetData,
    /// Harmonics override.
    pub harmonics: Option<Harmonics>,
    /// Electron counts.
    pub electrons: Electrons,
    /// Spin treatment.
    pub reference: Reference,
    /// Hartree–Fock or Kohn–Sham (functional and grid).
    pub potential: Potential,
    /// SCF options.
    pub scf: ScfOptions,
    /// Coulomb/exchange options.
    pub jk: JkOptions,
    /// Davidson options for MRSF targets.
    pub davidson: DavidsonOptions,
}

/// Result of one [`ScfEnergy::compute`].
#[derive(Clone, Debug)]
pub struct Computed {
    /// The basis at this geometry.
    pub basis: BasisSet,
    /// The converged SCF.
    pub scf: ScfResult,
    /// Excited states (MRSF targets only).
    pub excited: Option<ExcitedStates>,
    /// The target energy (Eh).
    pub energy: f64,
}

impl ScfEnergy {
    /// The basis at `positions` (bohr).
    pub fn basis_at(&self, positions: &[[f64; 3]]) -> Result<BasisSet, GradientError> {
        if positions.len() != self.molecule.len() {
            return Err(GradientError::Input(format!(
                "{} positions for a molecule of {} atoms",
                positions.len(),
                self.molecule.len()
            )));
        }
        let mut mol = self.molecule.clone();
        for (a, p) in mol.atoms.iter_mut().zip(positions) {
            a.position_bohr = *p;
        }
        Ok(BasisSet::new(&mol, &self.basis, self.harmonics)?)
    }

    /// The SCF at `basis` from `guess`, with the J/K engine the response
    /// reuses and the exact-exchange fraction.
    pub fn scf_with_engine(
        &self,
        basis: &BasisSet,
        guess: &Guess,
    ) -> Result<(ScfResult, JkEngine, f64), GradientError> {
        Ok(match &self.potential {
            Potential::HartreeFock => {
                let mut b = HartreeFock {
                    engine: JkEngine::new(basis, self.jk.clone()),
                    exchange_fraction: 1.0,
                };
                let r = scf::run(
                    basis,
                    self.electrons,
                    self.reference,
                    &mut b,
                    guess,
                    &self.scf,
                )?;
                (r, b.engine, 1.0)
            }
            Potential::KohnSham { functional, grid } => {
                let opts = KsOptions {
                    functional: functional.clone(),
                    grid: grid.clone(),
                    jk: self.jk.clone(),
                };
                let mut b = KohnSham::new(basis, self.reference, &opts)?;
                let cx = b.functional().exact_exchange();
                let r = scf::run(
                    basis,
                    self.electrons,
                    self.reference,
                    &mut b,
                    guess,
                    &self.scf,
                )?;
                (r, b.into_engine(), cx)
            }
        })
    }

    /// SCF (and, for an MRSF target, the excited states) at `positions`.
    pub fn compute(
        &self,
        positions: &[[f64; 3]],
        guess: &Guess,
        target: &Target,
    ) -> Result<Computed, GradientError> {
        self.compute_with_engine(positions, guess, target)
            .map(|r| r.0)
    }

    /// As [`ScfEnergy::compute`], also handing back the J/K engine of the
    /// SCF and response (for [`super::mrsf::mrsf_state_gradients_reusing`]).
    pub fn compute_with_engine(
        &self,
        positions: &[[f64; 3]],
        guess: &Guess,
        target: &Target,
    ) -> Result<(Computed, JkEngine), GradientError> {
        let basis = self.basis_at(positions)?;
        let (result, mut engine, cx) = self.scf_with_engine(&basis, guess)?;
        match target {
            Target::Ground => Ok((
                Computed {
                    energy: result.energy,
                    basis,
                    scf: result,
                    excited: None,
                },
                engine,
            )),
            Target::Mrsf {
                label,
                singlets,
                triplets,
            } => {
                let request = StateRequest {
                    method: Method::Mrsf,
                    singlets: *singlets,
                    triplets: *triplets,
                };
                let x = response::excited_states(
                    &basis,
                    &result,
                    cx,
                    &mut engine,
                    request,
                    &self.davidson,
                )
                .map_err(|e| GradientError::Response(e.to_string()))?;
                let energy = state_energy(&x, label)?;
                Ok((
                    Computed {
                        energy,
                        basis,
                        scf: result,
                        excited: Some(x),
                    },
                    engine,
                ))
            }
        }
    }

    /// Central-difference gradient of `target` at `positions`; every
    /// displaced SCF starts from the occupied orbitals of `reference` (an SCF
    /// at `positions`, or `None` to run one first).
    pub fn numerical_gradient(
        &self,
        positions: &[[f64; 3]],
        step: f64,
        target: &Target,
        reference: Option<&ScfResult>,
    ) -> Result<Vec<[f64; 3]>, GradientError> {
        let owned;
        let reference = match reference {
            Some(r) => r,
            None => {
                owned = self
                    .compute(positions, &Guess::AtomicSuperposition, &Target::Ground)?
                    .scf;
                &owned
            }
        };
        let guess = orbital_guess(reference);
        central_differences(positions, step, |p| {
            self.compute(p, &guess, target)
                .map(|c| c.energy)
                .map_err(|e| e.to_string())
        })
    }

    /// Central-difference gradients of several MRSF states (labels as
    /// [`ExcitedStates::label`]) from one set of displaced calculations with
    /// `singlets` and `triplets` roots; one gradient per label, in order.
    /// A label that is not among the computed states is
    /// [`GradientError::StateNotComputed`] (checked at `positions` first).
    pub fn numerical_state_gradients(
        &self,
        positions: &[[f64; 3]],
        step: f64,
        labels: &[&str],
        singlets: usize,
        triplets: usize,
    ) -> Result<Vec<Vec<[f64; 3]>>, GradientError> {
        let target = Target::Mrsf {
            label: labels.first().copied().unwrap_or("S0").to_string(),
            singlets,
            triplets,
        };
        let c = self.compute(positions, &Guess::AtomicSuperposition, &target)?;
        if let Some(x) = &c.excited {
            for l in labels {
                state_energy(x, l)?;
            }
        }
        let guess = orbital_guess(&c.scf);
        central_differences_many(positions, step, labels.len(), |p| {
            let c = self
                .compute(p, &guess, &target)
                .map_err(|e| e.to_string())?;
            let x = c.excited.as_ref().ok_or("no excited states computed")?;
            labels
                .iter()
                .map(|l| state_energy(x, l).map_err(|e| e.to_string()))
                .collect()
        })
    }

    /// SCF energy and analytic gradient at `positions` (ground state only).
    pub fn analytic_gradient(
        &self,
        positions: &[[f64; 3]],
        guess: &Guess,
    ) -> Result<(Computed, Vec<[f64; 3]>), GradientError> {
        let c = self.compute(positions, guess, &Target::Ground)?;
        let g = scf_gradient(&c.basis, &c.scf, &self.potential)?;
        Ok((c, g))
    }
}

/// The occupied orbitals of an SCF as the guess for a nearby geometry.
pub fn orbital_guess(r: &ScfResult) -> Guess {
    Guess::Orbitals {
        alpha: r.orbitals_alpha.columns(0, r.electrons.alpha).into_owned(),
        beta: r.orbitals_beta.columns(0, r.electrons.beta).into_owned(),
    }
}

/// Energy of the state labelled `label`, or [`GradientError::StateNotComputed`].
pub fn state_energy(x: &ExcitedStates, label: &str) -> Result<f64, GradientError> {
    let mut labels = Vec::new();
    for i in 0..x.states.len() {
        let l = x
            .label(i)
            .map_err(|e| GradientError::Response(e.to_string()))?;
        if l.eq_ignore_ascii_case(label) {
            return Ok(x.states[i].energy);
        }
        labels.push(l);
    }
    Err(GradientError::StateNotComputed {
        requested: label.to_string(),
        available: if labels.is_empty() {
            "none".into()
        } else {
            labels.join(", ")
        },
    })
}
