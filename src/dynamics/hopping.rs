//! Surface hops: choosing the target state and conserving energy.
//!
//! A hop from a to j changes the potential energy by ΔE = E_j − E_a. The
//! velocities change along a direction u (the coupling vector d_aj, or the
//! momentum m·v for velocity rescaling), v' = v − γ u/m, with γ the root of
//!
//!   a γ² − b γ + ΔE = 0,   a = ½ Σ u²/m,   b = Σ v·u,
//!
//! closest to zero, which makes ½Σm v'² = ½Σm v² − ΔE exactly. No real root
//! means the hop is frustrated (not enough kinetic energy along u).

use serde::{Deserialize, Serialize};

/// Direction along which velocities are adjusted at a hop.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum HopDirection {
    /// Along the nonadiabatic coupling vector d_aj (common practice).
    Coupling,
    /// Uniform rescaling of the velocity.
    Velocity,
    /// Along the difference of the two states' gradients, ∇E_to − ∇E_from
    /// (one direction of the branching plane; needs no coupling vectors).
    GradientDifference,
}

/// What to do when a hop is frustrated.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum FrustratedHops {
    /// Stay on the active state with unchanged velocity.
    Keep,
    /// Stay, and reverse the velocity component along the hop direction
    /// (mass-weighted), which keeps the kinetic energy.
    Reflect,
}

/// Pick the target of a hop from the probabilities `g` and a uniform `xi`
/// in [0, 1): the first j with ξ < Σ_{k≤j} g_k.
pub fn choose_target(g: &[f64], active: usize, xi: f64) -> Option<usize> {
    let mut cumulative = 0.0;
    for (j, &p) in g.iter().enumerate() {
        if j == active {
            continue;
        }
        cumulative += p;
        if xi < cumulative {
            return Some(j);
        }
    }
    None
}

/// Try to adjust `v` for a potential-energy change `delta_e` along `u`.
/// Returns `true` and updates `v` when the hop is allowed.
pub fn adjust_velocity(v: &mut [f64], masses: &[f64], u: &[f64], delta_e: f64) -> bool {
    let a: f64 = u.iter().zip(masses).map(|(u, m)| 0.5 * u * u / m).sum();
    let b: f64 = v.iter().zip(u).map(|(v, u)| v * u).sum();
    if a <= 0.0 || !a.is_finite() {
        return delta_e == 0.0;
    }
    let disc = b * b - 4.0 * a * delta_e;
    if disc < 0.0 {
        return false;
    }
    let root = disc.sqrt();
    let gamma = if b >= 0.0 {
        (b - root) / (2.0 * a)
    } else {
        (b + root) / (2.0 * a)
    };
    for ((v, u), m) in v.iter_mut().zip(u).zip(masses) {
        *v -= gamma * u / m;
    }
    true
}

/// Reverse the mass-weighted velocity component along `u`.
pub fn reflect_velocity(v: &mut [f64], masses: &[f64], u: &[f64]) {
    let num: f64 = v.iter().zip(u).map(|(v, u)| v * u).sum();
    let den: f64 = u.iter().zip(masses).map(|(u, m)| u * u / m).sum();
    if den > 0.0 {
        let k = 2.0 * num / den;
        for ((v, u), m) in v.iter_mut().zip(u).zip(masses) {
            *v -= k * u / m;
        }
    }
}

/// Nuclear kinetic energy ½ Σ m v².
pub fn kinetic_energy(v: &[f64], masses: &[f64]) -> f64 {
    v.iter().zip(masses).map(|(v, m)| 0.5 * m * v * v).sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn adjustment_conserves_energy_and_keeps_perpendicular_part() {
        let masses = [2.0, 3.0, 5.0];
        let u = [0.3, -0.1, 0.2];
        for &de in &[0.01, -0.02, 0.0] {
            let mut v = vec![0.2, 0.1, -0.05];
            let k0 = kinetic_energy(&v, &masses);
            assert!(adjust_velocity(&mut v, &masses, &u, de));
            assert!((kinetic_energy(&v, &masses) - (k0 - de)).abs() < 1e-15);
        }
        let mut v = vec![0.001, 0.0, 0.0];
        assert!(!adjust_velocity(&mut v, &masses, &u, 1.0));
        assert_eq!(v, vec![0.001, 0.0, 0.0]);
    }

    #[test]
    fn reflection_keeps_kinetic_energy() {
        let masses = [2.0, 3.0];
        let mut v = vec![0.4, -0.3];
        let k0 = kinetic_energy(&v, &masses);
        reflect_velocity(&mut v, &masses, &[1.0, 0.5]);
        assert!((kinetic_energy(&v, &masses) - k0).abs() < 1e-15);
    }

    #[test]
    fn target_choice_is_cumulative() {
        let g = [0.0, 0.1, 0.2];
        assert_eq!(choose_target(&g, 0, 0.05), Some(1));
        assert_eq!(choose_target(&g, 0, 0.25), Some(2));
        assert_eq!(choose_target(&g, 0, 0.31), None);
    }
}
