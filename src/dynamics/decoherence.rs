//! Decoherence corrections applied to the amplitudes after each nuclear step.
//!
//! FSSH keeps the electronic amplitudes fully coherent, so after trajectories
//! leave a coupling region the amplitudes of states they are not on keep
//! acting as if the wavepackets still overlapped (over-coherence). The
//! energy-based decoherence correction (J. Chem. Phys. 126, 134114 (2007))
//! damps every non-active amplitude with the time constant
//!
//!   τ_ja = ħ/|E_j − E_a| · (1 + C/E_kin),   C = 0.1 hartree by default,
//!
//! c_j ← c_j exp(−Δt/τ_ja) for j ≠ a, and rescales the active amplitude,
//! c_a ← c_a [(1 − Σ_{j≠a}|c_j|²)/|c_a|²]^{1/2}, so the norm stays 1.

use num_complex::Complex64;
use serde::{Deserialize, Serialize};

/// The selectable decoherence schemes. New schemes implement [`Decoherence`]
/// and get a variant here (config and files name them).
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub enum DecoherenceScheme {
    /// Fully coherent FSSH.
    None,
    /// Energy-based correction with constant `c` (hartree).
    EnergyBased { c: f64 },
}

/// A decoherence correction. Implementations are stateless or carry their
/// state in the trajectory (so that restarts stay exact).
pub trait Decoherence {
    /// Correct `c` after a step of length `dt` on active state `active`, with
    /// adiabatic energies `energies` and nuclear kinetic energy `kinetic`.
    fn apply(&self, c: &mut [Complex64], active: usize, energies: &[f64], kinetic: f64, dt: f64);
}

impl Decoherence for DecoherenceScheme {
    fn apply(&self, c: &mut [Complex64], active: usize, energies: &[f64], kinetic: f64, dt: f64) {
        match *self {
            DecoherenceScheme::None => {}
            DecoherenceScheme::EnergyBased { c: constant } => {
                energy_based(c, active, energies, kinetic, dt, constant)
            }
        }
    }
}

fn energy_based(
    c: &mut [Complex64],
    active: usize,
    energies: &[f64],
    kinetic: f64,
    dt: f64,
    constant: f64,
) {
    if kinetic <= 0.0 {
        // τ → ∞ as E_kin → 0: no damping at a turning point.
        return;
    }
    let mut others = 0.0;
    for j in (0..c.len()).filter(|&j| j != active) {
        let gap = (energies[j] - energies[active]).abs();
        let rate = gap / (1.0 + constant / kinetic);
        c[j] *= (-dt * rate).exp();
        others += c[j].norm_sqr();
    }
    let pa = c[active].norm_sqr();
    let target = (1.0 - others).max(0.0);
    if pa > 0.0 {
        c[active] *= (target / pa).sqrt();
    } else {
        c[active] = Complex64::new(target.sqrt(), 0.0);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Decay of a non-active population follows exp(−2Δt/τ) exactly, with τ
    /// from the published formula (J. Chem. Phys. 126, 134114 (2007)).
    #[test]
    fn energy_based_rate_and_norm() {
        let mut c = vec![Complex64::new(0.6, 0.0), Complex64::new(0.0, 0.8)];
        let energies = [0.0, 0.05];
        let (kin, dt, cc) = (0.02, 3.0, 0.1);
        DecoherenceScheme::EnergyBased { c: cc }.apply(&mut c, 0, &energies, kin, dt);
        let tau = (1.0 + cc / kin) / 0.05;
        assert!((c[1].norm_sqr() - 0.64 * (-2.0 * dt / tau).exp()).abs() < 1e-15);
        assert!((c[0].norm_sqr() + c[1].norm_sqr() - 1.0).abs() < 1e-15);
        // The phase of each amplitude is untouched.
        assert!(c[0].im.abs() < 1e-300 && c[1].re.abs() < 1e-300);
    }
}
