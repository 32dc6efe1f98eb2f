//! Basis-function (AO) values and their first and second Cartesian
//! derivatives on blocks of grid points.
//!
//! # Functions
//!
//! The AOs are exactly those of the integral code (same order and
//! normalisation, see [`crate::electronic::qc::basis`]): a shell with
//! coefficients c_p (primitive normalisation included) and exponents α_p has
//! Cartesian components
//!
//! g_c(r) = x^i y^j z^k Σ_p c_p e^{−α_p r²}  (x, y, z relative to the centre),
//!
//! in the order of [`cart::components_table`], and its output functions are
//! φ_f = Σ_c T_fc g_c with T = [`cart::transform`]`(l, pure)` — the same
//! matrix the one-electron integrals apply to their raw Cartesian blocks.
//!
//! Derivatives use, with R0 = Σ c_p e^{−α_p r²}, R1 = Σ (−2α_p) c_p e^{−α_p r²},
//! R2 = Σ 4α_p² c_p e^{−α_p r²}:
//! ∂_x (x^i G) = i x^{i−1} R0 + x^{i+1} R1,
//! ∂_x² (x^i G) = i(i−1) x^{i−2} R0 + (2i+1) x^i R1 + x^{i+2} R2,
//! ∂_x∂_y (x^i y^j G) = i j x^{i−1}y^{j−1} R0 + (i x^{i−1}y^{j+1} + j x^{i+1}y^{j−1}) R1 + x^{i+1}y^{j+1} R2.
//!
//! # Layout
//!
//! [`AoValues`] holds, for one block of `npts` points and the `nao`
//! significant AOs of that block, `ncomp` components (1 for `deriv = 0`;
//! 4 for `deriv = 1`: value, x, y, z; 10 for `deriv = 2`: value, x, y, z,
//! xx, xy, xz, yy, yz, zz — see the `COMP_*` constants). Element
//! (component c, significant AO j, point p) is at `(c·nao + j)·npts + p`:
//! every component is an `npts × nao` **column-major** matrix (points
//! fastest), i.e. `nalgebra::DMatrixView::from_slice(values.component(c),
//! npts, nao)`, ready for X^T W X products.
//!
//! # Screening
//!
//! Each shell gets an extent radius R_s: beyond R_s every value, first and
//! second derivative of its functions is below the threshold (default
//! [`DEFAULT_AO_CUTOFF`] = 10⁻¹²). The bound is T_max Σ_p |c_p| e^{−α_p r²}
//! times the largest of r^l, l r^{l−1} + 2α_p r^{l+1} and
//! l² r^{l−2} + 2(2l+1)α_p r^l + 4α_p² r^{l+2} (|x|, |y|, |z| ≤ r), where T_max
//! is the largest absolute row sum of T; R_s is where it falls to the
//! threshold for good, so it is set by the most diffuse primitives. A shell
//! is evaluated for a block if its centre is closer than R_s plus the block's
//! bounding radius to the block centre; [`AoValues::aos`] lists the AOs kept
//! (ascending), so the caller can work on the compressed sub-matrix.
//! Primitives with α r² > 100 are skipped (e^{−100} ≈ 4·10⁻⁴⁴).
//!
//! No allocation happens inside the point loops; the buffers of
//! [`AoValues`] grow to the largest block and are then reused. [`AoBasis`]
//! is immutable and `Sync`: evaluate blocks in parallel with one
//! [`AoValues`] per thread.
//!
//! ```
//! use flipswarm::chem::{Element, Molecule};
//! use flipswarm::electronic::qc::basis::BasisSet;
//! use flipswarm::electronic::qc::dft::ao_values::{AoBasis, AoValues, COMP_X};
//! use flipswarm::electronic::qc::dft::grid::{GridSpec, MolecularGrid};
//! let h = Element::from_symbol("H").unwrap();
//! let mol = Molecule::from_elements_positions_bohr(&[h, h], &[[0.0, 0.0, 0.0], [0.0, 0.0, 1.4]]).unwrap();
//! let basis = BasisSet::builtin(&mol, "STO-3G").unwrap();
//! let grid = MolecularGrid::build(&basis.nuclei, &GridSpec::level("medium").unwrap()).unwrap();
//! let ao = AoBasis::new(&basis).unwrap();
//! let mut vals = AoValues::new();
//! let mut s00 = 0.0;
//! for block in &grid.blocks {
//!     ao.eval_block(&grid, block, 1, &mut vals).unwrap();
//!     let phi = vals.component(0); // npts × nao, column-major
//!     let _dphi_dx = vals.component(COMP_X);
//!     if let Some(j) = vals.aos().iter().position(|&mu| mu == 0) {
//!         for p in 0..vals.npts() {
//!             let v = phi[j * vals.npts() + p];
//!             s00 += grid.weights[block.range.start + p] * v * v;
//!         }
//!     }
//! }
//! assert!((s00 - 1.0).abs() < 1e-6); // a normalised AO
//! ```

use super::grid::{GridBlock, MolecularGrid};
use crate::electronic::qc::basis::{BasisSet, MAX_L};
use crate::electronic::qc::integrals::cart;
use thiserror::Error;

/// Default screening threshold of AO values and derivatives.
pub const DEFAULT_AO_CUTOFF: f64 = 1e-12;

/// Component index of the value.
pub const COMP_VALUE: usize = 0;
/// Component index of ∂/∂x (∂/∂y and ∂/∂z follow).
pub const COMP_X: usize = 1;
/// Component index of ∂/∂y.
pub const COMP_Y: usize = 2;
/// Component index of ∂/∂z.
pub const COMP_Z: usize = 3;
/// Component index of ∂²/∂x² (then xy, xz, yy, yz, zz).
pub const COMP_XX: usize = 4;
/// Component index of ∂²/∂x∂y.
pub const COMP_XY: usize = 5;
/// Component index of ∂²/∂x∂z.
pub const COMP_XZ: usize = 6;
/// Component index of ∂²/∂y².
pub const COMP_YY: usize = 7;
/// Component index of ∂²/∂y∂z.
pub const COMP_YZ: usize = 8;
/// Component index of ∂²/∂z².
pub const COMP_ZZ: usize = 9;

/// Exponent arguments α r² above which a primitive is skipped.
const EXP_ARG_CUT: f64 = 100.0;

/// Errors of AO evaluation.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum AoError {
    /// Only values (0), first (1) and second (2) derivatives are available.
    #[error("AO derivative order {0} is not available (0, 1 or 2)")]
    InvalidDerivative(usize),
    /// The screening threshold must be finite and ≥ 0.
    #[error("AO screening threshold must be a finite number ≥ 0, got {0}")]
    InvalidThreshold(f64),
    /// A shell above the supported angular momentum.
    #[error("shell {shell} has angular momentum {l}; AO evaluation supports up to {max}")]
    AngularMomentumTooHigh {
        /// Shell index.
        shell: usize,
        /// Its angular momentum.
        l: usize,
        /// The maximum.
        max: usize,
    },
    /// A block that is not part of the grid.
    #[error("block covers points {start}..{end} but the grid has {len} points")]
    BlockOutOfRange {
        /// Block start.
        start: usize,
        /// Block end.
        end: usize,
        /// Points in the grid.
        len: usize,
    },
}

/// Number of components for derivative order `deriv`.
pub fn ncomp(deriv: usize) -> usize {
    match deriv {
        0 => 1,
        1 => 4,
        _ => 10,
    }
}

#[derive(Clone, Debug)]
struct ShellEval {
    l: usize,
    center: [f64; 3],
    exps: Vec<f64>,
    coefs: Vec<f64>,
    offset: usize,
    nfunc: usize,
    comps: &'static [[usize; 3]],
    transform: &'static [f64],
    diagonal: bool,
    extent: f64,
}

/// A basis prepared for evaluation on grid points: shells, transforms and
/// screening radii. Build once per basis (geometry).
#[derive(Clone, Debug)]
pub struct AoBasis {
    shells: Vec<ShellEval>,
    nbf: usize,
    threshold: f64,
}

/// Values (and derivatives) of the significant AOs on one block of points
/// (layout in the module docs). Reuse one per thread across blocks.
#[derive(Clone, Debug, Default)]
pub struct AoValues {
    deriv: usize,
    npts: usize,
    aos: Vec<usize>,
    shells: Vec<usize>,
    data: Vec<f64>,
}

impl AoValues {
    /// Empty buffers.
    pub fn new() -> AoValues {
        AoValues::default()
    }
    /// Derivative order of the last evaluation.
    pub fn deriv(&self) -> usize {
        self.deriv
    }
    /// Number of components stored (1, 4 or 10).
    pub fn ncomp(&self) -> usize {
        ncomp(self.deriv)
    }
    /// Number of points of the block.
    pub fn npts(&self) -> usize {
        self.npts
    }
    /// Number of significant AOs.
    pub fn nao(&self) -> usize {
        self.aos.len()
    }
    /// Global indices of the significant AOs, ascending.
    pub fn aos(&self) -> &[usize] {
        &self.aos
    }
    /// Indices of the significant shells, ascending.
    pub fn shells(&self) -> &[usize] {
        &self.shells
    }
    /// Component `c` as an `npts × nao` column-major matrix.
    pub fn component(&self, c: usize) -> &[f64] {
        let n = self.npts * self.aos.len();
        &self.data[c * n..(c + 1) * n]
    }
    /// All components, component-major.
    pub fn data(&self) -> &[f64] {
        &self.data
    }
    /// Component `c` of significant AO `j` (local index) at point `p`.
    pub fn get(&self, c: usize, j: usize, p: usize) -> f64 {
        self.data[(c * self.aos.len() + j) * self.npts + p]
    }
}

/// Bound on |value|, |first| and |second derivatives| of a shell at radius r.
fn shell_bound(l: usize, exps: &[f64], coefs: &[f64], tmax: f64, r: f64) -> f64 {
    let lf = l as f64;
    let pw = |n: i32| if n < 0 { 0.0 } else { r.powi(n) };
    let li = l as i32;
    let mut b = 0.0;
    for (&a, &c) in exps.iter().zip(coefs) {
        let e = (-a * r * r).exp();
        let v0 = pw(li);
        let v1 = lf * pw(li - 1) + 2.0 * a * pw(li + 1);
        let v2 =
            lf * lf * pw(li - 2) + 2.0 * (2.0 * lf + 1.0) * a * pw(li) + 4.0 * a * a * pw(li + 2);
        b += c.abs() * e * v0.max(v1).max(v2);
    }
    tmax * b
}

/// Radius beyond which the shell bound stays below `thr`.
fn shell_extent(l: usize, exps: &[f64], coefs: &[f64], tmax: f64, thr: f64) -> f64 {
    if thr <= 0.0 {
        return f64::INFINITY;
    }
    let amin = exps.iter().cloned().fold(f64::INFINITY, f64::min);
    // Beyond r0 every term of the bound decreases.
    let r0 = ((l as f64 + 4.0) / (2.0 * amin)).sqrt() + 1.0;
    let g = |r: f64| shell_bound(l, exps, coefs, tmax, r);
    if g(r0) < thr {
        return r0;
    }
    let mut hi = 2.0 * r0;
    while g(hi) >= thr {
        hi *= 2.0;
        if hi > 1e6 {
            return f64::INFINITY;
        }
    }
    let mut lo = r0;
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        if g(mid) >= thr {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    hi
}

impl AoBasis {
    /// Prepare `basis` with the default threshold [`DEFAULT_AO_CUTOFF`].
    pub fn new(basis: &BasisSet) -> Result<AoBasis, AoError> {
        AoBasis::with_threshold(basis, DEFAULT_AO_CUTOFF)
    }

    /// Prepare `basis`; shells whose values and derivatives are below
    /// `threshold` on a whole block are skipped (0 disables screening).
    pub fn with_threshold(basis: &BasisSet, threshold: f64) -> Result<AoBasis, AoError> {
        if !(threshold.is_finite() && threshold >= 0.0) {
            return Err(AoError::InvalidThreshold(threshold));
        }
        let mut shells = Vec::with_capacity(basis.shells.len());
        for (i, s) in basis.shells.iter().enumerate() {
            if s.l > MAX_L {
                return Err(AoError::AngularMomentumTooHigh {
                    shell: i,
                    l: s.l,
                    max: MAX_L,
                });
            }
            let comps = cart::components_table(s.l);
            let transform = cart::transform(s.l, s.pure);
            let nc = comps.len();
            let nfunc = transform.len() / nc;
            let tmax = (0..nfunc)
                .map(|f| {
                    transform[f * nc..(f + 1) * nc]
                        .iter()
                        .map(|t| t.abs())
                        .sum::<f64>()
                })
                .fold(0.0, f64::max);
            let extent = shell_extent(s.l, &s.exponents, &s.coefficients, tmax, threshold);
            shells.push(ShellEval {
                l: s.l,
                center: s.center,
                exps: s.exponents.clone(),
                coefs: s.coefficients.clone(),
                offset: basis.offsets[i],
                nfunc,
                comps,
                transform,
                diagonal: cart::is_diagonal(s.l, s.pure),
                extent,
            });
        }
        Ok(AoBasis {
            shells,
            nbf: basis.nbf,
            threshold,
        })
    }

    /// Number of basis functions.
    pub fn nbf(&self) -> usize {
        self.nbf
    }

    /// The screening threshold.
    pub fn threshold(&self) -> f64 {
        self.threshold
    }

    /// Screening radius of shell `s` (bohr; infinite without screening).
    pub fn extent(&self, s: usize) -> f64 {
        self.shells[s].extent
    }

    /// Shells that may exceed the threshold inside the sphere (centre, radius).
    pub fn significant_shells(&self, center: [f64; 3], radius: f64, out: &mut Vec<usize>) {
        out.clear();
        for (i, s) in self.shells.iter().enumerate() {
            let d = ((s.center[0] - center[0]).powi(2)
                + (s.center[1] - center[1]).powi(2)
                + (s.center[2] - center[2]).powi(2))
            .sqrt();
            if d - radius < s.extent {
                out.push(i);
            }
        }
    }

    /// Evaluate the AOs of grid block `block` (values for `deriv = 0`, plus
    /// gradients for 1, plus second derivatives for 2) into `out`.
    pub fn eval_block(
        &self,
        grid: &MolecularGrid,
        block: &GridBlock,
        deriv: usize,
        out: &mut AoValues,
    ) -> Result<(), AoError> {
        let pts = grid
            .points
            .get(block.range.clone())
            .ok_or(AoError::BlockOutOfRange {
                start: block.range.start,
                end: block.range.end,
                len: grid.len(),
            })?;
        self.eval_in_sphere(pts, block.center, block.radius, deriv, out)
    }

    /// Evaluate at arbitrary points (the bounding sphere is computed here).
    pub fn eval(
        &self,
        points: &[[f64; 3]],
        deriv: usize,
        out: &mut AoValues,
    ) -> Result<(), AoError> {
        let n = points.len().max(1) as f64;
        let mut c = [0.0; 3];
        for p in points {
            for k in 0..3 {
                c[k] += p[k] / n;
            }
        }
        let r = points
            .iter()
            .map(|p| ((p[0] - c[0]).powi(2) + (p[1] - c[1]).powi(2) + (p[2] - c[2]).powi(2)).sqrt())
            .fold(0.0, f64::max);
        self.eval_in_sphere(points, c, r, deriv, out)
    }

    fn eval_in_sphere(
        &self,
        points: &[[f64; 3]],
        center: [f64; 3],
        radius: f64,
        deriv: usize,
        out: &mut AoValues,
    ) -> Result<(), AoError> {
        if deriv > 2 {
            return Err(AoError::InvalidDerivative(deriv));
        }
        let npts = points.len();
        self.significant_shells(center, radius, &mut out.shells);
        out.aos.clear();
        for &s in &out.shells {
            let sh = &self.shells[s];
            out.aos.extend(sh.offset..sh.offset + sh.nfunc);
        }
        out.deriv = deriv;
        out.npts = npts;
        let nao = out.aos.len();
        let nc = ncomp(deriv);
        out.data.clear();
        out.data.resize(nc * nao * npts, 0.0);
        let mut j0 = 0;
        for &s in &out.shells {
            let sh = &self.shells[s];
            eval_shell(sh, points, deriv, nao, j0, &mut out.data);
            j0 += sh.nfunc;
        }
        Ok(())
    }
}

/// Largest Cartesian count (l = MAX_L).
const NCART_MAX: usize = (MAX_L + 1) * (MAX_L + 2) / 2;

fn eval_shell(
    sh: &ShellEval,
    points: &[[f64; 3]],
    deriv: usize,
    nao: usize,
    j0: usize,
    data: &mut [f64],
) {
    let npts = points.len();
    let nc = ncomp(deriv);
    let ncart = sh.comps.len();
    let mut cart_v = [[0.0f64; NCART_MAX]; 10];
    let mut px = [0.0f64; MAX_L + 3];
    let mut py = [0.0f64; MAX_L + 3];
    let mut pz = [0.0f64; MAX_L + 3];
    let lmax = sh.l + deriv;
    for (p, pt) in points.iter().enumerate() {
        let x = pt[0] - sh.center[0];
        let y = pt[1] - sh.center[1];
        let z = pt[2] - sh.center[2];
        let r2 = x * x + y * y + z * z;
        let (mut r0, mut r1, mut r2s) = (0.0, 0.0, 0.0);
        for (&a, &c) in sh.exps.iter().zip(&sh.coefs) {
            let arg = a * r2;
            if arg > EXP_ARG_CUT {
                continue;
            }
            let e = c * (-arg).exp();
            r0 += e;
            if deriv > 0 {
                r1 -= 2.0 * a * e;
                r2s += 4.0 * a * a * e;
            }
        }
        px[0] = 1.0;
        py[0] = 1.0;
        pz[0] = 1.0;
        for k in 1..=lmax {
            px[k] = px[k - 1] * x;
            py[k] = py[k - 1] * y;
            pz[k] = pz[k - 1] * z;
        }
        for (ci, c) in sh.comps.iter().enumerate() {
            let (i, j, k) = (c[0], c[1], c[2]);
            let (x0, y0, z0) = (px[i], py[j], pz[k]);
            cart_v[0][ci] = x0 * y0 * z0 * r0;
            if deriv == 0 {
                continue;
            }
            // i x^{i−1}, x^{i+1} and the like.
            let lower =
                |pw: &[f64; MAX_L + 3], n: usize| if n > 0 { n as f64 * pw[n - 1] } else { 0.0 };
            let (xm, ym, zm) = (lower(&px, i), lower(&py, j), lower(&pz, k));
            let (xp, yp, zp) = (px[i + 1], py[j + 1], pz[k + 1]);
            cart_v[1][ci] = (xm * r0 + xp * r1) * y0 * z0;
            cart_v[2][ci] = (ym * r0 + yp * r1) * x0 * z0;
            cart_v[3][ci] = (zm * r0 + zp * r1) * x0 * y0;
            if deriv == 1 {
                continue;
            }
            let lower2 = |pw: &[f64; MAX_L + 3], n: usize| {
                if n > 1 {
                    (n * (n - 1)) as f64 * pw[n - 2]
                } else {
                    0.0
                }
            };
            let second = |mm: f64, n: usize, p0: f64, pp: f64| {
                mm * r0 + (2 * n + 1) as f64 * p0 * r1 + pp * r2s
            };
            let mixed = |am: f64, ap: f64, bm: f64, bp: f64| {
                am * bm * r0 + (am * bp + ap * bm) * r1 + ap * bp * r2s
            };
            cart_v[4][ci] = second(lower2(&px, i), i, x0, px[i + 2]) * y0 * z0;
            cart_v[5][ci] = mixed(xm, xp, ym, yp) * z0;
            cart_v[6][ci] = mixed(xm, xp, zm, zp) * y0;
            cart_v[7][ci] = second(lower2(&py, j), j, y0, py[j + 2]) * x0 * z0;
            cart_v[8][ci] = mixed(ym, yp, zm, zp) * x0;
            cart_v[9][ci] = second(lower2(&pz, k), k, z0, pz[k + 2]) * x0 * y0;
        }
        for (comp, cv) in cart_v.iter().enumerate().take(nc) {
            let base = comp * nao + j0;
            for f in 0..sh.nfunc {
                let row = &sh.transform[f * ncart..(f + 1) * ncart];
                let v = if sh.diagonal {
                    row[f] * cv[f]
                } else {
                    row.iter().zip(&cv[..ncart]).map(|(t, g)| t * g).sum()
                };
                data[(base + f) * npts + p] = v;
            }
        }
    }
}
