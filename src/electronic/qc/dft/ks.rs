//! The Kohn–Sham potential: the [`FockBuilder`] that turns the Hartree–Fock
//! SCF driver into RKS/UKS/ROKS (design note 4: a DFT method overrides only
//! the potential and the energy).
//!
//! G^σ = J[D^α + D^β] − c_x K[D^σ] + V^σ_xc, and
//! E_2 = ½ tr(D J) − ½ c_x Σ_σ tr(D^σ K^σ) + E_xc, with c_x the functional's
//! exact-exchange fraction ([`Functional::exact_exchange`]).
//!
//! # Numerical integration (common practice)
//! On a [`MolecularGrid`] with weights w_p, per block of points and on the
//! block's significant AOs only ([`AoBasis::eval_block`]):
//! ρ^σ_p = Σ_μν φ_μ(r_p) D^σ_μν φ_ν(r_p), ∇ρ^σ_p = 2 Σ_μν φ_μ D^σ_μν ∇φ_ν,
//! E_xc = Σ_p w_p ρ_p ε_p, and, with u^σ_pν = w_p [½ v_ρσ φ_ν + (2 v_σσσ ∇ρ^σ +
//! v_σαβ ∇ρ^σ̄)·∇φ_ν] (polarised; unpolarised: u_pν = w_p [½ v_ρ φ_ν +
//! 2 v_σ ∇ρ·∇φ_ν] with the total density), V^σ = Φᵀu^σ + (Φᵀu^σ)ᵀ.
//! The closed-shell (restricted) reference uses the spin-unpolarised
//! functional; open shells (ROKS, UKS) the polarised one.
//!
//! Blocks are summed in a fixed partition (64 chunks, each summed in order,
//! chunks added in order), so results do not depend on the number of threads.

use super::ao_values::{AoBasis, AoError, AoValues, COMP_VALUE, COMP_X, COMP_Y, COMP_Z};
use super::grid::{GridError, GridSpec, MolecularGrid};
use super::xc::{Family, Functional, Spin, XcError, XcInput, XcOutput};
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::integrals::JkOptions;
use crate::electronic::qc::scf::fock::{
    coulomb_exchange_terms, FockBuilder, JkEngine, TwoElectronTerms,
};
use crate::electronic::qc::scf::{Reference, ScfError};
use nalgebra::{DMatrix, DMatrixView};
use rayon::prelude::*;

/// What a Kohn–Sham calculation needs beyond the SCF options.
#[derive(Clone, Debug)]
pub struct KsOptions {
    /// Functional: preset or libxc names ([`Functional::preset_or_libxc`]).
    pub functional: String,
    /// Integration grid.
    pub grid: GridSpec,
    /// Coulomb/exchange build options.
    pub jk: JkOptions,
}

/// Basis-function values on the grid are kept between SCF iterations while
/// they need at most this many bytes (per Kohn–Sham object; several
/// trajectories may run side by side). Above it they are recomputed.
pub const AO_CACHE_BYTES: usize = 256 << 20;

/// Set-up errors of a Kohn–Sham calculation.
#[derive(Debug, thiserror::Error)]
pub enum KsError {
    /// The functional name or evaluation.
    #[error("{0}")]
    Functional(#[from] XcError),
    /// The grid.
    #[error("grid: {0}")]
    Grid(#[from] GridError),
    /// AO evaluation.
    #[error("basis functions on the grid: {0}")]
    Ao(#[from] AoError),
}

const CHUNKS: usize = 64;

/// The Kohn–Sham potential of one geometry.
pub struct KohnSham {
    engine: JkEngine,
    functional: Functional,
    grid: MolecularGrid,
    ao: AoBasis,
    nbf: usize,
    /// One functional copy and scratch per chunk of blocks (a libxc
    /// functional is used by one thread at a time).
    workers: Vec<std::sync::Mutex<Worker>>,
    /// AO values per block, kept while within [`AO_CACHE_BYTES`].
    ao_cache: Vec<std::sync::OnceLock<AoValues>>,
    ao_cache_bytes: std::sync::atomic::AtomicUsize,
}

/// XC energy, electrons on the grid and the two potential matrices.
struct XcParts {
    energy: f64,
    electrons: f64,
    va: DMatrix<f64>,
    vb: DMatrix<f64>,
}

impl KohnSham {
    /// Grid, AO screening data and integral engine for `basis`; the
    /// functional is evaluated spin-polarised unless `reference` is
    /// restricted closed-shell.
    pub fn new(
        basis: &BasisSet,
        reference: Reference,
        opts: &KsOptions,
    ) -> Result<KohnSham, KsError> {
        Self::with_engine(basis, reference, opts, None)
    }

    /// As [`KohnSham::new`] around an existing J/K engine of the same basis
    /// (its integral store is not rebuilt), or a new one for `None`.
    pub fn with_engine(
        basis: &BasisSet,
        reference: Reference,
        opts: &KsOptions,
        engine: Option<JkEngine>,
    ) -> Result<KohnSham, KsError> {
        let spin = if reference == Reference::Restricted {
            Spin::Unpolarized
        } else {
            Spin::Polarized
        };
        let functional = Functional::preset_or_libxc(&opts.functional, spin)?;
        let grid = MolecularGrid::build(&basis.nuclei, &opts.grid)?;
        let ao = AoBasis::new(basis)?;
        let t = std::time::Instant::now();
        tracing::debug!(
            "Kohn-Sham: {} (exact exchange {}), grid of {} points in {} blocks",
            functional.name(),
            functional.exact_exchange(),
            grid.len(),
            grid.blocks.len()
        );
        let mut workers = Vec::with_capacity(CHUNKS);
        for _ in 0..CHUNKS {
            workers.push(std::sync::Mutex::new(Worker {
                func: functional.try_clone()?,
                ao: AoValues::new(),
                out: XcOutput::new(),
                rho: Vec::new(),
                sigma: Vec::new(),
            }));
        }
        let engine = engine.unwrap_or_else(|| JkEngine::new(basis, opts.jk.clone()));
        tracing::debug!(
            "Kohn-Sham set-up: integral engine {:.3} s",
            t.elapsed().as_secs_f64()
        );
        let ao_cache = (0..grid.blocks.len())
            .map(|_| std::sync::OnceLock::new())
            .collect();
        Ok(KohnSham {
            engine,
            ao_cache,
            ao_cache_bytes: std::sync::atomic::AtomicUsize::new(0),
            workers,
            functional,
            grid,
            ao,
            nbf: basis.nbf,
        })
    }

    /// The functional's name.
    pub fn functional_name(&self) -> &str {
        self.functional.name()
    }

    /// The functional.
    pub fn functional(&self) -> &Functional {
        &self.functional
    }

    /// Number of grid points.
    pub fn grid_points(&self) -> usize {
        self.grid.len()
    }

    /// The Coulomb/exchange engine (its integral store can be reused by the
    /// response after the SCF).
    pub fn engine_mut(&mut self) -> &mut JkEngine {
        &mut self.engine
    }

    /// Give up the grid and keep the engine (for the response).
    pub fn into_engine(self) -> JkEngine {
        self.engine
    }

    /// The grid.
    pub fn grid(&self) -> &MolecularGrid {
        &self.grid
    }

    /// The exchange–correlation potentials (V^α_xc, V^β_xc) (AO) of any pair
    /// of spin densities, spin-polarised (zero for an exact-exchange-only
    /// functional). Used by the response gradients.
    pub(crate) fn xc_potential(
        &self,
        da: &DMatrix<f64>,
        db: &DMatrix<f64>,
    ) -> Result<(DMatrix<f64>, DMatrix<f64>), ScfError> {
        let p = self.xc(da, db, false)?;
        Ok((p.va, p.vb))
    }

    fn xc(
        &self,
        da: &DMatrix<f64>,
        db: &DMatrix<f64>,
        restricted: bool,
    ) -> Result<XcParts, ScfError> {
        let n = self.nbf;
        if self.functional.is_hf_only() {
            return Ok(XcParts {
                energy: 0.0,
                electrons: f64::NAN,
                va: DMatrix::zeros(n, n),
                vb: DMatrix::zeros(n, n),
            });
        }
        let polarized = self.functional.spin() == Spin::Polarized;
        if !polarized && !restricted {
            return Err(ScfError::Xc(
                "an unpolarised functional was asked for different α and β densities".into(),
            ));
        }
        let gga = self.functional.family() == Family::Gga;
        debug_assert!(self.workers.len() >= CHUNKS);
        let deriv = if gga { 1 } else { 0 };
        let dtot = da + db;
        let nblocks = self.grid.blocks.len();
        let chunk = nblocks.div_ceil(CHUNKS).max(1);
        let ranges: Vec<std::ops::Range<usize>> = (0..nblocks)
            .step_by(chunk)
            .map(|s| s..(s + chunk).min(nblocks))
            .collect();
        let (grid, ao, workers) = (&self.grid, &self.ao, &self.workers);
        let (cache, cache_bytes) = (&self.ao_cache, &self.ao_cache_bytes);
        let parts: Vec<Result<XcParts, ScfError>> = ranges
            .par_iter()
            .enumerate()
            .map(|(ci, range)| {
                let mut guard = workers[ci]
                    .lock()
                    .map_err(|_| ScfError::Xc("a grid worker panicked".into()))?;
                let w: &mut Worker = &mut guard;
                let mut acc = XcParts {
                    energy: 0.0,
                    electrons: 0.0,
                    va: DMatrix::zeros(n, n),
                    vb: if polarized {
                        DMatrix::zeros(n, n)
                    } else {
                        DMatrix::zeros(0, 0)
                    },
                };
                for blk in range.clone() {
                    let block = &grid.blocks[blk];
                    let weights = &grid.weights[block.range.clone()];
                    if let Some(values) = cache[blk].get().filter(|v| v.deriv() >= deriv) {
                        if values.nao() > 0 {
                            let b = BlockAo::of(values);
                            if polarized {
                                block_polarized(&b, weights, da, db, w, &mut acc)?;
                            } else {
                                block_unpolarized(&b, weights, &dtot, w, &mut acc)?;
                            }
                        }
                        continue;
                    }
                    let mut values = std::mem::take(&mut w.ao);
                    let r = ao.eval_block(grid, block, deriv, &mut values);
                    if let Err(e) = r {
                        w.ao = values;
                        return Err(ScfError::Xc(e.to_string()));
                    }
                    if values.nao() > 0 {
                        let b = BlockAo::of(&values);
                        let r = if polarized {
                            block_polarized(&b, weights, da, db, w, &mut acc)
                        } else {
                            block_unpolarized(&b, weights, &dtot, w, &mut acc)
                        };
                        if let Err(e) = r {
                            w.ao = values;
                            return Err(e);
                        }
                    }
                    let bytes = values.data().len() * 8 + values.aos().len() * 8;
                    let used = cache_bytes.fetch_add(bytes, std::sync::atomic::Ordering::Relaxed);
                    if used + bytes <= AO_CACHE_BYTES {
                        let _ = cache[blk].set(values.clone());
                    } else {
                        cache_bytes.fetch_sub(bytes, std::sync::atomic::Ordering::Relaxed);
                    }
                    w.ao = values;
                }
                Ok(acc)
            })
            .collect();
        let mut total = XcParts {
            energy: 0.0,
            electrons: 0.0,
            va: DMatrix::zeros(n, n),
            vb: DMatrix::zeros(n, n),
        };
        for p in parts {
            let p = p?;
            total.energy += p.energy;
            total.electrons += p.electrons;
            total.va += &p.va;
            if polarized {
                total.vb += &p.vb;
            }
        }
        if !polarized {
            total.vb = total.va.clone();
        }
        Ok(total)
    }
}

/// Per-worker functional copy and scratch (one per chunk of blocks).
struct Worker {
    func: Functional,
    ao: AoValues,
    out: XcOutput,
    rho: Vec<f64>,
    sigma: Vec<f64>,
}

/// AO values of one block: value and (GGA) gradient components, each an
/// npts × nao column-major slice.
struct BlockAo<'a> {
    aos: &'a [usize],
    np: usize,
    phi: &'a [f64],
    grad: Option<[&'a [f64]; 3]>,
}

impl<'a> BlockAo<'a> {
    fn of(v: &'a AoValues) -> BlockAo<'a> {
        BlockAo {
            aos: v.aos(),
            np: v.npts(),
            phi: v.component(COMP_VALUE),
            grad: if v.deriv() >= 1 {
                Some([
                    v.component(COMP_X),
                    v.component(COMP_Y),
                    v.component(COMP_Z),
                ])
            } else {
                None
            },
        }
    }
    fn phi(&self) -> DMatrixView<'a, f64> {
        DMatrixView::from_slice(self.phi, self.np, self.aos.len())
    }
}

fn sub_density(d: &DMatrix<f64>, aos: &[usize]) -> DMatrix<f64> {
    let m = aos.len();
    DMatrix::from_fn(m, m, |i, j| d[(aos[i], aos[j])])
}

fn scatter(v: &mut DMatrix<f64>, aos: &[usize], sub: &DMatrix<f64>) {
    for (j, &gj) in aos.iter().enumerate() {
        for (i, &gi) in aos.iter().enumerate() {
            v[(gi, gj)] += sub[(i, j)] + sub[(j, i)];
        }
    }
}

/// ρ_p = Σ_j T_pj Φ_pj and ∇ρ_p = 2 Σ_j T_pj ∇Φ_pj from T = Φ D (column-major).
fn density_and_gradient(b: &BlockAo, t: &DMatrix<f64>) -> (Vec<f64>, Option<[Vec<f64>; 3]>) {
    let np = b.np;
    let na = b.aos.len();
    let ts = t.as_slice();
    let mut rho = vec![0.0; np];
    for j in 0..na {
        let (tc, pc) = (&ts[j * np..(j + 1) * np], &b.phi[j * np..(j + 1) * np]);
        for p in 0..np {
            rho[p] += tc[p] * pc[p];
        }
    }
    let grad = b.grad.map(|g| {
        let mut out = [vec![0.0; np], vec![0.0; np], vec![0.0; np]];
        for (k, gk) in g.iter().enumerate() {
            for j in 0..na {
                let (tc, gc) = (&ts[j * np..(j + 1) * np], &gk[j * np..(j + 1) * np]);
                for p in 0..np {
                    out[k][p] += 2.0 * tc[p] * gc[p];
                }
            }
        }
        out
    });
    (rho, grad)
}

/// u_pν = a_p Φ_pν + Σ_k c_kp ∂_kΦ_pν, then V_sub = Φᵀ u.
fn potential_block(b: &BlockAo, a: &[f64], c: Option<&[Vec<f64>; 3]>) -> DMatrix<f64> {
    let np = b.np;
    let na = b.aos.len();
    let mut u = DMatrix::<f64>::zeros(np, na);
    {
        let us = u.as_mut_slice();
        for j in 0..na {
            let uc = &mut us[j * np..(j + 1) * np];
            let pc = &b.phi[j * np..(j + 1) * np];
            for p in 0..np {
                uc[p] = a[p] * pc[p];
            }
            if let (Some(c), Some(g)) = (c, b.grad) {
                for k in 0..3 {
                    let gc = &g[k][j * np..(j + 1) * np];
                    for p in 0..np {
                        uc[p] += c[k][p] * gc[p];
                    }
                }
            }
        }
    }
    b.phi().transpose() * u
}

fn xc_err(e: XcError) -> ScfError {
    ScfError::Xc(e.to_string())
}

fn block_unpolarized(
    b: &BlockAo,
    weights: &[f64],
    dtot: &DMatrix<f64>,
    w: &mut Worker,
    acc: &mut XcParts,
) -> Result<(), ScfError> {
    let np = b.np;
    let t = b.phi() * sub_density(dtot, b.aos);
    let (rho, grad) = density_and_gradient(b, &t);
    w.rho.clear();
    w.rho.extend_from_slice(&rho);
    w.sigma.clear();
    if let Some(g) = &grad {
        w.sigma
            .extend((0..np).map(|p| g[0][p] * g[0][p] + g[1][p] * g[1][p] + g[2][p] * g[2][p]));
    }
    let input = XcInput {
        rho: &w.rho,
        sigma: &w.sigma,
    };
    w.func.eval(&input, 1, &mut w.out).map_err(xc_err)?;
    acc.energy += w.out.energy(&input, weights).map_err(xc_err)?;
    acc.electrons += weights.iter().zip(&rho).map(|(a, r)| a * r).sum::<f64>();
    // u_pν = w_p [½ v_ρ φ_ν + 2 v_σ ∇ρ·∇φ_ν]
    let a: Vec<f64> = (0..np).map(|p| 0.5 * weights[p] * w.out.vrho[p]).collect();
    let c = grad.as_ref().map(|g| {
        let f = |k: usize| {
            (0..np)
                .map(|p| 2.0 * weights[p] * w.out.vsigma[p] * g[k][p])
                .collect::<Vec<f64>>()
        };
        [f(0), f(1), f(2)]
    });
    let sub = potential_block(b, &a, c.as_ref());
    scatter(&mut acc.va, b.aos, &sub);
    Ok(())
}

fn block_polarized(
    b: &BlockAo,
    weights: &[f64],
    da: &DMatrix<f64>,
    db: &DMatrix<f64>,
    w: &mut Worker,
    acc: &mut XcParts,
) -> Result<(), ScfError> {
    let np = b.np;
    let ta = b.phi() * sub_density(da, b.aos);
    let tb = b.phi() * sub_density(db, b.aos);
    let (ra, ga) = density_and_gradient(b, &ta);
    let (rb, gb) = density_and_gradient(b, &tb);
    w.rho.clear();
    for p in 0..np {
        w.rho.push(ra[p]);
        w.rho.push(rb[p]);
    }
    w.sigma.clear();
    if let (Some(ga), Some(gb)) = (&ga, &gb) {
        for p in 0..np {
            let dot = |x: &[Vec<f64>; 3], y: &[Vec<f64>; 3]| {
                x[0][p] * y[0][p] + x[1][p] * y[1][p] + x[2][p] * y[2][p]
            };
            w.sigma.push(dot(ga, ga));
            w.sigma.push(dot(ga, gb));
            w.sigma.push(dot(gb, gb));
        }
    }
    let input = XcInput {
        rho: &w.rho,
        sigma: &w.sigma,
    };
    w.func.eval(&input, 1, &mut w.out).map_err(xc_err)?;
    acc.energy += w.out.energy(&input, weights).map_err(xc_err)?;
    acc.electrons += (0..np).map(|p| weights[p] * (ra[p] + rb[p])).sum::<f64>();
    for spin in 0..2 {
        let a: Vec<f64> = (0..np)
            .map(|p| 0.5 * weights[p] * w.out.vrho[2 * p + spin])
            .collect();
        let c = match (&ga, &gb) {
            (Some(ga), Some(gb)) => {
                let (own, other) = if spin == 0 { (ga, gb) } else { (gb, ga) };
                let own_index = if spin == 0 { 0 } else { 2 };
                let f = |k: usize| {
                    (0..np)
                        .map(|p| {
                            weights[p]
                                * (2.0 * w.out.vsigma[3 * p + own_index] * own[k][p]
                                    + w.out.vsigma[3 * p + 1] * other[k][p])
                        })
                        .collect::<Vec<f64>>()
                };
                Some([f(0), f(1), f(2)])
            }
            _ => None,
        };
        let sub = potential_block(b, &a, c.as_ref());
        scatter(
            if spin == 0 { &mut acc.va } else { &mut acc.vb },
            b.aos,
            &sub,
        );
    }
    Ok(())
}

impl FockBuilder for KohnSham {
    fn build(
        &mut self,
        d_alpha: &DMatrix<f64>,
        d_beta: &DMatrix<f64>,
        restricted: bool,
        fresh: bool,
    ) -> Result<TwoElectronTerms, ScfError> {
        let cx = self.functional.exact_exchange();
        let t0 = std::time::Instant::now();
        let mut terms =
            coulomb_exchange_terms(&mut self.engine, cx, d_alpha, d_beta, restricted, fresh)?;
        let t1 = std::time::Instant::now();
        let xc = self.xc(d_alpha, d_beta, restricted)?;
        tracing::debug!(
            "Kohn-Sham build: J/K {:.3} s, exchange-correlation {:.3} s",
            (t1 - t0).as_secs_f64(),
            t1.elapsed().as_secs_f64()
        );
        terms.g_alpha += &xc.va;
        terms.g_beta += &xc.vb;
        terms.xc = xc.energy;
        terms.grid_electrons = if xc.electrons.is_nan() {
            None
        } else {
            Some(xc.electrons)
        };
        Ok(terms)
    }

    fn in_core(&self) -> bool {
        self.engine.in_core()
    }
}

/// Kohn–Sham SCF in one call: build the potential, run the driver.
pub fn kohn_sham(
    basis: &BasisSet,
    electrons: crate::electronic::qc::scf::Electrons,
    reference: Reference,
    guess: &crate::electronic::qc::scf::Guess,
    scf: &crate::electronic::qc::scf::ScfOptions,
    opts: &KsOptions,
) -> Result<crate::electronic::qc::scf::ScfResult, KsRunError> {
    let mut builder = KohnSham::new(basis, reference, opts)?;
    Ok(crate::electronic::qc::scf::run(
        basis,
        electrons,
        reference,
        &mut builder,
        guess,
        scf,
    )?)
}

/// Errors of [`kohn_sham`]: set-up or SCF.
#[derive(Debug, thiserror::Error)]
pub enum KsRunError {
    /// Set-up (functional, grid).
    #[error("{0}")]
    Setup(#[from] KsError),
    /// The SCF.
    #[error("{0}")]
    Scf(#[from] ScfError),
}
