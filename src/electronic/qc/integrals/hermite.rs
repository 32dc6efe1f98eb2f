//! McMurchie–Davidson building blocks: Hermite expansion coefficients of a
//! Gaussian product and the Hermite Coulomb integrals R_tuv.
//!
//! A product of two Cartesian Gaussians in one direction,
//! x_A^i x_B^j exp(−a x_A² − b x_B²) = exp(−μ X_AB²) Σ_t E^{ij}_t Λ_t(x; p, P),
//! with p = a + b, μ = ab/p and Λ_t Hermite Gaussians, obeys (J. Comput. Phys.
//! 26, 218 (1978); Helgaker, Jørgensen and Olsen, *Molecular
//! Electronic-Structure Theory*, §9.5)
//!
//!   E^{i+1,j}_t = E^{ij}_{t−1}/(2p) + X_PA E^{ij}_t + (t+1) E^{ij}_{t+1},
//!   E^{i,j+1}_t = E^{ij}_{t−1}/(2p) + X_PB E^{ij}_t + (t+1) E^{ij}_{t+1},
//!
//! with E^{00}_0 = 1 here (the exponential prefactor is kept outside). The
//! Coulomb integrals over Hermite Gaussians follow from the Boys function,
//! R^n_000 = (−2α)ⁿ F_n(α R_PC²), and
//!   R^n_{t+1,u,v} = t R^{n+1}_{t−1,u,v} + X_PC R^{n+1}_{tuv} (same for u, v).

use super::super::boys::{boys, MAX_ORDER};
use std::sync::OnceLock;

/// Largest index per direction of a one-dimensional E table.
pub const E_MAX_IJ: usize = 8;
const E_DIM_T: usize = 2 * E_MAX_IJ + 1;

/// E^{ij}_t in one direction for i ≤ imax, j ≤ jmax.
pub struct E1d {
    data: [f64; (E_MAX_IJ + 1) * (E_MAX_IJ + 1) * E_DIM_T],
}

impl E1d {
    /// An empty table.
    pub fn new() -> E1d {
        E1d {
            data: [0.0; (E_MAX_IJ + 1) * (E_MAX_IJ + 1) * E_DIM_T],
        }
    }
    #[inline(always)]
    fn idx(i: usize, j: usize, t: usize) -> usize {
        (i * (E_MAX_IJ + 1) + j) * E_DIM_T + t
    }
    /// E^{ij}_t (zero for t > i + j).
    #[inline(always)]
    pub fn get(&self, i: usize, j: usize, t: usize) -> f64 {
        if t > i + j {
            0.0
        } else {
            self.data[Self::idx(i, j, t)]
        }
    }
    /// Fill for i ≤ imax, j ≤ jmax given 1/(2p), X_PA and X_PB.
    pub fn fill(&mut self, imax: usize, jmax: usize, one_over_2p: f64, xpa: f64, xpb: f64) {
        debug_assert!(imax <= E_MAX_IJ && jmax <= E_MAX_IJ);
        let d = &mut self.data;
        d[Self::idx(0, 0, 0)] = 1.0;
        for i in 0..=imax {
            if i > 0 {
                for t in 0..=i {
                    let mut v = 0.0;
                    if t > 0 {
                        v += one_over_2p * d[Self::idx(i - 1, 0, t - 1)];
                    }
                    if t < i {
                        v += xpa * d[Self::idx(i - 1, 0, t)];
                    }
                    if t + 1 < i {
                        v += (t + 1) as f64 * d[Self::idx(i - 1, 0, t + 1)];
                    }
                    d[Self::idx(i, 0, t)] = v;
                }
            }
            for j in 1..=jmax {
                let n = i + j; // t ≤ n, previous has t ≤ n−1
                for t in 0..=n {
                    let mut v = 0.0;
                    if t > 0 {
                        v += one_over_2p * d[Self::idx(i, j - 1, t - 1)];
                    }
                    if t < n {
                        v += xpb * d[Self::idx(i, j - 1, t)];
                    }
                    if t + 1 < n {
                        v += (t + 1) as f64 * d[Self::idx(i, j - 1, t + 1)];
                    }
                    d[Self::idx(i, j, t)] = v;
                }
            }
        }
    }
}

impl Default for E1d {
    fn default() -> Self {
        Self::new()
    }
}

/// Largest total Hermite order for R (ERI first derivatives of (gg|gg)).
pub const R_MAX_L: usize = 4 * super::super::basis::MAX_L + 1;

/// One step of the R recursion: `r[tgt] = pc[dir]·r[m1] + fac·r[m2]`.
#[derive(Clone, Copy)]
struct ROp {
    tgt: u16,
    m1: u16,
    m2: u16,
    dir: u16,
    fac: f64,
}

/// The recursion as a fixed list of steps for one total order L (cube side
/// L+1), sorted by increasing t+u+v; `upto[m]` counts the steps with
/// t+u+v ≤ m.
struct RProgram {
    ops: Vec<ROp>,
    upto: Vec<usize>,
}

fn r_program(l: usize) -> &'static RProgram {
    static P: OnceLock<Vec<RProgram>> = OnceLock::new();
    &P.get_or_init(|| {
        (0..=R_MAX_L)
            .map(|l| {
                let d = l + 1;
                let idx = |t: usize, u: usize, v: usize| ((t * d + u) * d + v) as u16;
                let mut ops = Vec::new();
                let mut upto = vec![0];
                for m in 1..=l {
                    for t in (0..=m).rev() {
                        for u in (0..=(m - t)).rev() {
                            let v = m - t - u;
                            let (dir, k, lo1, lo2) = if t > 0 {
                                (
                                    0,
                                    t,
                                    idx(t - 1, u, v),
                                    if t > 1 { idx(t - 2, u, v) } else { 0 },
                                )
                            } else if u > 0 {
                                (
                                    1,
                                    u,
                                    idx(0, u - 1, v),
                                    if u > 1 { idx(0, u - 2, v) } else { 0 },
                                )
                            } else {
                                (
                                    2,
                                    v,
                                    idx(0, 0, v - 1),
                                    if v > 1 { idx(0, 0, v - 2) } else { 0 },
                                )
                            };
                            ops.push(ROp {
                                tgt: idx(t, u, v),
                                m1: lo1,
                                m2: lo2,
                                dir,
                                fac: (k - 1) as f64,
                            });
                        }
                    }
                    upto.push(ops.len());
                }
                RProgram { ops, upto }
            })
            .collect()
    })[l]
}

/// Workspace for R_tuv: the result in a cube of side L+1 (index
/// `(t·(L+1) + u)·(L+1) + v`, so offsets of (t,u,v) and (τ,ν,φ) add), and
/// scratch.
pub struct RWork {
    /// R^0_tuv, valid for t+u+v ≤ L.
    pub r: Vec<f64>,
    fvals: [f64; MAX_ORDER + 1],
    /// Side length L+1 of the current cube.
    pub dim: usize,
}

impl RWork {
    /// Workspace for total orders up to [`R_MAX_L`].
    pub fn new() -> RWork {
        let d = R_MAX_L + 1;
        RWork {
            r: vec![0.0; d * d * d],
            fvals: [0.0; MAX_ORDER + 1],
            dim: 1,
        }
    }

    /// Compute R^0_tuv(α, PC) for t+u+v ≤ l_tot, scaled by `scale`.
    ///
    /// The levels n = L … 0 are computed in place: level n of the entry
    /// (t,u,v) needs level n+1 only of entries of lower total order, so
    /// running each level from the highest total order down overwrites
    /// nothing that is still needed.
    #[inline]
    pub fn compute(&mut self, l_tot: usize, alpha: f64, pc: [f64; 3], scale: f64) {
        debug_assert!(l_tot <= R_MAX_L);
        self.dim = l_tot + 1;
        let x = alpha * (pc[0] * pc[0] + pc[1] * pc[1] + pc[2] * pc[2]);
        boys(l_tot, x, &mut self.fvals);
        let m2a = -2.0 * alpha;
        let f = &self.fvals;
        match l_tot {
            0 => {
                self.r[0] = scale * f[0];
                return;
            }
            1 => {
                let a1 = scale * m2a * f[1];
                let r = &mut self.r[..8];
                r[0] = scale * f[0];
                r[4] = pc[0] * a1;
                r[2] = pc[1] * a1;
                r[1] = pc[2] * a1;
                return;
            }
            2 => {
                // cube side 3: index 9t + 3u + v
                let a1 = scale * m2a * f[1];
                let a2 = scale * m2a * m2a * f[2];
                let [x, y, z] = pc;
                let r = &mut self.r[..27];
                r[0] = scale * f[0];
                r[9] = x * a1;
                r[3] = y * a1;
                r[1] = z * a1;
                r[18] = x * x * a2 + a1;
                r[12] = x * y * a2;
                r[10] = x * z * a2;
                r[6] = y * y * a2 + a1;
                r[4] = y * z * a2;
                r[2] = z * z * a2 + a1;
                return;
            }
            _ => {}
        }
        let mut pows = [0.0; R_MAX_L + 1];
        let mut pow = scale;
        for p in pows.iter_mut().take(l_tot + 1) {
            *p = pow;
            pow *= m2a;
        }
        let prog = r_program(l_tot);
        let r = &mut self.r[..self.dim * self.dim * self.dim];
        debug_assert!(prog
            .ops
            .iter()
            .all(|o| (o.tgt.max(o.m1).max(o.m2) as usize) < r.len() && o.dir < 3));
        r[0] = pows[l_tot] * self.fvals[l_tot];
        for n in (0..l_tot).rev() {
            for op in prog.ops[..prog.upto[l_tot - n]].iter().rev() {
                // SAFETY: the program of order l_tot indexes a cube of side
                // l_tot + 1, i.e. below r.len(); dir < 3.
                unsafe {
                    let v = *pc.get_unchecked(op.dir as usize) * *r.get_unchecked(op.m1 as usize)
                        + op.fac * *r.get_unchecked(op.m2 as usize);
                    *r.get_unchecked_mut(op.tgt as usize) = v;
                }
            }
            r[0] = pows[n] * self.fvals[n];
        }
    }
}

impl Default for RWork {
    fn default() -> Self {
        Self::new()
    }
}
