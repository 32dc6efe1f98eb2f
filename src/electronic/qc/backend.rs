//! The built-in quantum chemistry as a dynamics back end: MRSF-TDDFT
//! singlets S0 … S(n−1) of a molecule, from a triplet ROKS (or ROHF)
//! reference, at every geometry the engine asks for.
//!
//! One call at a new geometry runs:
//!
//! 1. the ROKS SCF, started from the orbitals of the previous geometry
//!    (superposition of atomic densities at the first one);
//! 2. the MRSF response for the tracked singlets ([`response`]);
//! 3. the reference-character check against the previous geometry
//!    ([`response::tracking`]): a change of the open-shell pair is a warning in the
//!    diagnostics (the published limitation of triplet-reference methods);
//! 4. when asked, the state overlaps with the previous geometry
//!    ([`response::overlap::state_overlaps`], exact, raw phases), the gradients and
//!    the coupling vectors.
//!
//! # Gradients and coupling vectors
//! Gradients are analytic by default ([`GradientMethod::Analytic`]: the
//! Z-vector gradients of [`mrsf_state_gradients`](super::gradient::mrsf::mrsf_state_gradients), computed for the states
//! the engine asks for, once per geometry and state), or central
//! differences of the response energies ([`GradientMethod::Numerical`]):
//! one set of 6N displaced calculations gives the gradients of *all*
//! tracked states. Nonadiabatic coupling vectors, asked for only at hop
//! attempts, are finite differences of state overlaps at the same kind of
//! displaced geometries (reused when the numerical gradients made them),
//!
//! ```text
//!   d_IJ,k ≈ [<ψ_I(R)|ψ_J(R + h e_k)> − <ψ_I(R)|ψ_J(R − h e_k)>] / 2h,
//! ```
//!
//! with the phase of each displaced state aligned to its undisplaced self
//! and the result antisymmetrised (common practice), in the raw phases of
//! the states at R.
//!
//! # Exact restart
//! The snapshot holds the orbitals and state amplitudes of the last
//! geometry. The next geometry's SCF guess and overlaps are derived from
//! that record in the running and the restored back end alike, so a resumed
//! trajectory repeats the one that never stopped bit for bit (on the same
//! machine and thread count).

use super::basis::BasisSet;
use super::gradient::mrsf::{mrsf_state_gradients_reusing, ZVectorOptions};
use super::gradient::numerical::ScfEnergy;
use super::gradient::GradientError;
use super::response::overlap::{state_overlaps, StateVectors};
use super::response::tracking::ReferenceCharacter;
use super::response::{self, ExcitedStates, Method, StateRequest};
use super::scf::fock::JkEngine;
use super::scf::{Guess, ScfResult};
use crate::electronic::{
    check_geometry, Backend, BackendError, BackendInfo, Couplings, Diagnostics, Request, Results,
    Snapshot,
};
use nalgebra::DMatrix;
use rayon::prelude::*;
use std::sync::Arc;

/// How state gradients are obtained.
#[derive(Clone, Debug, PartialEq)]
pub enum GradientMethod {
    /// Central differences of the response energies with this step (bohr).
    Numerical {
        /// Displacement h (bohr).
        step: f64,
    },
    /// Analytic MRSF gradients ([`mrsf_state_gradients`](super::gradient::mrsf::mrsf_state_gradients)), one state at a
    /// time as the engine asks; coupling vectors still come from displaced
    /// state overlaps with `coupling_step` (bohr), at hop attempts only.
    Analytic {
        /// Z-vector solver options.
        zvector: ZVectorOptions,
        /// Displacement of the coupling vectors (bohr).
        coupling_step: f64,
    },
}

impl GradientMethod {
    /// The displacement of finite differences (gradients or couplings).
    pub fn step(&self) -> f64 {
        match self {
            GradientMethod::Numerical { step } => *step,
            GradientMethod::Analytic { coupling_step, .. } => *coupling_step,
        }
    }
}

/// Everything that defines the electronic structure of a molecular run.
#[derive(Clone, Debug, PartialEq)]
pub struct MolecularSpec {
    /// Molecule, basis, electrons (the triplet reference), potential and
    /// solver options; the molecule's positions are the reference geometry.
    pub calculation: ScfEnergy,
    /// Tracked singlets S0 … S(n−1).
    pub singlets: usize,
    /// Gradients.
    pub gradients: GradientMethod,
    /// Short description ("MRSF-TDDFT BH&HLYP/6-31G").
    pub label: String,
}

impl MolecularSpec {
    /// Masses per Cartesian coordinate (electron masses).
    pub fn masses(&self) -> Vec<f64> {
        self.calculation
            .molecule
            .masses_me()
            .iter()
            .flat_map(|&m| [m, m, m])
            .collect()
    }
    /// The reference geometry as flat Cartesian coordinates (bohr).
    pub fn reference_coordinates(&self) -> Vec<f64> {
        self.calculation
            .molecule
            .atoms
            .iter()
            .flat_map(|a| a.position_bohr)
            .collect()
    }
}

/// One geometry's electronic structure.
struct Point {
    q: Vec<f64>,
    basis: BasisSet,
    scf: ScfResult,
    excited: ExcitedStates,
    vectors: StateVectors,
    /// Gradients of the tracked states computed so far.
    gradients: Vec<Option<Vec<f64>>>,
    /// Displaced calculations (coordinate k: 2k = +h, 2k+1 = −h).
    displaced: Option<Vec<(BasisSet, StateVectors)>>,
    /// The J/K engine of the SCF and response here, for the analytic
    /// gradients (its integral store is reused).
    engine: Option<JkEngine>,
}

/// The record of the last geometry that the next one builds on.
struct Previous {
    q: Vec<f64>,
    basis: BasisSet,
    vectors: StateVectors,
}

/// Wall-clock time spent in each part of the back end (seconds), summed
/// over all calls: for benchmarks and logs.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Timings {
    /// SCF at the geometries the engine asked for.
    pub scf: f64,
    /// MRSF response at those geometries.
    pub response: f64,
    /// State overlaps with the previous geometry (and the character check).
    pub overlaps: f64,
    /// The displaced calculations of gradients (SCF + response each).
    pub gradients: f64,
    /// Coupling vectors from the displaced states.
    pub couplings: f64,
    /// New geometries computed.
    pub geometries: usize,
}

impl Timings {
    /// Sum of all parts.
    pub fn total(&self) -> f64 {
        self.scf + self.response + self.overlaps + self.gradients + self.couplings
    }
}

/// MRSF-TDDFT singlets of one molecule (one instance per trajectory).
pub struct MrsfBackend {
    spec: Arc<MolecularSpec>,
    masses: Vec<f64>,
    current: Option<Point>,
    previous: Option<Previous>,
    results: Results,
    timings: Timings,
}

fn positions(q: &[f64]) -> Vec<[f64; 3]> {
    q.chunks(3).map(|c| [c[0], c[1], c[2]]).collect()
}

fn failed(e: impl std::fmt::Display) -> BackendError {
    BackendError::Failed(e.to_string())
}

/// The SCF guess from a record's orbitals: occupied α and β columns.
fn guess_from(vectors: &StateVectors, calc: &ScfEnergy) -> Guess {
    let (na, nb) = (calc.electrons.alpha, calc.electrons.beta);
    Guess::Orbitals {
        alpha: vectors.orbitals.columns(0, na).into_owned(),
        beta: vectors.orbitals.columns(0, nb).into_owned(),
    }
}

impl MrsfBackend {
    /// A back end for `spec`.
    pub fn new(spec: Arc<MolecularSpec>) -> MrsfBackend {
        let masses = spec.masses();
        MrsfBackend {
            spec,
            masses,
            current: None,
            previous: None,
            results: Results::default(),
            timings: Timings::default(),
        }
    }

    /// Time spent so far, by part.
    pub fn timings(&self) -> Timings {
        self.timings
    }

    fn n_dof(&self) -> usize {
        self.masses.len()
    }

    /// SCF and response at `q` from `guess`.
    fn solve(
        spec: &MolecularSpec,
        q: &[f64],
        guess: &Guess,
    ) -> Result<(BasisSet, ScfResult, ExcitedStates), BackendError> {
        Self::solve_timed(spec, q, guess).map(|(b, s, x, _, _)| (b, s, x))
    }

    /// As [`Self::solve`], with the SCF and response times (s).
    fn solve_timed(
        spec: &MolecularSpec,
        q: &[f64],
        guess: &Guess,
    ) -> Result<(BasisSet, ScfResult, ExcitedStates, JkEngine, [f64; 2]), BackendError> {
        let calc = &spec.calculation;
        let t0 = std::time::Instant::now();
        let basis = calc.basis_at(&positions(q)).map_err(failed)?;
        let (scf, mut engine, cx) = calc.scf_with_engine(&basis, guess).map_err(failed)?;
        let t1 = std::time::Instant::now();
        let request = StateRequest {
            method: Method::Mrsf,
            singlets: spec.singlets,
            triplets: 0,
        };
        let excited =
            response::excited_states(&basis, &scf, cx, &mut engine, request, &calc.davidson)
                .map_err(|e| BackendError::Failed(format!("MRSF response: {e}")))?;
        if excited.states.len() < spec.singlets {
            return Err(BackendError::Failed(format!(
                "{} singlets computed, {} tracked",
                excited.states.len(),
                spec.singlets
            )));
        }
        let times = [(t1 - t0).as_secs_f64(), t1.elapsed().as_secs_f64()];
        Ok((basis, scf, excited, engine, times))
    }

    fn energies(excited: &ExcitedStates, n: usize) -> Vec<f64> {
        excited.states.iter().take(n).map(|s| s.energy).collect()
    }

    /// A new geometry: SCF, response, character check, overlaps.
    fn new_point(&mut self, q: &[f64]) -> Result<(), BackendError> {
        if let Some(p) = self.current.take() {
            self.previous = Some(Previous {
                q: p.q,
                basis: p.basis,
                vectors: p.vectors,
            });
        }
        let spec = self.spec.clone();
        let guess = match &self.previous {
            Some(prev) => guess_from(&prev.vectors, &spec.calculation),
            None => Guess::AtomicSuperposition,
        };
        // A warm start that does not converge (the previous reference can
        // stop being a solution when two triplet solutions meet) is retried
        // once from the atomic guess, with a warning: the state overlaps and
        // the character check below say whether the states stayed continuous,
        // and the engine's energy-drift limit catches a jump.
        let mut restarted = None;
        let solved = match Self::solve_timed(&spec, q, &guess) {
            Err(BackendError::Failed(why)) if self.previous.is_some() && why.starts_with("SCF") => {
                let first = why
                    .lines()
                    .next()
                    .unwrap_or("")
                    .trim_end_matches(':')
                    .trim_end_matches("; last iterations")
                    .to_string();
                match Self::solve_timed(&spec, q, &Guess::AtomicSuperposition) {
                    Ok(x) => {
                        restarted = Some(format!("the reference SCF started from the previous orbitals failed ({first}); converged from the atomic guess instead"));
                        Ok(x)
                    }
                    Err(again) => Err(BackendError::Failed(format!(
                        "{why}\n(retried from the atomic guess: {again})"
                    ))),
                }
            }
            other => other,
        };
        let (basis, scf, excited, engine, [t_scf, t_response]) = solved?;
        self.timings.scf += t_scf;
        self.timings.response += t_response;
        self.timings.geometries += 1;
        let t_overlaps = std::time::Instant::now();
        let scf_iterations = scf.iterations;
        let n = spec.singlets;
        let indices: Vec<usize> = (0..n).collect();
        let vectors = StateVectors::from_states(&excited, &indices).map_err(failed)?;
        let mut diagnostics = Diagnostics {
            iterations: Some(scf_iterations as u32),
            response_iterations: excited.solver.first().map(|s| s.iterations as u32),
            spin_squared: Some(excited.states.iter().take(n).map(|s| s.s_squared).collect()),
            warnings: restarted.into_iter().collect(),
        };
        if let Some(prev) = &self.previous {
            let nc = vectors.n_core;
            let before = ReferenceCharacter {
                open_shells: prev.vectors.orbitals.columns(nc, 2).into_owned(),
            };
            let now = ReferenceCharacter {
                open_shells: vectors.orbitals.columns(nc, 2).into_owned(),
            };
            let check = now.compare(&basis, &before, &prev.basis).map_err(failed)?;
            if check.changed {
                diagnostics.warnings.push(format!(
                    "the reference triplet changed character (open-shell overlap σ₂ = {:.3})",
                    check.singular_values[1]
                ));
            }
        }
        self.results = Results {
            energies: Self::energies(&excited, n),
            diagnostics,
            ..Results::default()
        };
        self.timings.overlaps += t_overlaps.elapsed().as_secs_f64();
        self.current = Some(Point {
            q: q.to_vec(),
            basis,
            scf,
            excited,
            vectors,
            gradients: vec![None; n],
            displaced: None,
            engine: Some(engine),
        });
        Ok(())
    }

    /// The 6N displaced calculations: the displaced states (for coupling
    /// vectors) and, with numerical gradients, the gradients of all tracked
    /// states.
    fn displacements(&mut self) -> Result<(), BackendError> {
        let step = self.spec.gradients.step();
        let numerical = matches!(self.spec.gradients, GradientMethod::Numerical { .. });
        let spec = self.spec.clone();
        let point = self.current.as_mut().expect("a current point");
        if point.displaced.is_some() {
            return Ok(());
        }
        let started = std::time::Instant::now();
        let n = spec.singlets;
        let guess = guess_from(&point.vectors, &spec.calculation);
        let indices: Vec<usize> = (0..n).collect();
        let jobs: Vec<(usize, f64)> = (0..point.q.len())
            .flat_map(|k| [(k, step), (k, -step)])
            .collect();
        let base = &point.q;
        let done: Vec<Result<(Vec<f64>, BasisSet, StateVectors), BackendError>> = jobs
            .par_iter()
            .map(|&(k, h)| {
                let mut q = base.clone();
                q[k] += h;
                let (basis, _, excited) = Self::solve(&spec, &q, &guess).map_err(|e| {
                    BackendError::Failed(format!(
                        "displaced geometry (coordinate {k}, {h:+e} bohr): {e}"
                    ))
                })?;
                let vectors = StateVectors::from_states(&excited, &indices).map_err(failed)?;
                Ok((Self::energies(&excited, n), basis, vectors))
            })
            .collect();
        let mut energies = Vec::with_capacity(done.len());
        let mut displaced = Vec::with_capacity(done.len());
        for d in done {
            let (e, b, v) = d?;
            energies.push(e);
            displaced.push((b, v));
        }
        if numerical {
            let dof = point.q.len();
            for (s, g) in point.gradients.iter_mut().enumerate() {
                *g = Some(
                    (0..dof)
                        .map(|k| (energies[2 * k][s] - energies[2 * k + 1][s]) / (2.0 * step))
                        .collect(),
                );
            }
        }
        point.displaced = Some(displaced);
        self.timings.gradients += started.elapsed().as_secs_f64();
        Ok(())
    }

    /// Gradients of `states` at the current point (computed once each).
    fn gradients(&mut self, states: &[usize]) -> Result<(), BackendError> {
        let missing: Vec<usize> = {
            let point = self.current.as_ref().expect("a current point");
            let mut m: Vec<usize> = states
                .iter()
                .copied()
                .filter(|&s| point.gradients[s].is_none())
                .collect();
            m.dedup();
            m
        };
        if missing.is_empty() {
            return Ok(());
        }
        match &self.spec.gradients {
            GradientMethod::Numerical { .. } => self.displacements(),
            GradientMethod::Analytic { zvector, .. } => {
                let started = std::time::Instant::now();
                let calc = &self.spec.calculation;
                let point = self.current.as_mut().expect("a current point");
                let failed =
                    |e: GradientError| BackendError::Failed(format!("analytic MRSF gradient: {e}"));
                // The engine of the SCF and response at this point (a new
                // one if it was given up, e.g. after a restore).
                let engine = point
                    .engine
                    .take()
                    .unwrap_or_else(|| JkEngine::new(&point.basis, calc.jk.clone()));
                let (g, engine) = mrsf_state_gradients_reusing(
                    &point.basis,
                    &point.scf,
                    &point.excited,
                    &missing,
                    &calc.potential,
                    &calc.jk,
                    engine,
                    zvector,
                )
                .map_err(failed)?;
                point.engine = Some(engine);
                for (s, gs) in missing.iter().zip(g) {
                    point.gradients[*s] = Some(gs.into_iter().flatten().collect());
                }
                self.timings.gradients += started.elapsed().as_secs_f64();
                Ok(())
            }
        }
    }

    fn couplings(&self) -> Result<Couplings, BackendError> {
        let step = self.spec.gradients.step();
        let point = self.current.as_ref().expect("a current point");
        let displaced = point.displaced.as_ref().expect("displacements done");
        let n = self.spec.singlets;
        let dof = point.q.len();
        let overlaps: Vec<DMatrix<f64>> = displaced
            .par_iter()
            .map(|(b, v)| {
                let mut s = state_overlaps(&point.vectors, &point.basis, v, b).map_err(failed)?;
                for j in 0..n {
                    if s[(j, j)] < 0.0 {
                        s.column_mut(j).neg_mut();
                    }
                }
                Ok(s)
            })
            .collect::<Result<_, BackendError>>()?;
        let mut c = Couplings::zeros(n, dof);
        for i in 0..n {
            for j in i + 1..n {
                let d = c.upper_mut(i, j);
                for k in 0..dof {
                    let (plus, minus) = (&overlaps[2 * k], &overlaps[2 * k + 1]);
                    let dij = (plus[(i, j)] - minus[(i, j)]) / (2.0 * step);
                    let dji = (plus[(j, i)] - minus[(j, i)]) / (2.0 * step);
                    d[k] = 0.5 * (dij - dji);
                }
            }
        }
        Ok(c)
    }
}

impl Backend for MrsfBackend {
    fn info(&self) -> BackendInfo {
        BackendInfo {
            name: self.spec.label.clone(),
            n_states: self.spec.singlets,
            masses: self.masses.clone(),
        }
    }

    fn compute(&mut self, q: &[f64], request: &Request) -> Result<&Results, BackendError> {
        check_geometry(q, self.n_dof())?;
        let n = self.spec.singlets;
        if let Some(&state) = request.gradients.iter().find(|&&s| s >= n) {
            return Err(BackendError::NoSuchState { state, n_states: n });
        }
        let same = self.current.as_ref().is_some_and(|p| p.q.as_slice() == q);
        if !same {
            self.new_point(q)?;
            if request.overlaps {
                if let Some(prev) = &self.previous {
                    let t = std::time::Instant::now();
                    let p = self.current.as_ref().expect("just computed");
                    let s = state_overlaps(&prev.vectors, &prev.basis, &p.vectors, &p.basis)
                        .map_err(failed)?;
                    self.results.overlaps = Some(s);
                    self.timings.overlaps += t.elapsed().as_secs_f64();
                }
            }
        }
        self.gradients(&request.gradients)?;
        if request.couplings && self.results.couplings.is_none() {
            self.displacements()?;
            let t = std::time::Instant::now();
            self.results.couplings = Some(self.couplings()?);
            self.timings.couplings += t.elapsed().as_secs_f64();
        }
        let point = self.current.as_ref().expect("a current point");
        for &s in &request.gradients {
            if self.results.gradient(s).is_none() {
                let g = point.gradients[s].clone().expect("computed above");
                self.results.gradients.push((s, g));
            }
        }
        if request.transition_dipoles && self.results.transition_dipoles.is_none() {
            let x = &point.excited;
            let dipoles = (0..n)
                .map(|i| x.transition_dipole(0, i))
                .collect::<Result<Vec<_>, _>>()
                .map_err(failed)?;
            self.results.transition_dipoles = Some(dipoles);
        }
        Ok(&self.results)
    }

    fn snapshot(&self) -> Snapshot {
        let (q, v) = match (&self.current, &self.previous) {
            (Some(p), _) => (p.q.clone(), &p.vectors),
            (None, Some(p)) => (p.q.clone(), &p.vectors),
            (None, None) => {
                return Snapshot {
                    backend: self.spec.label.clone(),
                    geometry: Vec::new(),
                    reals: Vec::new(),
                }
            }
        };
        let c = &v.orbitals;
        let mut reals = vec![
            c.nrows() as f64,
            c.ncols() as f64,
            v.n_core as f64,
            v.len() as f64,
        ];
        reals.extend_from_slice(c.as_slice());
        for (xp, xm) in &v.amplitudes {
            reals.extend_from_slice(xp.as_slice());
            reals.extend_from_slice(xm.as_slice());
        }
        Snapshot {
            backend: self.spec.label.clone(),
            geometry: q,
            reals,
        }
    }

    fn restore(&mut self, snapshot: &Snapshot) -> Result<(), BackendError> {
        if snapshot.backend != self.spec.label {
            return Err(BackendError::Snapshot(format!(
                "written by \"{}\", this run uses \"{}\"",
                snapshot.backend, self.spec.label
            )));
        }
        self.current = None;
        self.results = Results::default();
        if snapshot.geometry.is_empty() {
            self.previous = None;
            return Ok(());
        }
        check_geometry(&snapshot.geometry, self.n_dof())
            .map_err(|e| BackendError::Snapshot(e.to_string()))?;
        let r = &snapshot.reals;
        let bad = |what: &str| BackendError::Snapshot(format!("electronic record: {what}"));
        if r.len() < 4 || r[..4].iter().any(|x| x.fract() != 0.0 || *x < 0.0) {
            return Err(bad("malformed header"));
        }
        let (nbf, nmo, nc, ns) = (r[0] as usize, r[1] as usize, r[2] as usize, r[3] as usize);
        if nc + 2 > nmo || ns != self.spec.singlets {
            return Err(bad("orbital or state counts do not fit this run"));
        }
        let (nocc, nvir) = (nc + 2, nmo - nc);
        let need = 4 + nbf * nmo + 2 * ns * nocc * nvir;
        if r.len() != need {
            return Err(bad(&format!("{} numbers, {need} expected", r.len())));
        }
        let basis = self
            .spec
            .calculation
            .basis_at(&positions(&snapshot.geometry))
            .map_err(|e| bad(&e.to_string()))?;
        if basis.nbf != nbf {
            return Err(bad(&format!(
                "{nbf} basis functions recorded, the basis has {}",
                basis.nbf
            )));
        }
        let mut at = 4;
        let mut take = |rows: usize, cols: usize| {
            let m = DMatrix::from_column_slice(rows, cols, &r[at..at + rows * cols]);
            at += rows * cols;
            m
        };
        let orbitals = take(nbf, nmo);
        let amplitudes = (0..ns)
            .map(|_| (take(nocc, nvir), take(nocc, nvir)))
            .collect();
        self.previous = Some(Previous {
            q: snapshot.geometry.clone(),
            basis,
            vectors: StateVectors {
                n_core: nc,
                orbitals,
                amplitudes,
            },
        });
        Ok(())
    }
}
