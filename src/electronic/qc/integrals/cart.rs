//! Cartesian components, their normalisation, and the Cartesian → real solid
//! harmonic transformation.
//!
//! Raw integrals are computed over x^i y^j z^k e^{−αr²} with the shell's
//! coefficients (which normalise the x^l component). A final per-shell matrix
//! T (n_func × n_cart) maps them to the output functions:
//!
//! * Cartesian: T = diag(√((2l−1)!! / ((2i−1)!!(2j−1)!!(2k−1)!!))), every
//!   component normalised to one;
//! * spherical (l ≥ 2): the real solid harmonics
//!   S_lm = N_lm Σ_{t,u,v} C^{lm}_{tuv} x^{2t+|m|−2(u+v)} y^{2(u+v)} z^{l−2t−|m|},
//!   C^{lm}_{tuv} = (−1)^{t+v−v_m} (1/4)^t (l choose t)(l−t choose |m|+t)(t choose u)(|m| choose 2v),
//!   N_lm = √(2 (l+|m|)! (l−|m|)! / 2^{δ_m0}) / (2^{|m|} l!), v_m = ½ for m < 0
//!   (Helgaker, Jørgensen and Olsen, *Molecular Electronic-Structure Theory*,
//!   eqs. 6.4.47–6.4.50). Their angular norm equals that of x^l, so with the
//!   shell normalisation they are unit-normalised. Order m = −l … l.
//! * p shells stay x, y, z in both modes.

use super::super::basis::{double_factorial_odd, ncart, MAX_L};
use std::sync::OnceLock;

/// Cartesian exponents of the components of angular momentum l, in the order
/// xx, xy, xz, yy, yz, zz (x power descending, then y).
pub fn components(l: usize) -> Vec<[usize; 3]> {
    let mut v = Vec::with_capacity(ncart(l));
    for lx in (0..=l).rev() {
        for ly in (0..=(l - lx)).rev() {
            v.push([lx, ly, l - lx - ly]);
        }
    }
    v
}

/// Cached [`components`] for l ≤ MAX_L + 1 (derivative shells reach l + 1).
pub fn components_table(l: usize) -> &'static [[usize; 3]] {
    static T: OnceLock<Vec<Vec<[usize; 3]>>> = OnceLock::new();
    &T.get_or_init(|| (0..=MAX_L + 1).map(components).collect())[l]
}

/// Index of a Cartesian component within its shell.
#[inline]
pub fn component_index(c: [usize; 3]) -> usize {
    let l = c[0] + c[1] + c[2];
    let ryz = l - c[0]; // y + z
    ryz * (ryz + 1) / 2 + c[2]
}

fn binom(n: i64, k: i64) -> f64 {
    if k < 0 || k > n {
        return 0.0;
    }
    let mut r = 1.0;
    for i in 0..k {
        r = r * (n - i) as f64 / (i + 1) as f64;
    }
    r
}

fn factorial(n: usize) -> f64 {
    (1..=n).fold(1.0, |a, k| a * k as f64)
}

/// Rows m = −l..l of the solid-harmonic coefficients over Cartesian monomials.
fn solid_harmonics(l: usize) -> Vec<f64> {
    let nc = ncart(l);
    let mut t_mat = vec![0.0; (2 * l + 1) * nc];
    let li = l as i64;
    for (row, m) in (-li..=li).enumerate() {
        let am = m.unsigned_abs() as i64;
        let nlm = (2.0 * factorial((li + am) as usize) * factorial((li - am) as usize)
            / if m == 0 { 2.0 } else { 1.0 })
        .sqrt()
            / (2f64.powi(am as i32) * factorial(l));
        let vm2: i64 = if m < 0 { 1 } else { 0 }; // 2 v_m
        for t in 0..=((li - am) / 2) {
            for u in 0..=t {
                // v = v_m + k, k = 0 ..= floor(|m|/2 − v_m)
                let kmax = (am - vm2) / 2;
                for k in 0..=kmax {
                    let v2 = vm2 + 2 * k; // 2v
                    let sign = if (t + k) % 2 == 0 { 1.0 } else { -1.0 };
                    let c = sign
                        * 0.25f64.powi(t as i32)
                        * binom(li, t)
                        * binom(li - t, am + t)
                        * binom(t, u)
                        * binom(am, v2);
                    let px = 2 * t + am - 2 * u - v2;
                    let py = 2 * u + v2;
                    let pz = li - 2 * t - am;
                    if px < 0 || pz < 0 {
                        continue;
                    }
                    let col = component_index([px as usize, py as usize, pz as usize]);
                    t_mat[row * nc + col] += nlm * c;
                }
            }
        }
    }
    t_mat
}

/// Output transformation of a shell: (n_func × n_cart, row major).
pub fn transform(l: usize, pure: bool) -> &'static [f64] {
    static CART: OnceLock<Vec<Vec<f64>>> = OnceLock::new();
    static SPH: OnceLock<Vec<Vec<f64>>> = OnceLock::new();
    if pure && l >= 2 {
        &SPH.get_or_init(|| (0..=MAX_L).map(solid_harmonics).collect())[l]
    } else {
        &CART.get_or_init(|| {
            (0..=MAX_L)
                .map(|l| {
                    let comps = components(l);
                    let n = comps.len();
                    let mut m = vec![0.0; n * n];
                    for (i, c) in comps.iter().enumerate() {
                        m[i * n + i] = (double_factorial_odd(l as i64)
                            / (double_factorial_odd(c[0] as i64)
                                * double_factorial_odd(c[1] as i64)
                                * double_factorial_odd(c[2] as i64)))
                        .sqrt();
                    }
                    m
                })
                .collect()
        })[l]
    }
}

/// Whether the shell's transform is diagonal (Cartesian or l < 2).
#[inline]
pub fn is_diagonal(l: usize, pure: bool) -> bool {
    !(pure && l >= 2)
}
