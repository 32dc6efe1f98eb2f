//! Tully's three one-dimensional two-state scattering models,
//! J. Chem. Phys. 93, 1061 (1990), with the published parameters (atomic
//! units) and nuclear mass 2000 electron masses.
//!
//! 1. Simple avoided crossing: V11 = A(1 − e^{−Bx}) for x > 0,
//!    V11 = −A(1 − e^{Bx}) for x < 0, V22 = −V11, V12 = C e^{−Dx²};
//!    A = 0.01, B = 1.6, C = 0.005, D = 1.0.
//! 2. Dual avoided crossing: V11 = 0, V22 = −A e^{−Bx²} + E0, V12 = C e^{−Dx²};
//!    A = 0.10, B = 0.28, C = 0.015, D = 0.06, E0 = 0.05.
//! 3. Extended coupling with reflection: V11 = A, V22 = −A,
//!    V12 = B e^{Cx} for x < 0, V12 = B(2 − e^{−Cx}) for x > 0;
//!    A = 6·10⁻⁴, B = 0.10, C = 0.90.

use nalgebra::DMatrix;

use super::DiabaticModel;

/// Which of the three models.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum TullyModel {
    /// Simple avoided crossing.
    SimpleAvoidedCrossing,
    /// Dual avoided crossing.
    DualAvoidedCrossing,
    /// Extended coupling with reflection.
    ExtendedCoupling,
}

/// One of Tully's models with its nuclear mass.
#[derive(Clone, Debug, PartialEq)]
pub struct Tully {
    /// Which model.
    pub model: TullyModel,
    /// Nuclear mass (electron masses); 2000 in the original paper.
    pub mass: f64,
}

impl Tully {
    /// The model with the published mass of 2000 electron masses.
    pub fn new(model: TullyModel) -> Self {
        Self {
            model,
            mass: 2000.0,
        }
    }

    /// Diabatic matrix elements (V11, V22, V12) and their x-derivatives.
    pub fn elements(&self, x: f64) -> ([f64; 3], [f64; 3]) {
        match self.model {
            TullyModel::SimpleAvoidedCrossing => {
                let (a, b, c, d) = (0.01, 1.6, 0.005, 1.0);
                let (v11, dv11) = if x >= 0.0 {
                    let e = (-b * x).exp();
                    (a * (1.0 - e), a * b * e)
                } else {
                    let e = (b * x).exp();
                    (-a * (1.0 - e), a * b * e)
                };
                let g = c * (-d * x * x).exp();
                ([v11, -v11, g], [dv11, -dv11, -2.0 * d * x * g])
            }
            TullyModel::DualAvoidedCrossing => {
                let (a, b, c, d, e0) = (0.10, 0.28, 0.015, 0.06, 0.05);
                let e = (-b * x * x).exp();
                let g = c * (-d * x * x).exp();
                (
                    [0.0, -a * e + e0, g],
                    [0.0, 2.0 * a * b * x * e, -2.0 * d * x * g],
                )
            }
            TullyModel::ExtendedCoupling => {
                let (a, b, c) = (6e-4, 0.10, 0.90);
                let (v12, dv12) = if x < 0.0 {
                    let e = (c * x).exp();
                    (b * e, b * c * e)
                } else {
                    let e = (-c * x).exp();
                    (b * (2.0 - e), b * c * e)
                };
                ([a, -a, v12], [0.0, 0.0, dv12])
            }
        }
    }

    /// The 2×2 diabatic matrix at x (row-major [[V11, V12], [V12, V22]]).
    pub fn matrix(&self, x: f64) -> [[f64; 2]; 2] {
        let ([v11, v22, v12], _) = self.elements(x);
        [[v11, v12], [v12, v22]]
    }
}

impl DiabaticModel for Tully {
    fn name(&self) -> String {
        match self.model {
            TullyModel::SimpleAvoidedCrossing => "tully-1".into(),
            TullyModel::DualAvoidedCrossing => "tully-2".into(),
            TullyModel::ExtendedCoupling => "tully-3".into(),
        }
    }
    fn n_states(&self) -> usize {
        2
    }
    fn masses(&self) -> Vec<f64> {
        vec![self.mass]
    }
    fn diabatic(&self, q: &[f64], w: &mut DMatrix<f64>, dw: &mut [DMatrix<f64>]) {
        let ([v11, v22, v12], [d11, d22, d12]) = self.elements(q[0]);
        w.copy_from_slice(&[v11, v12, v12, v22]);
        dw[0].copy_from_slice(&[d11, d12, d12, d22]);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Central finite differences of the analytic elements (design §11).
    #[test]
    fn derivatives_match_finite_differences() {
        for model in [
            TullyModel::SimpleAvoidedCrossing,
            TullyModel::DualAvoidedCrossing,
            TullyModel::ExtendedCoupling,
        ] {
            let t = Tully::new(model);
            for &x in &[-7.3, -1.1, -0.2, 0.35, 2.0, 6.5] {
                let h = 1e-5;
                let (_, d) = t.elements(x);
                let (p, _) = t.elements(x + h);
                let (m, _) = t.elements(x - h);
                for k in 0..3 {
                    let fd = (p[k] - m[k]) / (2.0 * h);
                    assert!(
                        (fd - d[k]).abs() < 1e-9,
                        "{model:?} x={x} k={k}: {fd} vs {}",
                        d[k]
                    );
                }
            }
        }
    }

    /// Published asymptotes: model 1 goes to ∓A, model 3's coupling to 2B.
    #[test]
    fn asymptotes() {
        let t1 = Tully::new(TullyModel::SimpleAvoidedCrossing);
        assert!((t1.matrix(-30.0)[0][0] + 0.01).abs() < 1e-15);
        assert!((t1.matrix(30.0)[0][0] - 0.01).abs() < 1e-15);
        let t3 = Tully::new(TullyModel::ExtendedCoupling);
        assert!((t3.matrix(40.0)[0][1] - 0.2).abs() < 1e-15);
        assert!(t3.matrix(-40.0)[0][1].abs() < 1e-15);
    }
}
