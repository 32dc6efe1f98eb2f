//! MRSF-TDDFT: spin-adapted singlet and triplet blocks over the union of the
//! T+ and T− spin-flip spaces (equations in the module docs of
//! [`super`](crate::electronic::qc::response)).

use super::davidson::{self, DavidsonOptions, Operator, SolverInfo};
use super::kernel::{oo_flat, to_matrix, to_vector, Kernel, Kind, Partition};
use super::properties::{dominant, fix_phase, ExcitedState, ExcitedStates, Method, StateSpin};
use super::ResponseError;
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::scf::fock::JkEngine;
use crate::electronic::qc::scf::ScfResult;
use nalgebra::{DMatrix, DVector};
use std::f64::consts::SQRT_2;

/// MRSF-TDDFT on one triplet reference.
pub struct Mrsf<'e> {
    kernel: Kernel,
    engine: &'e mut JkEngine,
    cross: Cross,
    kappa: f64,
    singlet_cv: bool,
}

/// The sub-blocks of K^{lm} and Δ the cross-reference couplings need.
struct Cross {
    /// K^{lm} on C×C.
    kcc: [[DMatrix<f64>; 2]; 2],
    /// K^{lm} on V×V.
    kvv: [[DMatrix<f64>; 2]; 2],
    /// Δ = K^{O1O2} − K^{O2O1} on C×V and V×C.
    dcv: DMatrix<f64>,
    dvc: DMatrix<f64>,
}

fn eps(k: usize, kp: usize) -> f64 {
    if k == kp {
        1.0
    } else {
        -1.0
    }
}

fn eta(k: usize) -> f64 {
    if k == 0 {
        1.0
    } else {
        -1.0
    }
}

impl Cross {
    fn new(kernel: &Kernel) -> Cross {
        let p = kernel.part;
        let nc = p.n_core;
        let nv = p.n_virtual();
        let v0 = nc + 2;
        let sub = |m: &DMatrix<f64>, r0: usize, nr: usize, c0: usize, ncol: usize| {
            m.view((r0, c0), (nr, ncol)).into_owned()
        };
        let k = &kernel.kop;
        let kcc = [
            [sub(&k[0][0], 0, nc, 0, nc), sub(&k[0][1], 0, nc, 0, nc)],
            [sub(&k[1][0], 0, nc, 0, nc), sub(&k[1][1], 0, nc, 0, nc)],
        ];
        let kvv = [
            [sub(&k[0][0], v0, nv, v0, nv), sub(&k[0][1], v0, nv, v0, nv)],
            [sub(&k[1][0], v0, nv, v0, nv), sub(&k[1][1], v0, nv, v0, nv)],
        ];
        let delta = &k[0][1] - &k[1][0];
        Cross {
            kcc,
            kvv,
            dcv: sub(&delta, 0, nc, v0, nv),
            dvc: sub(&delta, v0, nv, 0, nc),
        }
    }

    /// C z for the non-OO part of an SF matrix z (the table of the module
    /// docs), unscaled.
    fn apply(&self, p: &Partition, z: &DMatrix<f64>) -> DMatrix<f64> {
        let nc = p.n_core;
        let nv = p.n_virtual();
        let mut out = DMatrix::zeros(p.n_occ(), p.n_vir());
        if nc > 0 {
            // CO rows (c→k).
            for k in 0..2 {
                let kb = 1 - k;
                let mut col = DVector::zeros(nc);
                for kp in 0..2 {
                    let kbp = 1 - kp;
                    let zc = z.view((0, kp), (nc, 1));
                    col += (&self.kcc[kbp][kb] * zc) * eps(k, kp);
                }
                if nv > 0 {
                    // Σ_b Δ_cb z_{k̄ b}
                    let zv = z.view((nc + kb, 2), (1, nv)).transpose();
                    col += (&self.dcv * zv) * eta(k);
                }
                out.view_mut((0, k), (nc, 1)).copy_from(&col);
            }
        }
        if nv > 0 {
            // OV rows (k→a).
            for k in 0..2 {
                let kb = 1 - k;
                let mut row = DVector::zeros(nv);
                for kp in 0..2 {
                    let kbp = 1 - kp;
                    let zv = z.view((nc + kp, 2), (1, nv)).transpose();
                    row += (&self.kvv[kbp][kb] * zv) * eps(k, kp);
                }
                if nc > 0 {
                    // Σ_c' Δ_ac' z_{c' k̄}
                    let zc = z.view((0, kb), (nc, 1));
                    row += (&self.dvc * zc) * eta(k);
                }
                out.view_mut((nc + k, 2), (1, nv))
                    .copy_from(&row.transpose());
            }
        }
        out
    }

    /// Diagonal element C_XX (CO: (c k̄|c k̄), OV: (a k̄|a k̄), CV: 0).
    fn diagonal(&self, p: &Partition, row: usize, col: usize) -> f64 {
        match p.kind(row, col) {
            Kind::CO => {
                let kb = 1 - col;
                self.kcc[kb][kb][(row, row)]
            }
            Kind::OV => {
                let kb = 1 - (row - p.n_core);
                self.kvv[kb][kb][(col - 2, col - 2)]
            }
            _ => 0.0,
        }
    }
}

/// One spin block: the non-OO SF indices and the OO basis W (4 × m, rows in
/// the order of [`super::kernel::OO_ORDER`]).
#[derive(Clone)]
struct Block {
    sign: f64,
    non_oo: Vec<usize>,
    w: DMatrix<f64>,
    oo_labels: Vec<&'static str>,
}

impl Block {
    /// `cv`: keep the CV configurations (always for triplets).
    fn new(p: &Partition, spin: StateSpin, cv: bool) -> Block {
        let keep_cv = cv || spin == StateSpin::Triplet;
        let non_oo: Vec<usize> = (0..p.sf_dimension())
            .filter(|&f| match p.kind(f % p.n_occ(), f / p.n_occ()) {
                Kind::OO => false,
                Kind::CV => keep_cv,
                _ => true,
            })
            .collect();
        let h = 1.0 / SQRT_2;
        let (sign, w, oo_labels) = match spin {
            StateSpin::Triplet => (
                -1.0,
                DMatrix::from_column_slice(4, 1, &[h, 0.0, 0.0, h]),
                vec!["O1,O2 (T0)"],
            ),
            _ => (
                1.0,
                // O1² = Φ+(O2→O1), O2² = Φ+(O1→O2), open-shell singlet.
                DMatrix::from_column_slice(
                    4,
                    3,
                    &[0.0, 0.0, 1.0, 0.0, 0.0, 1.0, 0.0, 0.0, h, 0.0, 0.0, -h],
                ),
                vec!["O1²", "O2²", "O1,O2 open-shell"],
            ),
        };
        Block {
            sign,
            non_oo,
            w,
            oo_labels,
        }
    }

    fn dim(&self) -> usize {
        self.non_oo.len() + self.w.ncols()
    }

    fn spin(&self) -> StateSpin {
        if self.sign > 0.0 {
            StateSpin::Singlet
        } else {
            StateSpin::Triplet
        }
    }

    /// (z″ with OO = 2 z_OO, z_OO) of a spin-adapted vector.
    fn expand(&self, p: &Partition, v: &DVector<f64>) -> (DMatrix<f64>, DVector<f64>) {
        let n = self.non_oo.len();
        let mut flat = DVector::zeros(p.sf_dimension());
        for (k, &f) in self.non_oo.iter().enumerate() {
            flat[f] = v[k];
        }
        let zoo = &self.w * v.rows(n, self.w.ncols()) / SQRT_2;
        for x in 0..4 {
            flat[oo_flat(p, x)] = 2.0 * zoo[x];
        }
        (to_matrix(p, &flat), zoo)
    }
}

struct MrsfOperator<'a> {
    kernel: &'a mut Kernel,
    engine: &'a mut JkEngine,
    cross: &'a Cross,
    kappa: f64,
    block: &'a Block,
    a_oo: DMatrix<f64>,
}

impl Operator for MrsfOperator<'_> {
    fn dim(&self) -> usize {
        self.block.dim()
    }

    fn diagonal(&self) -> DVector<f64> {
        let p = self.kernel.part;
        let ad = to_vector(&self.kernel.diagonal());
        let n = self.block.non_oo.len();
        let mut d = DVector::zeros(self.dim());
        for (k, &f) in self.block.non_oo.iter().enumerate() {
            let (r, c) = (f % p.n_occ(), f / p.n_occ());
            d[k] = ad[f] + self.block.sign * self.kappa * self.cross.diagonal(&p, r, c);
        }
        let woo = self.block.w.transpose() * &self.a_oo * &self.block.w;
        for m in 0..self.block.w.ncols() {
            d[n + m] = woo[(m, m)];
        }
        d
    }

    fn apply(&mut self, vs: &[DVector<f64>]) -> Result<Vec<DVector<f64>>, ResponseError> {
        let p = self.kernel.part;
        let b = self.block;
        let n = b.non_oo.len();
        let expanded: Vec<(DMatrix<f64>, DVector<f64>)> =
            vs.iter().map(|v| b.expand(&p, v)).collect();
        let zpp: Vec<DMatrix<f64>> = expanded.iter().map(|(z, _)| z.clone()).collect();
        let ys = self.kernel.apply_a(self.engine, &zpp)?;
        let mut out = Vec::with_capacity(vs.len());
        for ((z, zoo), y) in expanded.iter().zip(&ys) {
            // The cross term reads only the CO and OV blocks of z″ (= z there).
            let c = self.cross.apply(&p, z);
            let yf = to_vector(y);
            let cf = to_vector(&c);
            let mut s = DVector::zeros(b.dim());
            for (k, &f) in b.non_oo.iter().enumerate() {
                s[k] = yf[f] + b.sign * self.kappa * cf[f];
            }
            let yoo = DVector::from_fn(4, |x, _| yf[oo_flat(&p, x)]);
            let soo = b.w.transpose() * (yoo - &self.a_oo * zoo) * SQRT_2;
            s.rows_mut(n, b.w.ncols()).copy_from(&soo);
            out.push(s);
        }
        Ok(out)
    }
}

impl<'e> Mrsf<'e> {
    /// Set up from a converged triplet ROKS/ROHF result (see
    /// [`super::SpinFlip::new`]); the cross-reference couplings are scaled by
    /// κ = `exact_exchange` unless changed with
    /// [`Mrsf::with_cross_coupling_scale`].
    pub fn new(
        basis: &BasisSet,
        scf: &ScfResult,
        exact_exchange: f64,
        engine: &'e mut JkEngine,
    ) -> Result<Mrsf<'e>, ResponseError> {
        let kernel = Kernel::new(basis, scf, exact_exchange, engine)?;
        let cross = Cross::new(&kernel);
        Ok(Mrsf {
            kernel,
            engine,
            cross,
            kappa: exact_exchange,
            singlet_cv: true,
        })
    }

    /// Keep (default) or drop the CV configurations in the singlet block.
    /// Kept, the singlet block is the exact R-even part of the union space
    /// (dimension N_SF − 1; <S²> = 2 w_CV, the quintet part of the CV
    /// combinations); dropped, every singlet is a pure singlet (<S²> = 0,
    /// dimension N_SF − 1 − n_C n_V) at the price of the CV correlation.
    pub fn with_singlet_cv(mut self, include: bool) -> Self {
        self.singlet_cv = include;
        self
    }

    fn block(&self, spin: StateSpin) -> Block {
        Block::new(&self.kernel.part, spin, self.singlet_cv)
    }

    /// Use κ for the cross-reference (spin-pairing) couplings instead of c_x.
    pub fn with_cross_coupling_scale(mut self, kappa: f64) -> Result<Self, ResponseError> {
        if !kappa.is_finite() {
            return Err(ResponseError::InvalidOption(format!(
                "cross-coupling scale must be finite, got {kappa}"
            )));
        }
        self.kappa = kappa;
        Ok(self)
    }

    /// κ, the scale of the cross-reference couplings (default c_x).
    pub fn cross_coupling_scale(&self) -> f64 {
        self.kappa
    }

    /// The orbital partition.
    pub fn partition(&self) -> Partition {
        self.kernel.part
    }

    /// Dimension of the singlet block (N_SF − 1, or less without CV).
    pub fn singlet_dimension(&self) -> usize {
        self.block(StateSpin::Singlet).dim()
    }

    /// Dimension of the triplet block (N_SF − 3).
    pub fn triplet_dimension(&self) -> usize {
        self.block(StateSpin::Triplet).dim()
    }

    /// SF-frame operator products (trial vectors) done so far.
    pub fn products(&self) -> usize {
        self.kernel.products
    }

    fn operator<'a>(&'a mut self, block: &'a Block) -> MrsfOperator<'a> {
        let a_oo = self.kernel.a_oo();
        MrsfOperator {
            kernel: &mut self.kernel,
            engine: &mut *self.engine,
            cross: &self.cross,
            kappa: self.kappa,
            block,
            a_oo,
        }
    }

    /// The singlet or triplet block as a dense matrix (operator products on
    /// unit vectors; for tests and small systems). `spin` Unadapted is
    /// treated as singlet.
    pub fn dense_matrix(&mut self, spin: StateSpin) -> Result<DMatrix<f64>, ResponseError> {
        let block = self.block(spin);
        let mut op = self.operator(&block);
        davidson::dense_matrix(&mut op)
    }

    /// The diagonal of a block (guesses and preconditioning).
    pub fn diagonal(&mut self, spin: StateSpin) -> DVector<f64> {
        let block = self.block(spin);
        let op = self.operator(&block);
        op.diagonal()
    }

    /// The `n_singlets` lowest singlets (S0 first) and `n_triplets` lowest
    /// triplets.
    pub fn solve(
        &mut self,
        n_singlets: usize,
        n_triplets: usize,
        opts: &DavidsonOptions,
    ) -> Result<ExcitedStates, ResponseError> {
        self.solve_from(n_singlets, n_triplets, opts, None)
    }

    /// As [`Mrsf::solve`], with the Davidson iterations of each block started
    /// from the states of `previous` (e.g. the last step of a trajectory;
    /// states from spaces of another dimension are ignored).
    pub fn solve_from(
        &mut self,
        n_singlets: usize,
        n_triplets: usize,
        opts: &DavidsonOptions,
        previous: Option<&ExcitedStates>,
    ) -> Result<ExcitedStates, ResponseError> {
        let p = self.kernel.part;
        let blocks = [
            (self.block(StateSpin::Singlet), n_singlets, "singlet"),
            (self.block(StateSpin::Triplet), n_triplets, "triplet"),
        ];
        for (b, n, kind) in &blocks {
            if *n > b.dim() {
                return Err(ResponseError::TooManyRoots {
                    requested: *n,
                    available: b.dim(),
                    kind,
                });
            }
        }
        let e_ref = self.kernel.reference_energy;
        let mut states = Vec::new();
        let mut infos: Vec<SolverInfo> = Vec::new();
        for (block, nroots, _) in &blocks {
            if *nroots == 0 {
                continue;
            }
            let guesses: Vec<DVector<f64>> = previous
                .map(|prev| {
                    prev.states
                        .iter()
                        .filter(|s| s.spin == block.spin() && prev.method == Method::Mrsf)
                        .map(|s| DVector::from_column_slice(&s.amplitudes))
                        .collect()
                })
                .unwrap_or_default();
            let pairs = {
                let mut op = self.operator(block);
                davidson::lowest_eigenpairs_from(&mut op, *nroots, opts, &guesses)?
            };
            let labels: Vec<String> = block
                .non_oo
                .iter()
                .map(|&f| p.label(f % p.n_occ(), f / p.n_occ()))
                .chain(block.oo_labels.iter().map(|s| s.to_string()))
                .collect();
            for (root, (w, mut v)) in pairs.values.iter().zip(pairs.vectors.clone()).enumerate() {
                fix_phase(&mut v);
                states.push(self.make_state(block, root, *w, &v, &labels, e_ref));
            }
            infos.push(pairs.info);
        }
        let mut out = ExcitedStates {
            method: Method::Mrsf,
            reference_energy: e_ref,
            exact_exchange: self.kernel.cx,
            cross_coupling_scale: self.kappa,
            partition: p,
            states,
            ground: None,
            solver: infos,
            orbitals: self.kernel.c.clone(),
            dipole_mo: self.kernel.dipole_mo.clone(),
        };
        out.finish();
        Ok(out)
    }

    fn make_state(
        &self,
        block: &Block,
        root: usize,
        omega: f64,
        v: &DVector<f64>,
        labels: &[String],
        e_ref: f64,
    ) -> ExcitedState {
        let p = self.kernel.part;
        let n = block.non_oo.len();
        let mut xp = DVector::zeros(p.sf_dimension());
        let mut xm = DVector::zeros(p.sf_dimension());
        let mut cv = 0.0;
        for (k, &f) in block.non_oo.iter().enumerate() {
            xp[f] = v[k] / SQRT_2;
            xm[f] = block.sign * v[k] / SQRT_2;
            if p.kind(f % p.n_occ(), f / p.n_occ()) == Kind::CV {
                cv += v[k] * v[k];
            }
        }
        let xoo = &block.w * v.rows(n, block.w.ncols());
        for x in 0..4 {
            xp[oo_flat(&p, x)] = xoo[x];
        }
        let spin = block.spin();
        ExcitedState {
            spin,
            root,
            energy: e_ref + omega,
            omega,
            excitation: None,
            s_squared: if spin == StateSpin::Singlet {
                2.0 * cv
            } else {
                2.0
            },
            amplitudes: v.iter().copied().collect(),
            x_plus: to_matrix(&p, &xp),
            x_minus: to_matrix(&p, &xm),
            dominant: dominant(labels, v),
            cv_weight: cv,
        }
    }
}
