//! The harmonic Wigner distribution, at T = 0 or at temperature T.
//!
//! For one mode of angular frequency ω in mass-weighted coordinates the
//! Wigner function of the thermal harmonic oscillator is a product of
//! Gaussians with (common practice; e.g. M. Hillery, R. F. O'Connell,
//! M. O. Scully and E. P. Wigner, Phys. Rep. 106, 121 (1984))
//!
//!   ⟨Q²⟩ = (ħ/2ω) coth(ħω/2kT),   ⟨P²⟩ = (ħω/2) coth(ħω/2kT),
//!
//! which at T = 0 reduce to the ground state (coth → 1). The mean energy per
//! mode is (ħω/2) coth(ħω/2kT).

use rand::Rng;
use rand_distr::{Distribution, Normal};

/// coth(ħω/2kT), 1 at T = 0 (atomic units; `kt` = k_B T in hartree).
pub fn thermal_factor(omega: f64, kt: f64) -> f64 {
    if kt <= 0.0 {
        return 1.0;
    }
    let x = omega / (2.0 * kt);
    if x > 350.0 {
        1.0
    } else {
        1.0 / x.tanh()
    }
}

/// Standard deviations (σ_Q, σ_P) of a mode (mass-weighted, atomic units).
pub fn widths(omega: f64, kt: f64) -> (f64, f64) {
    let c = thermal_factor(omega, kt);
    ((0.5 * c / omega).sqrt(), (0.5 * c * omega).sqrt())
}

/// One draw (Q, P) per mode; modes listed in `frozen` stay at Q = P = 0.
pub fn sample<R: Rng>(omegas: &[f64], kt: f64, frozen: &[usize], rng: &mut R) -> (Vec<f64>, Vec<f64>) {
    let mut q = vec![0.0; omegas.len()];
    let mut p = vec![0.0; omegas.len()];
    for (k, &w) in omegas.iter().enumerate() {
        if frozen.contains(&k) || w <= 0.0 {
            continue;
        }
        let (sq, sp) = widths(w, kt);
        q[k] = Normal::new(0.0, sq).expect("positive width").sample(rng);
        p[k] = Normal::new(0.0, sp).expect("positive width").sample(rng);
    }
    (q, p)
}
