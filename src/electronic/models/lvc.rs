//! Linear vibronic coupling (LVC) models read from a TOML file of our own
//! layout.
//!
//! In dimensionless normal coordinates Q (common practice for vibronic models)
//! the diabatic matrix is
//!
//!   W_nn(Q) = E_n + Σ_i ω_i Q_i²/2 + Σ_i κ_i⁽ⁿ⁾ Q_i,
//!   W_nm(Q) = Σ_i λ_i⁽ⁿᵐ⁾ Q_i            (n ≠ m),
//!
//! with kinetic energy Σ_i ω_i P_i²/2. The back end works in mass-weighted
//! coordinates x_i = Q_i/√ω_i with unit mass (atomic units, ħ = 1), where the
//! harmonic term becomes ω_i² x_i²/2 and the linear terms pick up √ω_i.
//! Conical intersections arise wherever two diagonal elements cross and the
//! couplings vanish; they are generic for two or more modes.
//!
//! File layout (energies in eV, states and modes counted from 0):
//!
//! ```toml
//! description = "free text"
//! frequencies_ev = [0.12, 0.20]      # ω_i, one per mode
//! vertical_ev = [0.0, 4.0, 4.3]      # E_n at Q = 0, one per diabatic state
//! [[gradient]]                        # κ_i^(n), any number of entries
//! state = 1
//! mode = 0
//! value_ev = -0.10
//! [[coupling]]                        # λ_i^(nm), any number of entries
//! states = [1, 2]
//! mode = 1
//! value_ev = 0.05
//! [[dipole]]                          # optional: diabatic (transition) dipoles,
//! states = [0, 1]                     # constant in Q (Condon approximation),
//! value_au = [0.0, 0.0, 0.8]          # e·bohr; [n, n] is a permanent dipole
//! ```
//!
//! Adiabatic transition dipoles follow from the diabatic ones by the same
//! rotation as the states: μ^ad_ij = Σ_ab U_ai μ_ab U_bj.

use std::path::Path;

use nalgebra::DMatrix;
use serde::Deserialize;

use super::DiabaticModel;
use crate::units;

/// A parsed and validated LVC model, in atomic units.
#[derive(Clone, Debug, PartialEq)]
pub struct Lvc {
    /// Free-text description from the file.
    pub description: String,
    /// Mode frequencies ω_i (hartree).
    pub omegas: Vec<f64>,
    /// Vertical diabatic energies E_n (hartree).
    pub vertical: Vec<f64>,
    /// Intrastate linear terms (state, mode, κ in hartree).
    pub gradients: Vec<(usize, usize, f64)>,
    /// Interstate linear terms (state n, state m, mode, λ in hartree).
    pub couplings: Vec<(usize, usize, usize, f64)>,
    /// Diabatic dipole matrix elements (state n ≤ state m, e·bohr).
    pub dipoles: Vec<(usize, usize, [f64; 3])>,
}

/// A problem in an LVC model file.
#[derive(Debug, thiserror::Error)]
#[error("{origin}: {message}")]
pub struct LvcError {
    /// File name or label.
    pub origin: String,
    /// What is wrong, with the key or line.
    pub message: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawLvc {
    #[serde(default)]
    description: String,
    frequencies_ev: Vec<f64>,
    vertical_ev: Vec<f64>,
    #[serde(default)]
    gradient: Vec<RawGradient>,
    #[serde(default)]
    coupling: Vec<RawCoupling>,
    #[serde(default)]
    dipole: Vec<RawDipole>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawDipole {
    states: [usize; 2],
    value_au: [f64; 3],
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawGradient {
    state: usize,
    mode: usize,
    value_ev: f64,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCoupling {
    states: [usize; 2],
    mode: usize,
    value_ev: f64,
}

impl Lvc {
    /// Read and validate a model file.
    pub fn from_file(path: &Path) -> Result<Self, LvcError> {
        let origin = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| LvcError {
            origin: origin.clone(),
            message: format!("cannot read: {e}"),
        })?;
        Self::from_toml(&text, &origin)
    }

    /// Parse and validate model text; `origin` names it in messages.
    pub fn from_toml(text: &str, origin: &str) -> Result<Self, LvcError> {
        let err = |message: String| LvcError {
            origin: origin.to_string(),
            message,
        };
        let raw: RawLvc =
            toml::from_str(text).map_err(|e| err(e.to_string().trim_end().to_string()))?;
        let n_modes = raw.frequencies_ev.len();
        let n_states = raw.vertical_ev.len();
        if n_modes == 0 {
            return Err(err(
                "key `frequencies_ev`: at least one mode is needed".into()
            ));
        }
        if n_states == 0 {
            return Err(err("key `vertical_ev`: at least one state is needed".into()));
        }
        if let Some((i, w)) = raw
            .frequencies_ev
            .iter()
            .enumerate()
            .find(|(_, w)| !(**w > 0.0 && w.is_finite()))
        {
            return Err(err(format!(
                "key `frequencies_ev`: mode {i} has frequency {w} eV; frequencies must be positive"
            )));
        }
        if let Some((i, e)) = raw
            .vertical_ev
            .iter()
            .enumerate()
            .find(|(_, e)| !e.is_finite())
        {
            return Err(err(format!(
                "key `vertical_ev`: state {i} has non-finite energy {e}"
            )));
        }
        let mut gradients = Vec::new();
        for (k, g) in raw.gradient.iter().enumerate() {
            let at = format!("[[gradient]] entry {k}");
            if g.state >= n_states {
                return Err(err(format!(
                    "{at}: key `state` = {} but the model has {n_states} states (0–{})",
                    g.state,
                    n_states - 1
                )));
            }
            if g.mode >= n_modes {
                return Err(err(format!(
                    "{at}: key `mode` = {} but the model has {n_modes} modes (0–{})",
                    g.mode,
                    n_modes - 1
                )));
            }
            if !g.value_ev.is_finite() {
                return Err(err(format!("{at}: key `value_ev` is not finite")));
            }
            gradients.push((g.state, g.mode, units::ev_to_hartree(g.value_ev)));
        }
        let mut couplings = Vec::new();
        for (k, c) in raw.coupling.iter().enumerate() {
            let at = format!("[[coupling]] entry {k}");
            let [n, m] = c.states;
            if n >= n_states || m >= n_states {
                return Err(err(format!(
                    "{at}: key `states` = [{n}, {m}] but the model has {n_states} states"
                )));
            }
            if n == m {
                return Err(err(format!(
                    "{at}: key `states` = [{n}, {m}] couples a state to itself; use [[gradient]]"
                )));
            }
            if c.mode >= n_modes {
                return Err(err(format!(
                    "{at}: key `mode` = {} but the model has {n_modes} modes (0–{})",
                    c.mode,
                    n_modes - 1
                )));
            }
            if !c.value_ev.is_finite() {
                return Err(err(format!("{at}: key `value_ev` is not finite")));
            }
            couplings.push((n.min(m), n.max(m), c.mode, units::ev_to_hartree(c.value_ev)));
        }
        let mut dipoles = Vec::new();
        for (k, d) in raw.dipole.iter().enumerate() {
            let at = format!("[[dipole]] entry {k}");
            let [n, m] = d.states;
            if n >= n_states || m >= n_states {
                return Err(err(format!(
                    "{at}: key `states` = [{n}, {m}] but the model has {n_states} states"
                )));
            }
            if d.value_au.iter().any(|v| !v.is_finite()) {
                return Err(err(format!("{at}: key `value_au` is not finite")));
            }
            dipoles.push((n.min(m), n.max(m), d.value_au));
        }
        Ok(Self {
            dipoles,
            description: raw.description,
            omegas: raw
                .frequencies_ev
                .iter()
                .map(|&w| units::ev_to_hartree(w))
                .collect(),
            vertical: raw
                .vertical_ev
                .iter()
                .map(|&e| units::ev_to_hartree(e))
                .collect(),
            gradients,
            couplings,
        })
    }

    /// Number of vibrational modes.
    pub fn n_modes(&self) -> usize {
        self.omegas.len()
    }
}

impl DiabaticModel for Lvc {
    fn name(&self) -> String {
        "lvc".into()
    }
    fn n_states(&self) -> usize {
        self.vertical.len()
    }
    fn masses(&self) -> Vec<f64> {
        vec![1.0; self.omegas.len()]
    }
    fn diabatic_dipoles(&self, _q: &[f64]) -> Option<[DMatrix<f64>; 3]> {
        if self.dipoles.is_empty() {
            return None;
        }
        let n = self.vertical.len();
        let mut out = [
            DMatrix::zeros(n, n),
            DMatrix::zeros(n, n),
            DMatrix::zeros(n, n),
        ];
        for &(a, b, v) in &self.dipoles {
            for k in 0..3 {
                out[k][(a, b)] = v[k];
                out[k][(b, a)] = v[k];
            }
        }
        Some(out)
    }
    fn diabatic(&self, x: &[f64], w: &mut DMatrix<f64>, dw: &mut [DMatrix<f64>]) {
        let harmonic: f64 = x
            .iter()
            .zip(&self.omegas)
            .map(|(x, w)| 0.5 * w * w * x * x)
            .sum();
        w.fill(0.0);
        for (n, e) in self.vertical.iter().enumerate() {
            w[(n, n)] = e + harmonic;
        }
        for (k, d) in dw.iter_mut().enumerate() {
            d.fill(0.0);
            d.fill_diagonal(self.omegas[k] * self.omegas[k] * x[k]);
        }
        for &(n, i, kappa) in &self.gradients {
            let g = kappa * self.omegas[i].sqrt();
            w[(n, n)] += g * x[i];
            dw[i][(n, n)] += g;
        }
        for &(n, m, i, lambda) in &self.couplings {
            let g = lambda * self.omegas[i].sqrt();
            w[(n, m)] += g * x[i];
            w[(m, n)] += g * x[i];
            dw[i][(n, m)] += g;
            dw[i][(m, n)] += g;
        }
    }
}
