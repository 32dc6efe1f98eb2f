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

/// Workspace for R_tuv: the result in a cube of side L+1 (index
/// `(t·(L+1) + u)·(L+1) + v`, so offsets of (t,u,v) and (τ,ν,φ) add), and
/// scratch.
pub struct RWork {
    /// R^0_tuv, valid for t+u+v ≤ L.
    pub r: Vec<f64>,
    scratch: Vec<f64>,
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
            scratch: vec![0.0; d * d * d],
            fvals: [0.0; MAX_ORDER + 1],
            dim: 1,
        }
    }

    /// Compute R^0_tuv(α, PC) for t+u+v ≤ l_tot, scaled by `scale`.
    pub fn compute(&mut self, l_tot: usize, alpha: f64, pc: [f64; 3], scale: f64) {
        debug_assert!(l_tot <= R_MAX_L);
        let d = l_tot + 1;
        self.dim = d;
        let x = alpha * (pc[0] * pc[0] + pc[1] * pc[1] + pc[2] * pc[2]);
        boys(l_tot, x, &mut self.fvals);
        // Ping-pong between two buffers: level n needs level n+1 only.
        let m2a = -2.0 * alpha;
        let mut pow = scale;
        let mut pows = [0.0; R_MAX_L + 1];
        for p in pows.iter_mut().take(l_tot + 1) {
            *p = pow;
            pow *= m2a;
        }
        let idx = |t: usize, u: usize, v: usize| (t * d + u) * d + v;
        let (mut cur, mut nxt) = (
            std::mem::take(&mut self.r),
            std::mem::take(&mut self.scratch),
        );
        // `nxt` holds level n+1; `cur` receives level n.
        for n in (0..=l_tot).rev() {
            let lmax = l_tot - n;
            cur[0] = pows[n] * self.fvals[n];
            for t in 0..=lmax {
                for u in 0..=(lmax - t) {
                    for v in 0..=(lmax - t - u) {
                        if t + u + v == 0 {
                            continue;
                        }
                        let val = if t > 0 {
                            let mut s = pc[0] * nxt[idx(t - 1, u, v)];
                            if t > 1 {
                                s += (t - 1) as f64 * nxt[idx(t - 2, u, v)];
                            }
                            s
                        } else if u > 0 {
                            let mut s = pc[1] * nxt[idx(0, u - 1, v)];
                            if u > 1 {
                                s += (u - 1) as f64 * nxt[idx(0, u - 2, v)];
                            }
                            s
                        } else {
                            let mut s = pc[2] * nxt[idx(0, 0, v - 1)];
                            if v > 1 {
                                s += (v - 1) as f64 * nxt[idx(0, 0, v - 2)];
                            }
                            s
                        };
                        cur[idx(t, u, v)] = val;
                    }
                }
            }
            if n > 0 {
                std::mem::swap(&mut cur, &mut nxt);
            }
        }
        // Level 0 is in `cur`.
        self.r = cur;
        self.scratch = nxt;
    }
}

impl Default for RWork {
    fn default() -> Self {
        Self::new()
    }
}
