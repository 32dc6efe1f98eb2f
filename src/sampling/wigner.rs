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
pub fn sample<R: Rng>(
    omegas: &[f64],
    kt: f64,
    frozen: &[usize],
    rng: &mut R,
) -> (Vec<f64>, Vec<f64>) {
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

/// Remove the total linear momentum and the angular momentum about the
/// centre of mass from Cartesian velocities `v` (3 per atom) at positions `q`
/// (bohr), with atomic `masses` (common practice for sampled initial
/// conditions: a Wigner draw is free of them only to first order). The
/// angular velocity ω = I⁻¹L is taken out as v ← v − ω × (r − R_cm); for a
/// linear geometry the pseudo-inverse of I is used.
pub fn remove_net_momenta(q: &[f64], v: &mut [f64], masses: &[f64]) {
    use nalgebra::{Matrix3, Vector3};
    let n = masses.len();
    let total: f64 = masses.iter().sum();
    if n == 0 || total <= 0.0 {
        return;
    }
    let r = |a: usize| Vector3::new(q[3 * a], q[3 * a + 1], q[3 * a + 2]);
    let vel = |v: &[f64], a: usize| Vector3::new(v[3 * a], v[3 * a + 1], v[3 * a + 2]);
    let com = (0..n).map(|a| r(a) * masses[a]).sum::<Vector3<f64>>() / total;
    let p = (0..n).map(|a| vel(v, a) * masses[a]).sum::<Vector3<f64>>();
    let vcom = p / total;
    for a in 0..n {
        for k in 0..3 {
            v[3 * a + k] -= vcom[k];
        }
    }
    let mut inertia = Matrix3::zeros();
    let mut l = Vector3::zeros();
    for a in 0..n {
        let d = r(a) - com;
        inertia += (Matrix3::identity() * d.norm_squared() - d * d.transpose()) * masses[a];
        l += d.cross(&vel(v, a)) * masses[a];
    }
    let Ok(pinv) = inertia.pseudo_inverse(1e-10 * inertia.norm().max(f64::MIN_POSITIVE)) else {
        return;
    };
    let omega = pinv * l;
    for a in 0..n {
        let d = r(a) - com;
        let w = omega.cross(&d);
        for k in 0..3 {
            v[3 * a + k] -= w[k];
        }
    }
}
