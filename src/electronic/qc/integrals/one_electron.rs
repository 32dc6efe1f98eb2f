//! One-electron integrals by McMurchie–Davidson: overlap, kinetic energy,
//! Cartesian multipoles and nuclear attraction, plus bra-centre derivatives.
//!
//! Per primitive pair, with p = a + b, P = (aA + bB)/p, K = exp(−ab/p |AB|²):
//! * overlap in one direction s_ij = E^{ij}_0 √(π/p);
//! * kinetic t_ij = −½ [ j(j−1) s_{i,j−2} − 2b(2j+1) s_ij + 4b² s_{i,j+2} ]
//!   (the second derivative acting on the ket);
//! * multipole about C: x_C^e = (x_B + X_BC)^e, so
//!   m^e_ij = Σ_k (e choose k) X_BC^{e−k} s_{i,j+k};
//! * nuclear attraction −Z (2π/p) Σ_tuv E_tuv R_tuv(p, P − C).
//!
//! The derivative of a primitive with respect to its centre raises or lowers
//! one Cartesian power: ∂/∂A_x [x_A^i …] = 2a x_A^{i+1} … − i x_A^{i−1} …,
//! so bra derivatives are combinations of integrals over the shells l ± 1
//! ([`RawShell::raised`], [`RawShell::lowered`]).

use super::cart::{component_index, components_table};
use super::hermite::{E1d, RWork};
use crate::electronic::qc::basis::Shell;
use std::f64::consts::PI;

/// A shell as the kernels see it: angular momentum, centre, exponents and
/// coefficients (normalisation included), Cartesian raw components.
#[derive(Clone, Debug)]
pub struct RawShell {
    /// Angular momentum.
    pub l: usize,
    /// Centre (bohr).
    pub center: [f64; 3],
    /// Exponents.
    pub exps: Vec<f64>,
    /// Coefficients (normalisation included).
    pub coefs: Vec<f64>,
}

impl RawShell {
    /// From a basis shell.
    pub fn from_shell(s: &Shell) -> RawShell {
        RawShell {
            l: s.l,
            center: s.center,
            exps: s.exponents.clone(),
            coefs: s.coefficients.clone(),
        }
    }
    /// The shell l+1 with coefficients 2α c (first term of the centre derivative).
    pub fn raised(&self) -> RawShell {
        RawShell {
            l: self.l + 1,
            center: self.center,
            exps: self.exps.clone(),
            coefs: self
                .exps
                .iter()
                .zip(&self.coefs)
                .map(|(a, c)| 2.0 * a * c)
                .collect(),
        }
    }
    /// The shell l−1 with the same coefficients (None for l = 0).
    pub fn lowered(&self) -> Option<RawShell> {
        (self.l > 0).then(|| RawShell {
            l: self.l - 1,
            center: self.center,
            exps: self.exps.clone(),
            coefs: self.coefs.clone(),
        })
    }
}

/// A one-electron operator.
#[derive(Clone, Copy, Debug)]
pub enum Op1<'a> {
    /// ⟨a|b⟩.
    Overlap,
    /// ⟨a|−½∇²|b⟩.
    Kinetic,
    /// ⟨a|(x−C_x)^ex (y−C_y)^ey (z−C_z)^ez|b⟩.
    Multipole {
        /// Powers.
        powers: [usize; 3],
        /// Origin C.
        origin: [f64; 3],
    },
    /// ⟨a|−Σ_C Z_C/|r−C||b⟩.
    Nuclear {
        /// (Z, position) of the point charges.
        charges: &'a [(f64, [f64; 3])],
    },
}

/// Workspace of the one-electron kernels.
pub struct Work1 {
    ex: E1d,
    ey: E1d,
    ez: E1d,
    r: RWork,
}

impl Work1 {
    /// Allocate once, reuse for all pairs.
    pub fn new() -> Work1 {
        Work1 {
            ex: E1d::new(),
            ey: E1d::new(),
            ez: E1d::new(),
            r: RWork::new(),
        }
    }
}

impl Default for Work1 {
    fn default() -> Self {
        Self::new()
    }
}

fn binom(n: usize, k: usize) -> f64 {
    let mut r = 1.0;
    for i in 0..k {
        r = r * (n - i) as f64 / (i + 1) as f64;
    }
    r
}

/// Raw Cartesian block `[ca][cb]` (row major, `out.len() = ncart(a)·ncart(b)`).
pub fn raw_pair(a: &RawShell, b: &RawShell, op: Op1, w: &mut Work1, out: &mut [f64]) {
    let ca = components_table(a.l);
    let cb = components_table(b.l);
    let ncb = cb.len();
    out[..ca.len() * ncb].fill(0.0);
    let ab = [
        a.center[0] - b.center[0],
        a.center[1] - b.center[1],
        a.center[2] - b.center[2],
    ];
    let r2 = ab[0] * ab[0] + ab[1] * ab[1] + ab[2] * ab[2];
    let jextra = match op {
        Op1::Kinetic => 2,
        Op1::Multipole { powers, .. } => *powers.iter().max().unwrap_or(&0),
        _ => 0,
    };
    for (&ea, &cca) in a.exps.iter().zip(&a.coefs) {
        for (&eb, &ccb) in b.exps.iter().zip(&b.coefs) {
            let p = ea + eb;
            let mu = ea * eb / p;
            let k = cca * ccb * (-mu * r2).exp();
            if k == 0.0 {
                continue;
            }
            let pc = [
                (ea * a.center[0] + eb * b.center[0]) / p,
                (ea * a.center[1] + eb * b.center[1]) / p,
                (ea * a.center[2] + eb * b.center[2]) / p,
            ];
            let o2p = 0.5 / p;
            w.ex.fill(
                a.l,
                b.l + jextra,
                o2p,
                pc[0] - a.center[0],
                pc[0] - b.center[0],
            );
            w.ey.fill(
                a.l,
                b.l + jextra,
                o2p,
                pc[1] - a.center[1],
                pc[1] - b.center[1],
            );
            w.ez.fill(
                a.l,
                b.l + jextra,
                o2p,
                pc[2] - a.center[2],
                pc[2] - b.center[2],
            );
            let sq = (PI / p).sqrt();
            match op {
                Op1::Overlap => {
                    let pref = k * sq * sq * sq;
                    for (ia, xa) in ca.iter().enumerate() {
                        for (ib, xb) in cb.iter().enumerate() {
                            out[ia * ncb + ib] += pref
                                * w.ex.get(xa[0], xb[0], 0)
                                * w.ey.get(xa[1], xb[1], 0)
                                * w.ez.get(xa[2], xb[2], 0);
                        }
                    }
                }
                Op1::Kinetic => {
                    let pref = k * sq * sq * sq;
                    let es = [&w.ex, &w.ey, &w.ez];
                    let kin = |e: &E1d, i: usize, j: usize| -> f64 {
                        let mut t = -2.0 * eb * (2 * j + 1) as f64 * e.get(i, j, 0)
                            + 4.0 * eb * eb * e.get(i, j + 2, 0);
                        if j >= 2 {
                            t += (j * (j - 1)) as f64 * e.get(i, j - 2, 0);
                        }
                        -0.5 * t
                    };
                    for (ia, xa) in ca.iter().enumerate() {
                        for (ib, xb) in cb.iter().enumerate() {
                            let s = [
                                es[0].get(xa[0], xb[0], 0),
                                es[1].get(xa[1], xb[1], 0),
                                es[2].get(xa[2], xb[2], 0),
                            ];
                            let t = [
                                kin(es[0], xa[0], xb[0]),
                                kin(es[1], xa[1], xb[1]),
                                kin(es[2], xa[2], xb[2]),
                            ];
                            out[ia * ncb + ib] += pref
                                * (t[0] * s[1] * s[2] + s[0] * t[1] * s[2] + s[0] * s[1] * t[2]);
                        }
                    }
                }
                Op1::Multipole { powers, origin } => {
                    let pref = k * sq * sq * sq;
                    let es = [&w.ex, &w.ey, &w.ez];
                    let xbc = [
                        b.center[0] - origin[0],
                        b.center[1] - origin[1],
                        b.center[2] - origin[2],
                    ];
                    let mom = |d: usize, i: usize, j: usize| -> f64 {
                        let e = powers[d];
                        let mut s = 0.0;
                        for kk in 0..=e {
                            s += binom(e, kk)
                                * xbc[d].powi((e - kk) as i32)
                                * es[d].get(i, j + kk, 0);
                        }
                        s
                    };
                    for (ia, xa) in ca.iter().enumerate() {
                        for (ib, xb) in cb.iter().enumerate() {
                            out[ia * ncb + ib] += pref
                                * mom(0, xa[0], xb[0])
                                * mom(1, xa[1], xb[1])
                                * mom(2, xa[2], xb[2]);
                        }
                    }
                }
                Op1::Nuclear { charges } => {
                    let lt = a.l + b.l;
                    for &(z, c) in charges {
                        let pcv = [pc[0] - c[0], pc[1] - c[1], pc[2] - c[2]];
                        w.r.compute(lt, p, pcv, -z * 2.0 * PI / p * k);
                        let d = w.r.dim;
                        let r = &w.r.r;
                        for (ia, xa) in ca.iter().enumerate() {
                            for (ib, xb) in cb.iter().enumerate() {
                                let mut s = 0.0;
                                for t in 0..=(xa[0] + xb[0]) {
                                    let et = w.ex.get(xa[0], xb[0], t);
                                    for u in 0..=(xa[1] + xb[1]) {
                                        let etu = et * w.ey.get(xa[1], xb[1], u);
                                        let base = (t * d + u) * d;
                                        for v in 0..=(xa[2] + xb[2]) {
                                            s += etu * w.ez.get(xa[2], xb[2], v) * r[base + v];
                                        }
                                    }
                                }
                                out[ia * ncb + ib] += s;
                            }
                        }
                    }
                }
            }
        }
    }
}

/// Raw bra-centre derivative blocks: `out[d]` = ⟨∂a/∂A_d|op|b⟩ as `[ca][cb]`.
pub fn raw_pair_bra_derivative(
    a: &RawShell,
    b: &RawShell,
    op: Op1,
    w: &mut Work1,
    up_buf: &mut [f64],
    down_buf: &mut [f64],
    out: [&mut [f64]; 3],
) {
    let ca = components_table(a.l);
    let ncb = components_table(b.l).len();
    let up = a.raised();
    raw_pair(&up, b, op, w, up_buf);
    let down = a.lowered();
    if let Some(ds) = &down {
        raw_pair(ds, b, op, w, down_buf);
    }
    let [o0, o1, o2] = out;
    let outs = [o0, o1, o2];
    for (d, o) in outs.into_iter().enumerate() {
        for (ia, xa) in ca.iter().enumerate() {
            let mut xu = *xa;
            xu[d] += 1;
            let iu = component_index(xu);
            for ib in 0..ncb {
                let mut v = up_buf[iu * ncb + ib];
                if xa[d] > 0 {
                    let mut xd = *xa;
                    xd[d] -= 1;
                    let idn = component_index(xd);
                    v -= xa[d] as f64 * down_buf[idn * ncb + ib];
                }
                o[ia * ncb + ib] = v;
            }
        }
    }
}
