//! Collinear SF-TDA from the triplet reference (equations in the module
//! docs of [`super`](crate::electronic::qc::response)).

use super::davidson::{self, DavidsonOptions, Operator};
use super::kernel::{explicit_a, to_matrix, to_vector, Kernel};
use super::properties::{dominant, fix_phase, ExcitedState, ExcitedStates, Method, StateSpin};
use super::ResponseError;
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::scf::fock::JkEngine;
use crate::electronic::qc::scf::ScfResult;
use nalgebra::{DMatrix, DVector};

/// Collinear SF-TDA on one triplet reference.
pub struct SpinFlip<'e> {
    kernel: Kernel,
    engine: &'e mut JkEngine,
}

/// The SF operator for the eigensolver.
struct SfOperator<'a> {
    kernel: &'a mut Kernel,
    engine: &'a mut JkEngine,
}

impl Operator for SfOperator<'_> {
    fn dim(&self) -> usize {
        self.kernel.part.sf_dimension()
    }
    fn diagonal(&self) -> DVector<f64> {
        to_vector(&self.kernel.diagonal())
    }
    fn apply(&mut self, xs: &[DVector<f64>]) -> Result<Vec<DVector<f64>>, ResponseError> {
        let p = self.kernel.part;
        let ms: Vec<DMatrix<f64>> = xs.iter().map(|x| to_matrix(&p, x)).collect();
        let out = self.kernel.apply_a(self.engine, &ms)?;
        Ok(out.iter().map(to_vector).collect())
    }
}

/// <S²> of a normalised SF vector (module docs).
pub(crate) fn sf_s_squared(p: &super::Partition, x: &DMatrix<f64>) -> f64 {
    let nc = p.n_core;
    let mut s = x[(nc, 0)] + x[(nc + 1, 1)];
    s *= s;
    for r in 0..p.n_occ() {
        for c in 0..p.n_vir() {
            let v = x[(r, c)] * x[(r, c)];
            if c >= 2 {
                s += v;
            }
            if r < nc {
                s += v;
            }
        }
    }
    s
}

impl<'e> SpinFlip<'e> {
    /// Set up from a converged triplet ROKS/ROHF result; `exact_exchange` is
    /// the functional's c_x (1 for Hartree–Fock, 0.5 for BH&HLYP); `engine`
    /// the Coulomb/exchange builder of this geometry (four builds here).
    pub fn new(
        basis: &BasisSet,
        scf: &ScfResult,
        exact_exchange: f64,
        engine: &'e mut JkEngine,
    ) -> Result<SpinFlip<'e>, ResponseError> {
        let kernel = Kernel::new(basis, scf, exact_exchange, engine)?;
        Ok(SpinFlip { kernel, engine })
    }

    /// N_SF.
    pub fn dimension(&self) -> usize {
        self.kernel.part.sf_dimension()
    }

    /// The orbital partition.
    pub fn partition(&self) -> super::Partition {
        self.kernel.part
    }

    /// Operator products (trial vectors) done so far.
    pub fn products(&self) -> usize {
        self.kernel.products
    }

    /// σ = A x for one SF vector (flat, column-major n_occ × n_vir).
    pub fn apply(&mut self, x: &DVector<f64>) -> Result<DVector<f64>, ResponseError> {
        let mut op = SfOperator {
            kernel: &mut self.kernel,
            engine: &mut *self.engine,
        };
        Ok(op.apply(std::slice::from_ref(x))?.remove(0))
    }

    /// The diagonal used for guesses and preconditioning.
    pub fn diagonal(&self) -> DVector<f64> {
        to_vector(&self.kernel.diagonal())
    }

    /// A built explicitly from the n⁴ integral tensor (for tests of the
    /// matrix-free product; small systems only).
    pub fn explicit_matrix(&self, basis: &BasisSet) -> DMatrix<f64> {
        explicit_a(&self.kernel, basis)
    }

    /// A as a dense matrix from operator products on unit vectors.
    pub fn dense_matrix(&mut self) -> Result<DMatrix<f64>, ResponseError> {
        let mut op = SfOperator {
            kernel: &mut self.kernel,
            engine: &mut *self.engine,
        };
        davidson::dense_matrix(&mut op)
    }

    /// The `n_states` lowest SF-TDA states.
    pub fn solve(
        &mut self,
        n_states: usize,
        opts: &DavidsonOptions,
    ) -> Result<ExcitedStates, ResponseError> {
        self.solve_from(n_states, opts, None)
    }

    /// As [`SpinFlip::solve`], starting the Davidson iterations from the
    /// states of `previous` (other dimensions are ignored).
    pub fn solve_from(
        &mut self,
        n_states: usize,
        opts: &DavidsonOptions,
        previous: Option<&ExcitedStates>,
    ) -> Result<ExcitedStates, ResponseError> {
        let p = self.kernel.part;
        if n_states > p.sf_dimension() {
            return Err(ResponseError::TooManyRoots {
                requested: n_states,
                available: p.sf_dimension(),
                kind: "spin-flip",
            });
        }
        let mut op = SfOperator {
            kernel: &mut self.kernel,
            engine: &mut *self.engine,
        };
        let guesses: Vec<DVector<f64>> = previous
            .filter(|prev| prev.method == Method::SpinFlip)
            .map(|prev| {
                prev.states
                    .iter()
                    .map(|s| DVector::from_column_slice(&s.amplitudes))
                    .collect()
            })
            .unwrap_or_default();
        let pairs = davidson::lowest_eigenpairs_from(&mut op, n_states, opts, &guesses)?;
        let labels: Vec<String> = (0..p.sf_dimension())
            .map(|f| p.label(f % p.n_occ(), f / p.n_occ()))
            .collect();
        let e_ref = self.kernel.reference_energy;
        let mut states = Vec::with_capacity(n_states);
        for (root, (w, mut v)) in pairs.values.iter().zip(pairs.vectors.clone()).enumerate() {
            fix_phase(&mut v);
            let x = to_matrix(&p, &v);
            let mut cv = 0.0;
            for r in 0..p.n_core {
                for c in 2..p.n_vir() {
                    cv += x[(r, c)] * x[(r, c)];
                }
            }
            states.push(ExcitedState {
                spin: StateSpin::Unadapted,
                root,
                energy: e_ref + w,
                omega: *w,
                excitation: None,
                s_squared: sf_s_squared(&p, &x),
                dominant: dominant(&labels, &v),
                amplitudes: v.iter().copied().collect(),
                x_minus: DMatrix::zeros(p.n_occ(), p.n_vir()),
                x_plus: x,
                cv_weight: cv,
            });
        }
        let mut out = ExcitedStates {
            method: Method::SpinFlip,
            reference_energy: e_ref,
            exact_exchange: self.kernel.cx,
            cross_coupling_scale: 0.0,
            partition: p,
            states,
            ground: None,
            solver: vec![pairs.info],
            orbitals: self.kernel.c.clone(),
            dipole_mo: self.kernel.dipole_mo.clone(),
        };
        out.finish();
        Ok(out)
    }
}
