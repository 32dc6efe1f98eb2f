//! Absorption spectra by the nuclear-ensemble approach (Theor. Chem. Acc.
//! 131, 1237 (2012), from memory): every sampled geometry i contributes its
//! vertical transitions 0 → n with energy ΔE_in and oscillator strength f_in,
//! each broadened by a normalised line shape g:
//!
//!   σ(E) = (π e² ħ / (2 m_e c ε₀)) · (1/N) Σ_i Σ_n f_in g(E − ΔE_in),
//!
//! the cross section per molecule. The prefactor equals 2π² α ħ²/m_e
//! (e²/4πε₀ = α ħ c), 1.0976 eV·Å² with CODATA 2018 constants, so the sum
//! rule ∫ σ(E) dE = 1.0976 eV·Å² · (1/N) Σ f holds for any normalised g.
//! The molar (decadic) absorption coefficient is ε = N_A σ / (1000 ln 10)
//! with σ in cm², i.e. ε \[M⁻¹ cm⁻¹\] = σ \[Å²\] · 10⁻¹⁶ N_A / (1000 ln 10)
//! (Beer–Lambert with decadic absorbance, common practice).
//!
//! Line shapes (half width at half maximum δ): Gaussian
//! g(x) = √(ln 2/π)/δ · exp(−ln 2 · x²/δ²); Lorentzian g(x) = (δ/π)/(x² + δ²).
//! The per-state contributions σ_n(E) sum to σ(E).

use crate::units;

/// Line shape of one transition.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum LineShape {
    /// Gaussian.
    Gaussian,
    /// Lorentzian.
    Lorentzian,
}

/// π e² ħ / (2 m_e c ε₀) in eV·Å² (from CODATA 2018 through [`units`]).
pub fn cross_section_prefactor_ev_a2() -> f64 {
    // 2π² α ħ²/m_e in atomic units is 2π² α (hartree·bohr²).
    let alpha = 1.0 / units::SPEED_OF_LIGHT_AU;
    2.0 * std::f64::consts::PI.powi(2)
        * alpha
        * units::HARTREE_IN_EV
        * units::BOHR_IN_ANGSTROM.powi(2)
}

/// ε (M⁻¹ cm⁻¹) per σ (Å²).
pub fn molar_absorption_per_cross_section() -> f64 {
    1e-16 * units::AVOGADRO_PER_MOL / (1000.0 * std::f64::consts::LN_10)
}

/// Normalised line shape value at offset `x` (eV) for HWHM `hwhm` (eV).
pub fn line(shape: LineShape, x: f64, hwhm: f64) -> f64 {
    match shape {
        LineShape::Gaussian => {
            let ln2 = std::f64::consts::LN_2;
            (ln2 / std::f64::consts::PI).sqrt() / hwhm * (-ln2 * x * x / (hwhm * hwhm)).exp()
        }
        LineShape::Lorentzian => hwhm / std::f64::consts::PI / (x * x + hwhm * hwhm),
    }
}

/// A computed spectrum on an energy grid.
#[derive(Clone, Debug, PartialEq)]
pub struct Spectrum {
    /// Photon energies (eV).
    pub energies_ev: Vec<f64>,
    /// σ(E) (Å²), total.
    pub cross_section_a2: Vec<f64>,
    /// σ_n(E) (Å²) per final state n (index 0 unused: the ground state).
    pub per_state_a2: Vec<Vec<f64>>,
}

impl Spectrum {
    /// ε(E) (M⁻¹ cm⁻¹).
    pub fn molar_absorption(&self) -> Vec<f64> {
        let k = molar_absorption_per_cross_section();
        self.cross_section_a2.iter().map(|s| s * k).collect()
    }

    /// ∫ σ dE (eV·Å²) by the trapezoidal rule.
    pub fn integral(&self) -> f64 {
        self.energies_ev
            .windows(2)
            .zip(self.cross_section_a2.windows(2))
            .map(|(e, s)| 0.5 * (e[1] - e[0]) * (s[0] + s[1]))
            .sum()
    }

    /// CSV: energy, wavelength, σ, ε, then σ_n per state.
    pub fn to_csv(&self) -> String {
        let ns = self.per_state_a2.len();
        let mut s =
            String::from("energy_ev,wavelength_nm,cross_section_a2,molar_absorption_m-1cm-1");
        for n in 1..ns {
            s.push_str(&format!(",cross_section_state{n}_a2"));
        }
        s.push('\n');
        let eps = self.molar_absorption();
        // hc = 1239.84198 eV nm (CODATA 2018 through the units table).
        let hc_ev_nm =
            units::PLANCK_J_S * units::SPEED_OF_LIGHT_SI / units::ELEMENTARY_CHARGE_C * 1e9;
        for (k, &e) in self.energies_ev.iter().enumerate() {
            s.push_str(&format!(
                "{e:.6},{:.4},{:.8e},{:.8e}",
                hc_ev_nm / e,
                self.cross_section_a2[k],
                eps[k]
            ));
            for n in 1..ns {
                s.push_str(&format!(",{:.8e}", self.per_state_a2[n][k]));
            }
            s.push('\n');
        }
        s
    }
}

/// σ(E) on `grid` (eV) from transitions `(state, ΔE in eV, f)` of `n_geometries`
/// geometries with `n_states` states.
pub fn spectrum(
    transitions: &[(usize, f64, f64)],
    n_geometries: usize,
    n_states: usize,
    shape: LineShape,
    hwhm_ev: f64,
    grid: &[f64],
) -> Spectrum {
    let pref = cross_section_prefactor_ev_a2() / n_geometries.max(1) as f64;
    let mut per = vec![vec![0.0; grid.len()]; n_states];
    for &(n, de, f) in transitions {
        for (k, &e) in grid.iter().enumerate() {
            per[n][k] += pref * f * line(shape, e - de, hwhm_ev);
        }
    }
    let total = (0..grid.len())
        .map(|k| per.iter().map(|p| p[k]).sum())
        .collect();
    Spectrum {
        energies_ev: grid.to_vec(),
        cross_section_a2: total,
        per_state_a2: per,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Analytic single line (textbook normalised Gaussian and Lorentzian): the
    // peak height is pref·f·g(0) and the integral over ±40 HWHM is pref·f
    // (Gaussian) or pref·f·(2/π)·atan(40) (Lorentzian).
    #[test]
    fn a_single_line_is_reproduced() {
        let pref = cross_section_prefactor_ev_a2();
        let grid: Vec<f64> = (0..=8000).map(|k| 2.0 + 4.0 * k as f64 / 8000.0).collect();
        for (shape, g0, frac) in [
            (
                LineShape::Gaussian,
                (std::f64::consts::LN_2 / std::f64::consts::PI).sqrt() / 0.05,
                1.0,
            ),
            (
                LineShape::Lorentzian,
                1.0 / (std::f64::consts::PI * 0.05),
                2.0 / std::f64::consts::PI * 40.0f64.atan(),
            ),
        ] {
            let sp = spectrum(&[(1, 4.0, 0.2)], 1, 2, shape, 0.05, &grid);
            let peak = sp.cross_section_a2[4000];
            assert!((peak - pref * 0.2 * g0).abs() < 1e-12 * peak, "{shape:?}");
            assert!(
                (sp.integral() / (pref * 0.2 * frac) - 1.0).abs() < 1e-6,
                "{shape:?}: {}",
                sp.integral()
            );
            // half maximum at ±HWHM
            let half = sp.cross_section_a2[4000 + 100];
            assert!(
                (half / peak - 0.5).abs() < 1e-9,
                "{shape:?}: {}",
                half / peak
            );
        }
    }

    #[test]
    fn prefactor_is_the_textbook_value() {
        // π e² ħ/(2 m_e c ε₀) = 1.0976 eV·Å² (common practice; equivalently
        // ∫σ dν = (π e²/m_e c) f = 2.654e-2 cm² s⁻¹ · f in Gaussian units).
        assert!(
            (cross_section_prefactor_ev_a2() - 1.0976).abs() < 1e-3,
            "{}",
            cross_section_prefactor_ev_a2()
        );
    }
}
