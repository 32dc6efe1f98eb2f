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
    let ao = AoBasis::new(basis).map_err(|e| GradientError::Ks(e.into()))?;
    let ao_atoms = basis.ao_atoms();
    let dt = da + db;
    let dens: Vec<&DMatrix<f64>> = if polarized { vec![da, db] } else { vec![&dt] };
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
    let parts: Vec<Result<XcGradient, GradientError>> = ranges
        .into_par_iter()
        .zip(funcs.into_par_iter())
        .map(|(range, func)| {
            let mut acc = XcGradient {
                total: vec![[0.0; 3]; natoms],
                grid_weights: vec![[0.0; 3]; natoms],
                energy: 0.0,
            };
            let mut values = AoValues::new();
            let mut out = XcOutput::new();
            let mut work = PartitionWork::default();
            let mut wgrad = vec![[0.0; 3]; natoms];
            for blk in range.clone() {
                let block = &grid.blocks[blk];
                ao.eval_block(grid, block, if gga { 2 } else { 1 }, &mut values)
                    .map_err(|e| GradientError::Ks(e.into()))?;
                if values.nao() == 0 {
                    continue;
                }
                block_gradient(
                    grid, blk, &values, &dens, &func, polarized, gga, &ao_atoms, &mut out,
                    &mut work, &mut wgrad, &mut acc,
                )?;
            }
            Ok(acc)
        })
        .collect();
    let mut total = zero;
    for p in parts {
        let p = p?;
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
        let ts = &t[s];
        for j in 0..na {
            for k in 0..3 {
                let mut y = 0.0;
                for p in 0..np {
                    let mut v = 2.0 * a[p] * dphi[k][(p, j)] * ts[(p, j)];
                    if let Some(c) = &c {
                        for l in 0..3 {
                            let hkl = values.get(hess_comp(k, l), j, p);
                            v += 2.0
                                * c[l][p]
                                * (hkl * ts[(p, j)] + dphi[k][(p, j)] * tl[s][l][(p, j)]);
                        }
                    }
                    y += v;
                }
                col[j][k] += y;
            }
        }
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
