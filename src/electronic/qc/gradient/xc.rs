//! Exchange–correlation contribution to SCF nuclear gradients.
//!
//! E_xc = Σ_p w_p f_p, f_p = e(ρ^α, ρ^β, σ^αα, σ^αβ, σ^ββ) at the grid point
//! r_p. Three things move with the nuclei: the basis functions (with their
//! atoms), the grid points (rigidly with their owner atom, see
//! [`crate::electronic::qc::dft::grid`]) and the Becke partition weights.
//! The grid is treated exactly as the SCF treats it, so this is the exact
//! derivative of the quadrature energy (central differences of our own
//! energies test it).
//!
//! Moving basis function μ by ε along k changes φ_μ(r) by −ε ∂_kφ_μ, so at a
//! fixed point δρ^σ = −2ε ∂_kφ_μ (D^σφ)_μ and
//! δ∇_lρ^σ = −2ε [∂_l∂_kφ_μ (D^σφ)_μ + ∂_kφ_μ (D^σ∂_lφ)_μ]. With
//! a^σ_p = w_p ∂f/∂ρ^σ and c^σ_pl = w_p ∂f/∂(∇_lρ^σ) (unpolarised:
//! 2 v_σ ∇ρ for the total density; polarised:
//! 2 v_σσσ ∇ρ^σ + v_σαβ ∇ρ^σ̄) define
//!
//! Y_pμk = Σ_σ 2 a^σ_p ∂_kφ_μ (D^σφ)_μ + 2 Σ_l c^σ_pl [∂_l∂_kφ_μ (D^σφ)_μ + ∂_kφ_μ (D^σ∂_lφ)_μ].
//!
//! Then, with A(μ) the atom of μ and A(p) the owner of point p,
//!
//! dE_xc/dR_{C,k} = Σ_p Σ_μ Y_pμk (δ_{C,A(p)} − δ_{C,A(μ)}) + Σ_p w^quad_p (∂w^Becke_p/∂R_{C,k}) f_p,
//!
//! the first term from the basis functions and the moving points (second
//! AO derivatives for GGAs), the second from the partition
//! ([`crate::electronic::qc::dft::grid::partition::BeckePartition::weight_gradient`]).
//! The sum over atoms of each term vanishes (translational invariance).
//! Parallel over fixed chunks of blocks, reduced in order (deterministic).

use super::GradientError;
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::dft::ao_values::{AoBasis, AoValues, COMP_VALUE, COMP_X};
use crate::electronic::qc::dft::grid::partition::PartitionWork;
use crate::electronic::qc::dft::grid::MolecularGrid;
use crate::electronic::qc::dft::xc::{Family, Functional, Spin, XcInput, XcOutput};
use nalgebra::{DMatrix, DMatrixView};
use rayon::prelude::*;

/// The XC gradient and its grid-weight part (per atom, Eh/bohr).
#[derive(Clone, Debug)]
pub struct XcGradient {
    /// Total XC contribution.
    pub total: Vec<[f64; 3]>,
    /// Of it, the partition-weight derivative.
    pub grid_weights: Vec<[f64; 3]>,
    /// E_xc on the grid (for checks against the SCF).
    pub energy: f64,
}

const CHUNKS: usize = 64;

/// A gradient per atom (Eh/bohr).
type PerAtom = Vec<[f64; 3]>;

/// Index of ∂_k∂_l in the AO component layout (xx, xy, xz, yy, yz, zz after
/// value and gradient).
fn hess_comp(k: usize, l: usize) -> usize {
    let (a, b) = if k <= l { (k, l) } else { (l, k) };
    4 + match (a, b) {
        (0, 0) => 0,
        (0, 1) => 1,
        (0, 2) => 2,
        (1, 1) => 3,
        (1, 2) => 4,
        _ => 5,
    }
}

fn xc_err(e: impl std::fmt::Display) -> GradientError {
    GradientError::Xc(e.to_string())
}

/// XC gradient for spin densities `da`, `db` on `grid` (the SCF grid of this
/// geometry). `restricted` selects the unpolarised evaluation (D^α = D^β);
/// `functional` must have the matching spin treatment.
pub fn xc_gradient(
    basis: &BasisSet,
    grid: &MolecularGrid,
    functional: &Functional,
    da: &DMatrix<f64>,
    db: &DMatrix<f64>,
    restricted: bool,
) -> Result<XcGradient, GradientError> {
    let natoms = basis.natoms();
    let zero = XcGradient {
        total: vec![[0.0; 3]; natoms],
        grid_weights: vec![[0.0; 3]; natoms],
        energy: 0.0,
    };
    if functional.is_hf_only() {
        return Ok(zero);
    }
    let polarized = functional.spin() == Spin::Polarized;
    if polarized == restricted {
        return Err(GradientError::Input(format!(
            "a {} functional for a {} reference",
            if polarized {
                "spin-polarised"
            } else {
                "spin-unpolarised"
            },
            if restricted {
                "closed-shell"
            } else {
                "open-shell"
            }
        )));
    }
    let gga = functional.family() == Family::Gga;
    let ao_atoms = basis.ao_atoms();
    let dt = da + db;
    let dens: Vec<&DMatrix<f64>> = if polarized { vec![da, db] } else { vec![&dt] };
    let init = || XcGradient {
        total: vec![[0.0; 3]; natoms],
        grid_weights: vec![[0.0; 3]; natoms],
        energy: 0.0,
    };
    let parts = over_blocks(
        basis,
        grid,
        functional,
        init,
        |acc, blk, values, func, sc| {
            block_gradient(
                grid,
                blk,
                values,
                &dens,
                func,
                polarized,
                gga,
                &ao_atoms,
                &mut sc.out,
                &mut sc.work,
                &mut sc.wgrad,
                acc,
            )
        },
    )?;
    let mut total = zero;
    for p in parts {
        total.energy += p.energy;
        for a in 0..natoms {
            for k in 0..3 {
                total.total[a][k] += p.total[a][k];
                total.grid_weights[a][k] += p.grid_weights[a][k];
            }
        }
    }
    Ok(total)
}

/// Per-thread scratch of a grid pass.
struct Scratch {
    out: XcOutput,
    work: PartitionWork,
    wgrad: Vec<[f64; 3]>,
}

/// One pass over the grid blocks in a fixed partition of [`CHUNKS`]
/// chunks (parallel; the caller reduces the per-chunk accumulators in
/// order, so the sums do not depend on the thread count): AO values to
/// second (GGA) or first order per block, then `body`.
fn over_blocks<A, F>(
    basis: &BasisSet,
    grid: &MolecularGrid,
    functional: &Functional,
    init: impl Fn() -> A + Sync,
    body: F,
) -> Result<Vec<A>, GradientError>
where
    A: Send,
    F: Fn(&mut A, usize, &AoValues, &Functional, &mut Scratch) -> Result<(), GradientError> + Sync,
{
    let gga = functional.family() == Family::Gga;
    let ao = AoBasis::new(basis).map_err(|e| GradientError::Ks(e.into()))?;
    let natoms = basis.natoms();
    let nblocks = grid.blocks.len();
    let chunk = nblocks.div_ceil(CHUNKS).max(1);
    let ranges: Vec<std::ops::Range<usize>> = (0..nblocks)
        .step_by(chunk)
        .map(|s| s..(s + chunk).min(nblocks))
        .collect();
    let mut funcs = Vec::with_capacity(ranges.len());
    for _ in 0..ranges.len() {
        funcs.push(functional.try_clone().map_err(xc_err)?);
    }
    ranges
        .into_par_iter()
        .zip(funcs.into_par_iter())
        .map(|(range, func)| {
            let mut acc = init();
            let mut values = AoValues::new();
            let mut scratch = Scratch {
                out: XcOutput::new(),
                work: PartitionWork::default(),
                wgrad: vec![[0.0; 3]; natoms],
            };
            for blk in range {
                ao.eval_block(
                    grid,
                    &grid.blocks[blk],
                    if gga { 2 } else { 1 },
                    &mut values,
                )
                .map_err(|e| GradientError::Ks(e.into()))?;
                if values.nao() == 0 {
                    continue;
                }
                body(&mut acc, blk, &values, &func, &mut scratch)?;
            }
            Ok(acc)
        })
        .collect()
}

#[allow(clippy::too_many_arguments)]
fn block_gradient(
    grid: &MolecularGrid,
    blk: usize,
    values: &AoValues,
    dens: &[&DMatrix<f64>],
    func: &Functional,
    polarized: bool,
    gga: bool,
    ao_atoms: &[usize],
    out: &mut XcOutput,
    work: &mut PartitionWork,
    wgrad: &mut [[f64; 3]],
    acc: &mut XcGradient,
) -> Result<(), GradientError> {
    let block = &grid.blocks[blk];
    let range = block.range.clone();
    let weights = &grid.weights[range.clone()];
    let np = values.npts();
    let aos = values.aos();
    let na = aos.len();
    let comp = |c: usize| DMatrixView::from_slice(values.component(c), np, na);
    let phi = comp(COMP_VALUE);
    let dphi = [comp(COMP_X), comp(COMP_X + 1), comp(COMP_X + 2)];
    // Per spin channel: T = Φ D, T^l = ∂_lΦ D (GGA), ρ, ∇ρ.
    let nsp = dens.len();
    let mut t: Vec<DMatrix<f64>> = Vec::with_capacity(nsp);
    let mut tl: Vec<[DMatrix<f64>; 3]> = Vec::with_capacity(nsp);
    let mut rho: Vec<Vec<f64>> = Vec::with_capacity(nsp);
    let mut grad: Vec<[Vec<f64>; 3]> = Vec::with_capacity(nsp);
    for d in dens {
        let sub = DMatrix::from_fn(na, na, |i, j| d[(aos[i], aos[j])]);
        let ts = phi * &sub;
        let r: Vec<f64> = (0..np)
            .map(|p| (0..na).map(|j| ts[(p, j)] * phi[(p, j)]).sum())
            .collect();
        let g: [Vec<f64>; 3] = std::array::from_fn(|k| {
            (0..np)
                .map(|p| 2.0 * (0..na).map(|j| ts[(p, j)] * dphi[k][(p, j)]).sum::<f64>())
                .collect()
        });
        if gga {
            tl.push(std::array::from_fn(|l| dphi[l] * &sub));
        }
        t.push(ts);
        rho.push(r);
        grad.push(g);
    }
    let dot = |x: &[Vec<f64>; 3], y: &[Vec<f64>; 3], p: usize| {
        x[0][p] * y[0][p] + x[1][p] * y[1][p] + x[2][p] * y[2][p]
    };
    let (rho_in, sigma_in): (Vec<f64>, Vec<f64>) = if polarized {
        let r = (0..np).flat_map(|p| [rho[0][p], rho[1][p]]).collect();
        let s = if gga {
            (0..np)
                .flat_map(|p| {
                    [
                        dot(&grad[0], &grad[0], p),
                        dot(&grad[0], &grad[1], p),
                        dot(&grad[1], &grad[1], p),
                    ]
                })
                .collect()
        } else {
            Vec::new()
        };
        (r, s)
    } else {
        let s = if gga {
            (0..np).map(|p| dot(&grad[0], &grad[0], p)).collect()
        } else {
            Vec::new()
        };
        (rho[0].clone(), s)
    };
    let input = XcInput {
        rho: &rho_in,
        sigma: &sigma_in,
    };
    func.eval(&input, 1, out).map_err(xc_err)?;
    acc.energy += out.energy(&input, weights).map_err(xc_err)?;
    // Y summed: per AO column (basis-centre term) and over everything (points).
    let owner = block.atom;
    let mut col = vec![[0.0f64; 3]; na];
    for s in 0..nsp {
        let a: Vec<f64> = (0..np)
            .map(|p| weights[p] * out.vrho[if polarized { 2 * p + s } else { p }])
            .collect();
        let c: Option<[Vec<f64>; 3]> = if gga {
            Some(std::array::from_fn(|l| {
                (0..np)
                    .map(|p| {
                        let v = if polarized {
                            let own = if s == 0 { 0 } else { 2 };
                            2.0 * out.vsigma[3 * p + own] * grad[s][l][p]
                                + out.vsigma[3 * p + 1] * grad[1 - s][l][p]
                        } else {
                            2.0 * out.vsigma[p] * grad[0][l][p]
                        };
                        weights[p] * v
                    })
                    .collect()
            }))
        } else {
            None
        };
        accumulate_y(values, &a, c.as_ref(), &t[s], tl.get(s), &mut col);
    }
    for (j, cj) in col.iter().enumerate() {
        let atom = ao_atoms[aos[j]];
        for (k, v) in cj.iter().enumerate() {
            acc.total[atom][k] -= v;
            acc.total[owner][k] += v;
        }
    }
    // Partition-weight derivative.
    if grid.partition().natoms() > 1 {
        for (i, p) in range.enumerate() {
            let f: f64 = if polarized {
                (rho_in[2 * i] + rho_in[2 * i + 1]) * out.e_per_particle[i]
            } else {
                rho_in[i] * out.e_per_particle[i]
            };
            if f == 0.0 {
                continue;
            }
            grid.partition()
                .weight_gradient(grid.points[p], grid.atom_of_point[p], work, wgrad);
            let q = grid.quadrature_weights[p] * f;
            for (c, g) in wgrad.iter().enumerate() {
                for (k, gk) in g.iter().enumerate() {
                    let v = q * gk;
                    acc.total[c][k] += v;
                    acc.grid_weights[c][k] += v;
                }
            }
        }
    }
    Ok(())
}

/// Adds Σ_p Y_pjk to `col[j][k]` for coefficients a_p (weighted ∂f/∂ρ),
/// c_pl (weighted ∂f/∂∇_lρ, GGA) and the block products T = Φ X and
/// T^l = ∂_lΦ X of a spin density matrix X (module docs):
/// Y_pjk = 2 a_p ∂_kφ_j T_pj + 2 Σ_l c_pl [∂_l∂_kφ_j T_pj + ∂_kφ_j T^l_pj].
fn accumulate_y(
    values: &AoValues,
    a: &[f64],
    c: Option<&[Vec<f64>; 3]>,
    t: &DMatrix<f64>,
    tl: Option<&[DMatrix<f64>; 3]>,
    col: &mut [[f64; 3]],
) {
    let np = values.npts();
    let ts = t.as_slice();
    for (j, cj) in col.iter_mut().enumerate() {
        let tj = &ts[j * np..(j + 1) * np];
        for (k, ck) in cj.iter_mut().enumerate() {
            let dk = &values.component(COMP_X + k)[j * np..(j + 1) * np];
            let mut y = 0.0;
            for p in 0..np {
                y += a[p] * dk[p] * tj[p];
            }
            if let (Some(c), Some(tl)) = (c, tl) {
                for l in 0..3 {
                    let h = &values.component(hess_comp(k, l))[j * np..(j + 1) * np];
                    let tlj = &tl[l].as_slice()[j * np..(j + 1) * np];
                    let cl = &c[l];
                    for p in 0..np {
                        y += cl[p] * (h[p] * tj[p] + dk[p] * tlj[p]);
                    }
                }
            }
            *ck += 2.0 * y;
        }
    }
}

/// A spin density matrix X on a block: T = Φ X, ρ, and for GGAs ∇ρ and
/// T^l = ∂_lΦ X.
struct OnBlock {
    t: DMatrix<f64>,
    tl: Option<[DMatrix<f64>; 3]>,
    rho: Vec<f64>,
    grad: [Vec<f64>; 3],
}

fn on_block(values: &AoValues, d: &DMatrix<f64>, gga: bool) -> OnBlock {
    let np = values.npts();
    let aos = values.aos();
    let na = aos.len();
    let comp = |c: usize| DMatrixView::from_slice(values.component(c), np, na);
    let phi = comp(COMP_VALUE);
    let sub = DMatrix::from_fn(na, na, |i, j| d[(aos[i], aos[j])]);
    let t = phi * &sub;
    let (ts, ps) = (t.as_slice(), values.component(COMP_VALUE));
    let mut rho = vec![0.0; np];
    for j in 0..na {
        for p in 0..np {
            rho[p] += ts[j * np + p] * ps[j * np + p];
        }
    }
    let mut grad: [Vec<f64>; 3] = std::array::from_fn(|_| Vec::new());
    let mut tl = None;
    if gga {
        for (k, g) in grad.iter_mut().enumerate() {
            let dk = values.component(COMP_X + k);
            *g = vec![0.0; np];
            for j in 0..na {
                for p in 0..np {
                    g[p] += 2.0 * ts[j * np + p] * dk[j * np + p];
                }
            }
        }
        tl = Some(std::array::from_fn(|l| comp(COMP_X + l) * &sub));
    }
    OnBlock { t, tl, rho, grad }
}

/// The XC gradient of the spin densities (D^α, D^β) (as [`xc_gradient`]
/// for an open shell) and, in the same pass over the grid, for each trial
/// pair (Γ^α, Γ^β) the directional derivative d/dt ∇_R E_xc[D + tΓ] at
/// t = 0 — the explicit XC term of response gradients. Differentiating the
/// module docs' formula along Γ: the coefficients a, c change by
/// δa^σ = w δ(∂f/∂ρ^σ), δc^σ = w δ(2 v_σσσ ∇ρ^σ + v_σαβ ∇ρ^σ̄) (second
/// derivatives of the functional times δρ = ρ\[Γ\], δσ), the products T by
/// those of Γ, and the energy density of the weight term by
/// δf = Σ_σ v_ρσ δρ^σ + Σ_x v_σx δσ_x, so
/// δY = Y(δa, δc; D) + Y(a, c; Γ). AO values, their derivatives and the
/// partition-weight gradient are evaluated once for all. Spin-polarised
/// functionals only.
pub fn xc_gradient_and_directional(
    basis: &BasisSet,
    grid: &MolecularGrid,
    functional: &Functional,
    da: &DMatrix<f64>,
    db: &DMatrix<f64>,
    trials: &[(&DMatrix<f64>, &DMatrix<f64>)],
) -> Result<(XcGradient, Vec<PerAtom>), GradientError> {
    let natoms = basis.natoms();
    let zero = XcGradient {
        total: vec![[0.0; 3]; natoms],
        grid_weights: vec![[0.0; 3]; natoms],
        energy: 0.0,
    };
    let zero_trials = || vec![vec![[0.0; 3]; natoms]; trials.len()];
    if functional.is_hf_only() {
        return Ok((zero, zero_trials()));
    }
    if functional.spin() != Spin::Polarized {
        return Err(GradientError::Input(
            "directional XC gradients need a spin-polarised functional".into(),
        ));
    }
    let gga = functional.family() == Family::Gga;
    let ao_atoms = basis.ao_atoms();
    let init = || (zero.clone(), zero_trials());
    let parts = over_blocks(
        basis,
        grid,
        functional,
        init,
        |acc, blk, values, func, sc| {
            block_directional(
                grid,
                blk,
                values,
                [da, db],
                trials,
                func,
                gga,
                &ao_atoms,
                &mut sc.out,
                &mut sc.work,
                &mut sc.wgrad,
                acc,
            )
        },
    )?;
    let (mut total, mut directional) = (zero, zero_trials());
    for (g, d) in parts {
        total.energy += g.energy;
        for a in 0..natoms {
            for k in 0..3 {
                total.total[a][k] += g.total[a][k];
                total.grid_weights[a][k] += g.grid_weights[a][k];
                for (t, dt) in directional.iter_mut().zip(&d) {
                    t[a][k] += dt[a][k];
                }
            }
        }
    }
    Ok((total, directional))
}

#[allow(clippy::too_many_arguments, clippy::needless_range_loop)]
fn block_directional(
    grid: &MolecularGrid,
    blk: usize,
    values: &AoValues,
    dens: [&DMatrix<f64>; 2],
    trials: &[(&DMatrix<f64>, &DMatrix<f64>)],
    func: &Functional,
    gga: bool,
    ao_atoms: &[usize],
    out: &mut XcOutput,
    work: &mut PartitionWork,
    wgrad: &mut [[f64; 3]],
    acc: &mut (XcGradient, Vec<PerAtom>),
) -> Result<(), GradientError> {
    let block = &grid.blocks[blk];
    let range = block.range.clone();
    let w = &grid.weights[range.clone()];
    let np = values.npts();
    let aos = values.aos();
    let na = aos.len();
    let d = [
        on_block(values, dens[0], gga),
        on_block(values, dens[1], gga),
    ];
    let dot = |x: &[Vec<f64>; 3], y: &[Vec<f64>; 3], p: usize| {
        x[0][p] * y[0][p] + x[1][p] * y[1][p] + x[2][p] * y[2][p]
    };
    let rho_in: Vec<f64> = (0..np).flat_map(|p| [d[0].rho[p], d[1].rho[p]]).collect();
    let sigma_in: Vec<f64> = if gga {
        (0..np)
            .flat_map(|p| {
                [
                    dot(&d[0].grad, &d[0].grad, p),
                    dot(&d[0].grad, &d[1].grad, p),
                    dot(&d[1].grad, &d[1].grad, p),
                ]
            })
            .collect()
    } else {
        Vec::new()
    };
    let input = XcInput {
        rho: &rho_in,
        sigma: &sigma_in,
    };
    func.eval(&input, 2, out).map_err(xc_err)?;
    acc.0.energy += out.energy(&input, w).map_err(xc_err)?;
    // Reference coefficients a^σ, c^σ.
    let coefficients = |s: usize| -> (Vec<f64>, Option<[Vec<f64>; 3]>) {
        let a = (0..np).map(|p| w[p] * out.vrho[2 * p + s]).collect();
        let c = gga.then(|| {
            let own = if s == 0 { 0 } else { 2 };
            std::array::from_fn(|l| {
                (0..np)
                    .map(|p| {
                        w[p] * (2.0 * out.vsigma[3 * p + own] * d[s].grad[l][p]
                            + out.vsigma[3 * p + 1] * d[1 - s].grad[l][p])
                    })
                    .collect()
            })
        });
        (a, c)
    };
    let reference = [coefficients(0), coefficients(1)];
    let owner = block.atom;
    let scatter = |col: &[[f64; 3]], total: &mut [[f64; 3]]| {
        for (j, cj) in col.iter().enumerate() {
            let atom = ao_atoms[aos[j]];
            for (k, v) in cj.iter().enumerate() {
                total[atom][k] -= v;
                total[owner][k] += v;
            }
        }
    };
    let mut col = vec![[0.0f64; 3]; na];
    for s in 0..2 {
        let (a, c) = &reference[s];
        accumulate_y(values, a, c.as_ref(), &d[s].t, d[s].tl.as_ref(), &mut col);
    }
    scatter(&col, &mut acc.0.total);
    let s2 = |x: usize, y: usize| {
        let (a, b) = if x <= y { (x, y) } else { (y, x) };
        [[0, 1, 2], [1, 3, 4], [2, 4, 5]][a][b]
    };
    // Per trial: δY and the weight term's δf.
    let mut df: Vec<Vec<f64>> = Vec::with_capacity(trials.len());
    for (ti, (ga, gb)) in trials.iter().enumerate() {
        let g = [on_block(values, ga, gga), on_block(values, gb, gga)];
        let dsig: Vec<[f64; 3]> = (0..np)
            .map(|p| {
                if gga {
                    [
                        2.0 * dot(&d[0].grad, &g[0].grad, p),
                        dot(&d[0].grad, &g[1].grad, p) + dot(&g[0].grad, &d[1].grad, p),
                        2.0 * dot(&d[1].grad, &g[1].grad, p),
                    ]
                } else {
                    [0.0; 3]
                }
            })
            .collect();
        let dvs: Vec<[f64; 3]> = (0..np)
            .map(|p| {
                let mut v = [0.0; 3];
                if gga {
                    for (x, vx) in v.iter_mut().enumerate() {
                        for t in 0..2 {
                            *vx += out.v2rhosigma[6 * p + 3 * t + x] * g[t].rho[p];
                        }
                        for y in 0..3 {
                            *vx += out.v2sigma2[6 * p + s2(x, y)] * dsig[p][y];
                        }
                    }
                }
                v
            })
            .collect();
        let mut col = vec![[0.0f64; 3]; na];
        for s in 0..2 {
            let da: Vec<f64> = (0..np)
                .map(|p| {
                    let mut v = 0.0;
                    for t in 0..2 {
                        v += out.v2rho2[3 * p + s + t] * g[t].rho[p];
                    }
                    if gga {
                        for x in 0..3 {
                            v += out.v2rhosigma[6 * p + 3 * s + x] * dsig[p][x];
                        }
                    }
                    w[p] * v
                })
                .collect();
            let dc: Option<[Vec<f64>; 3]> = gga.then(|| {
                let own = if s == 0 { 0 } else { 2 };
                std::array::from_fn(|l| {
                    (0..np)
                        .map(|p| {
                            w[p] * (2.0 * dvs[p][own] * d[s].grad[l][p]
                                + 2.0 * out.vsigma[3 * p + own] * g[s].grad[l][p]
                                + dvs[p][1] * d[1 - s].grad[l][p]
                                + out.vsigma[3 * p + 1] * g[1 - s].grad[l][p])
                        })
                        .collect()
                })
            });
            accumulate_y(
                values,
                &da,
                dc.as_ref(),
                &d[s].t,
                d[s].tl.as_ref(),
                &mut col,
            );
            let (a, c) = &reference[s];
            accumulate_y(values, a, c.as_ref(), &g[s].t, g[s].tl.as_ref(), &mut col);
        }
        scatter(&col, &mut acc.1[ti]);
        df.push(
            (0..np)
                .map(|p| {
                    let mut v = out.vrho[2 * p] * g[0].rho[p] + out.vrho[2 * p + 1] * g[1].rho[p];
                    if gga {
                        for x in 0..3 {
                            v += out.vsigma[3 * p + x] * dsig[p][x];
                        }
                    }
                    v
                })
                .collect(),
        );
    }
    // Partition-weight derivative, once per point for the reference and
    // every trial.
    if grid.partition().natoms() > 1 {
        for (i, p) in range.enumerate() {
            let f = (rho_in[2 * i] + rho_in[2 * i + 1]) * out.e_per_particle[i];
            if f == 0.0 && df.iter().all(|v| v[i] == 0.0) {
                continue;
            }
            grid.partition()
                .weight_gradient(grid.points[p], grid.atom_of_point[p], work, wgrad);
            let q = grid.quadrature_weights[p];
            for (c, gw) in wgrad.iter().enumerate() {
                for (k, gk) in gw.iter().enumerate() {
                    let v = q * f * gk;
                    acc.0.total[c][k] += v;
                    acc.0.grid_weights[c][k] += v;
                    for (t, dft) in acc.1.iter_mut().zip(&df) {
                        t[c][k] += q * dft[i] * gk;
                    }
                }
            }
        }
    }
    Ok(())
}
