//! The Boys function F_n(x) = ∫₀¹ t²ⁿ exp(−x t²) dt, the kernel of every
//! Coulomb-type Gaussian integral.
//!
//! # Method
//!
//! * 0 ≤ x ≤ [`X_TABLE_MAX`]: F_N(x) for the highest order N asked for from a
//!   Taylor expansion about the nearest grid point x₀ = k/8,
//!   F_N(x₀ + Δ) = Σ_k F_{N+k}(x₀) (−Δ)ᵏ / k! (|Δ| ≤ 1/16, [`TAYLOR_TERMS`]
//!   terms, truncation below 1e−17 relative), then the downward recursion
//!   F_{n−1}(x) = (2x F_n(x) + e^{−x}) / (2n − 1), which is numerically stable
//!   (it only shrinks relative errors).
//! * x > [`X_TABLE_MAX`]: F_0(x) = ½ √(π/x) (erfc(√x) < 1e−22 is dropped) and
//!   the upward recursion F_{n+1} = ((2n+1) F_n − e^{−x}) / (2x), stable there
//!   for every order up to [`MAX_ORDER`] because e^{−x} ≪ (2n+1) F_n.
//!
//! The grid values are computed once (on first use) in double-double
//! arithmetic from the series F_n(x) = e^{−x} Σ_k (2x)ᵏ / ((2n+1)(2n+3)…(2n+2k+1))
//! (all terms positive, so it is exact up to rounding), with e^{−x} also in
//! double-double. `tests/integrals.rs` checks the result against 50-digit values
//! from mpmath (fixture `tests/data/qc/boys.json`, `scripts/reference/boys.py`)
//! at 1e−14 relative over 0 ≤ n ≤ 32, 0 ≤ x ≤ 1e6.
//!
//! The series and the recursions are textbook material (Helgaker, Jørgensen and
//! Olsen, *Molecular Electronic-Structure Theory*, §9.8).

use std::sync::OnceLock;

/// Highest order supported by [`boys`] (enough for (gg|gg) integrals and their
/// first derivatives).
pub const MAX_ORDER: usize = 32;
/// Number of Taylor terms used between grid points (the evaluation in
/// [`boys`] is written out for exactly this many).
pub const TAYLOR_TERMS: usize = 10;
const _: () = assert!(TAYLOR_TERMS == 10);
/// Grid spacing of the table (exactly representable).
const STEP: f64 = 0.125;
/// The table covers 0 ≤ x ≤ X_TABLE_MAX; beyond it the asymptotic route is used.
pub const X_TABLE_MAX: f64 = 50.0;
const N_GRID: usize = (X_TABLE_MAX / STEP) as usize + 2;
const N_ORDERS: usize = MAX_ORDER + TAYLOR_TERMS + 1;

/// Inverse factorials 1/k! for the Taylor terms.
const INV_FACT: [f64; TAYLOR_TERMS] = [
    1.0,
    1.0,
    0.5,
    1.0 / 6.0,
    1.0 / 24.0,
    1.0 / 120.0,
    1.0 / 720.0,
    1.0 / 5040.0,
    1.0 / 40320.0,
    1.0 / 362880.0,
];

/// 1/(2n−1) for n = 1 ..= MAX_ORDER (index n; entry 0 unused).
fn inv_odd() -> &'static [f64; MAX_ORDER + 1] {
    static T: OnceLock<[f64; MAX_ORDER + 1]> = OnceLock::new();
    T.get_or_init(|| {
        let mut t = [0.0; MAX_ORDER + 1];
        for (n, v) in t.iter_mut().enumerate().skip(1) {
            *v = 1.0 / (2 * n - 1) as f64;
        }
        t
    })
}

fn table() -> &'static [f64] {
    static TABLE: OnceLock<Vec<f64>> = OnceLock::new();
    TABLE.get_or_init(build_table)
}

/// Fill `out[0..=n_max]` with F_0(x) … F_{n_max}(x).
///
/// `x` must be finite and non-negative (it is α|PQ|² inside the integral code;
/// tiny negative rounding noise is treated as 0). `n_max` must not exceed
/// [`MAX_ORDER`] and `out` must hold `n_max + 1` values; both are internal
/// invariants of the integral code, checked in debug builds.
#[inline]
pub fn boys(n_max: usize, x: f64, out: &mut [f64]) {
    debug_assert!(n_max <= MAX_ORDER && out.len() > n_max);
    let x = if x > 0.0 { x } else { 0.0 };
    if x <= X_TABLE_MAX {
        let t = table();
        // 0 ≤ x/STEP + 0.5 ≤ 400.5: the truncating cast cannot overflow
        let k = (x / STEP + 0.5) as u32 as usize;
        let delta = x - k as f64 * STEP;
        let row = &t[k * N_ORDERS..(k + 1) * N_ORDERS];
        let terms = &row[n_max..n_max + TAYLOR_TERMS];
        // Taylor expansion of the top order in m = −Δ, evaluated by Estrin's
        // scheme (short dependency chains; TAYLOR_TERMS = 10).
        let m = -delta;
        let c = |j: usize| terms[j] * INV_FACT[j];
        let (m2, m4) = (m * m, m * m * m * m);
        let p01 = c(0) + c(1) * m;
        let p23 = c(2) + c(3) * m;
        let p45 = c(4) + c(5) * m;
        let p67 = c(6) + c(7) * m;
        let p89 = c(8) + c(9) * m;
        let f = (p01 + p23 * m2) + (p45 + p67 * m2) * m4 + p89 * (m4 * m4);
        out[n_max] = f;
        if n_max > 0 {
            let e = (-x).exp();
            let two_x = 2.0 * x;
            let inv = inv_odd();
            for n in (1..=n_max).rev() {
                out[n - 1] = (two_x * out[n] + e) * inv[n];
            }
        }
    } else {
        out[0] = 0.5 * (std::f64::consts::PI / x).sqrt();
        // e^{−x} < 2e−22 here; relative to F_n (which falls like
        // (2n−1)!!/(2x)^n) its share e^{−x}/(2x F_n) stays below 2e−15 up
        // to n = 6 at x = 50, so only higher orders need it.
        let e = if n_max > 6 { (-x).exp() } else { 0.0 };
        let inv_two_x = 0.5 / x;
        for n in 0..n_max {
            out[n + 1] = ((2 * n + 1) as f64 * out[n] - e) * inv_two_x;
        }
    }
}

/// F_n(x) for a single order (convenience; the integral code uses [`boys`]).
pub fn boys_single(n: usize, x: f64) -> f64 {
    let mut buf = [0.0; MAX_ORDER + 1];
    boys(n, x, &mut buf);
    buf[n]
}

// ---------------------------------------------------------------------------
// Table construction in double-double arithmetic
// ---------------------------------------------------------------------------

/// An unevaluated sum hi + lo with |lo| ≤ ulp(hi)/2.
#[derive(Clone, Copy)]
struct Dd(f64, f64);

fn two_sum(a: f64, b: f64) -> Dd {
    let s = a + b;
    let bb = s - a;
    Dd(s, (a - (s - bb)) + (b - bb))
}
fn quick_two_sum(a: f64, b: f64) -> Dd {
    let s = a + b;
    Dd(s, b - (s - a))
}
fn dd_add(a: Dd, b: Dd) -> Dd {
    let s = two_sum(a.0, b.0);
    let t = two_sum(a.1, b.1);
    let u = quick_two_sum(s.0, s.1 + t.0);
    quick_two_sum(u.0, u.1 + t.1)
}
fn dd_mul(a: Dd, b: Dd) -> Dd {
    let p = a.0 * b.0;
    let e = a.0.mul_add(b.0, -p);
    quick_two_sum(p, e + (a.0 * b.1 + a.1 * b.0))
}
fn dd_mul_f(a: Dd, b: f64) -> Dd {
    let p = a.0 * b;
    let e = a.0.mul_add(b, -p);
    quick_two_sum(p, e + a.1 * b)
}
fn dd_div_f(a: Dd, b: f64) -> Dd {
    let q1 = a.0 / b;
    let r = dd_add(a, dd_mul_f(Dd(q1, 0.0), -b));
    let q2 = r.0 / b;
    let r2 = dd_add(r, dd_mul_f(Dd(q2, 0.0), -b));
    let q3 = r2.0 / b;
    dd_add(quick_two_sum(q1, q2), Dd(q3, 0.0))
}

/// e^{−x} in double-double for 0 ≤ x ≤ 64: Taylor series of e^{−x/1024},
/// squared ten times.
fn dd_exp_neg(x: f64) -> Dd {
    let y = x / 1024.0; // exact
    let mut term = Dd(1.0, 0.0);
    let mut sum = Dd(1.0, 0.0);
    for k in 1..30 {
        term = dd_div_f(dd_mul_f(term, -y), k as f64);
        sum = dd_add(sum, term);
    }
    for _ in 0..10 {
        sum = dd_mul(sum, sum);
    }
    sum
}

fn build_table() -> Vec<f64> {
    let mut t = vec![0.0; N_GRID * N_ORDERS];
    let top = N_ORDERS - 1;
    let mut col = vec![Dd(0.0, 0.0); N_ORDERS];
    for k in 0..N_GRID {
        let x = k as f64 * STEP;
        let e = dd_exp_neg(x);
        // Series for the top order: Σ_k (2x)^k / ((2N+1)(2N+3)…(2N+2k+1)).
        let mut term = dd_div_f(Dd(1.0, 0.0), (2 * top + 1) as f64);
        let mut sum = term;
        let mut j = 1usize;
        loop {
            term = dd_div_f(dd_mul_f(term, 2.0 * x), (2 * top + 2 * j + 1) as f64);
            sum = dd_add(sum, term);
            if term.0 < 1e-34 * sum.0 {
                break;
            }
            j += 1;
        }
        col[top] = dd_mul(sum, e);
        for n in (1..=top).rev() {
            let v = dd_add(dd_mul_f(col[n], 2.0 * x), e);
            col[n - 1] = dd_div_f(v, (2 * n - 1) as f64);
        }
        for n in 0..N_ORDERS {
            t[k * N_ORDERS + n] = col[n].0 + col[n].1;
        }
    }
    t
}

#[cfg(test)]
mod tests {
    use super::*;

    /// F_n(0) = 1/(2n+1) (definition).
    #[test]
    fn values_at_zero() {
        for n in 0..=MAX_ORDER {
            let f = boys_single(n, 0.0);
            assert!((f - 1.0 / (2 * n + 1) as f64).abs() < 1e-16, "n={n}");
        }
    }

    /// F_0(x) = ½√(π/x) erf(√x); at x = 1, erf(1) = 0.8427007929497149 (from memory).
    #[test]
    fn f0_at_one() {
        let f = boys_single(0, 1.0);
        let r = 0.5 * std::f64::consts::PI.sqrt() * 0.842_700_792_949_714_9;
        assert!((f - r).abs() < 2e-16, "{f} vs {r}");
    }
}
