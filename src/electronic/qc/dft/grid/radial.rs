//! Radial quadrature: the Treutler–Ahlrichs M4 mapping with the Chebyshev
//! quadrature of the second kind (J. Chem. Phys. 102, 346 (1995)).
//!
//! On x ∈ (−1, 1) the Chebyshev second-kind nodes are xᵢ = cos θᵢ,
//! θᵢ = iπ/(n+1), i = 1…n, and ∫₋₁¹ g(x) dx ≈ Σᵢ π/(n+1) sin θᵢ g(xᵢ)
//! (the weight π/(n+1) sin²θᵢ of ∫ √(1−x²) f dx, divided by √(1−xᵢ²)).
//! The M4 map sends x to
//!
//! r(x) = ξ/ln 2 · (1+x)^α · ln(2/(1−x)),  α = 0.6,
//!
//! r′(x) = ξ/ln 2 · [α (1+x)^{α−1} ln(2/(1−x)) + (1+x)^α/(1−x)],
//!
//! so ∫₀^∞ r² F(r) dr ≈ Σᵢ wᵢ F(rᵢ) with wᵢ = π/(n+1) sin θᵢ r′(xᵢ) rᵢ².
//! Points are returned from the nucleus outwards.
//!
//! ξ is the atomic scaling factor of the same paper (its table of ξ for
//! H–Kr, values from memory, see [`ta_xi`]).

use std::f64::consts::{LN_2, PI};

/// The exponent α of the M4 mapping (J. Chem. Phys. 102, 346 (1995)).
pub const M4_ALPHA: f64 = 0.6;

/// Treutler–Ahlrichs atomic scaling factors ξ for Z = 1…36
/// (J. Chem. Phys. 102, 346 (1995), table of ξ; values from memory).
const TA_XI: [f64; 36] = [
    0.8, 0.9, // H He
    1.8, 1.4, 1.3, 1.1, 0.9, 0.9, 0.9, 0.9, // Li–Ne
    1.4, 1.3, 1.3, 1.2, 1.1, 1.0, 1.0, 1.0, // Na–Ar
    1.5, 1.4, 1.3, 1.2, 1.2, 1.2, 1.2, 1.2, 1.2, 1.1, 1.1, 1.1, // K–Zn
    1.1, 1.0, 0.9, 0.9, 0.9, 0.9, // Ga–Kr
];

/// ξ of element `z` (1…36), or `None` outside the table.
pub fn ta_xi(z: usize) -> Option<f64> {
    z.checked_sub(1).and_then(|i| TA_XI.get(i)).copied()
}

/// The M4 radius r(x) and its derivative r′(x) for scaling ξ.
#[inline]
pub fn m4_map(x: f64, xi: f64) -> (f64, f64) {
    let a = M4_ALPHA;
    let pre = xi / LN_2;
    let opx = 1.0 + x;
    let lg = (2.0 / (1.0 - x)).ln();
    let opa = opx.powf(a);
    let r = pre * opa * lg;
    let dr = pre * (a * opa / opx * lg + opa / (1.0 - x));
    (r, dr)
}

/// `n` radial nodes and weights for ∫₀^∞ r² F(r) dr, ascending in r
/// (the r² is inside the weights). `n = 0` gives empty vectors.
pub fn treutler_ahlrichs(n: usize, xi: f64) -> (Vec<f64>, Vec<f64>) {
    let mut r = Vec::with_capacity(n);
    let mut w = Vec::with_capacity(n);
    let h = PI / (n as f64 + 1.0);
    // i = n … 1 gives x from near −1 (small r) to near +1 (large r).
    for i in (1..=n).rev() {
        let theta = i as f64 * h;
        let x = theta.cos();
        let (ri, dri) = m4_map(x, xi);
        r.push(ri);
        w.push(h * theta.sin() * dri * ri * ri);
    }
    (r, w)
}
