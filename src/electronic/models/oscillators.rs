//! One-state potentials for integrator tests: the harmonic oscillator
//! V = ½ m ω² (x − x₀)² and the Morse oscillator V = D (1 − e^{−a(x − r_e)})².
//! Each coordinate is one independent copy of the potential.

use nalgebra::DMatrix;

use super::DiabaticModel;

/// Independent harmonic oscillators (atomic units).
#[derive(Clone, Debug, PartialEq)]
pub struct Harmonic {
    /// Mass (electron masses), one per coordinate.
    pub masses: Vec<f64>,
    /// Angular frequency (hartree/ħ), one per coordinate.
    pub omegas: Vec<f64>,
    /// Equilibrium positions (bohr), one per coordinate.
    pub centres: Vec<f64>,
}

impl DiabaticModel for Harmonic {
    fn name(&self) -> String {
        "harmonic".into()
    }
    fn n_states(&self) -> usize {
        1
    }
    fn masses(&self) -> Vec<f64> {
        self.masses.clone()
    }
    fn diabatic(&self, q: &[f64], w: &mut DMatrix<f64>, dw: &mut [DMatrix<f64>]) {
        let mut v = 0.0;
        for (k, &x) in q.iter().enumerate() {
            let k2 = self.masses[k] * self.omegas[k] * self.omegas[k];
            let d = x - self.centres[k];
            v += 0.5 * k2 * d * d;
            dw[k][(0, 0)] = k2 * d;
        }
        w[(0, 0)] = v;
    }
}

/// A Morse oscillator along one coordinate (atomic units).
#[derive(Clone, Debug, PartialEq)]
pub struct Morse {
    /// Mass (electron masses).
    pub mass: f64,
    /// Well depth D (hartree).
    pub depth: f64,
    /// Range parameter a (1/bohr).
    pub alpha: f64,
    /// Equilibrium position r_e (bohr).
    pub r_eq: f64,
}

impl DiabaticModel for Morse {
    fn name(&self) -> String {
        "morse".into()
    }
    fn n_states(&self) -> usize {
        1
    }
    fn masses(&self) -> Vec<f64> {
        vec![self.mass]
    }
    fn diabatic(&self, q: &[f64], w: &mut DMatrix<f64>, dw: &mut [DMatrix<f64>]) {
        let e = (-self.alpha * (q[0] - self.r_eq)).exp();
        w[(0, 0)] = self.depth * (1.0 - e) * (1.0 - e);
        dw[0][(0, 0)] = 2.0 * self.depth * self.alpha * e * (1.0 - e);
    }
}
