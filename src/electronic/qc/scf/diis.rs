//! Pulay's direct inversion in the iterative subspace (DIIS) for Fock
//! matrices (Chem. Phys. Lett. 73, 393 (1980); J. Comput. Chem. 3, 556
//! (1982), from memory).
//!
//! Given Fock matrices F_i and error vectors e_i (the orbital gradient, the
//! commutator F D S − S D F in an orthonormal basis), the extrapolated Fock
//! matrix is Σ c_i F_i with the c_i minimising |Σ c_i e_i|² subject to
//! Σ c_i = 1. Several matrices per entry (α and β) are extrapolated with one
//! set of coefficients; their error vectors are concatenated.

use nalgebra::{DMatrix, DVector};

/// A DIIS subspace of at most `capacity` entries.
#[derive(Clone, Debug)]
pub struct Diis {
    capacity: usize,
    focks: Vec<Vec<DMatrix<f64>>>,
    errors: Vec<Vec<DMatrix<f64>>>,
}

fn dot(a: &[DMatrix<f64>], b: &[DMatrix<f64>]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x.dot(y)).sum()
}

impl Diis {
    /// An empty subspace holding at most `capacity` (≥ 2) entries.
    pub fn new(capacity: usize) -> Diis {
        Diis {
            capacity: capacity.max(2),
            focks: Vec::new(),
            errors: Vec::new(),
        }
    }

    /// Number of stored entries.
    pub fn len(&self) -> usize {
        self.focks.len()
    }

    /// True if no entry is stored.
    pub fn is_empty(&self) -> bool {
        self.focks.is_empty()
    }

    /// Forget all entries (after a change of strategy).
    pub fn clear(&mut self) {
        self.focks.clear();
        self.errors.clear();
    }

    /// Add an entry and return the extrapolated Fock matrices. With one entry,
    /// or when the DIIS equations are singular even after dropping the oldest
    /// entries, the newest matrices are returned unchanged.
    pub fn extrapolate(
        &mut self,
        focks: Vec<DMatrix<f64>>,
        errors: Vec<DMatrix<f64>>,
    ) -> Vec<DMatrix<f64>> {
        if self.focks.len() == self.capacity {
            self.focks.remove(0);
            self.errors.remove(0);
        }
        self.focks.push(focks);
        self.errors.push(errors);
        loop {
            let m = self.focks.len();
            if m == 1 {
                return self.focks[0].clone();
            }
            let mut b = DMatrix::<f64>::zeros(m + 1, m + 1);
            for i in 0..m {
                for j in 0..=i {
                    let v = dot(&self.errors[i], &self.errors[j]);
                    b[(i, j)] = v;
                    b[(j, i)] = v;
                }
                b[(i, m)] = -1.0;
                b[(m, i)] = -1.0;
            }
            // Scale the error block to its largest diagonal element, which keeps
            // the equations well conditioned as the errors become small.
            let scale = (0..m).map(|i| b[(i, i)]).fold(0.0f64, f64::max);
            if scale > 0.0 {
                for i in 0..m {
                    for j in 0..m {
                        b[(i, j)] /= scale;
                    }
                }
            }
            let mut rhs = DVector::<f64>::zeros(m + 1);
            rhs[m] = -1.0;
            let solved = b.clone().lu().solve(&rhs);
            match solved {
                Some(c)
                    if c.iter().all(|x| x.is_finite())
                        && c.iter().take(m).map(|x| x.abs()).sum::<f64>() < 1e4 =>
                {
                    let mut out: Vec<DMatrix<f64>> = self.focks[m - 1]
                        .iter()
                        .map(|f| DMatrix::zeros(f.nrows(), f.ncols()))
                        .collect();
                    for (i, entry) in self.focks.iter().enumerate() {
                        for (o, f) in out.iter_mut().zip(entry) {
                            *o += f * c[i];
                        }
                    }
                    return out;
                }
                _ => {
                    // Nearly linearly dependent errors: drop the oldest.
                    self.focks.remove(0);
                    self.errors.remove(0);
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn linear_errors_are_extrapolated_to_zero() {
        // If e(F) is linear in F, DIIS over two entries finds the zero exactly.
        let f1 = DMatrix::from_row_slice(2, 2, &[1.0, 0.2, 0.2, 3.0]);
        let f2 = DMatrix::from_row_slice(2, 2, &[1.5, 0.1, 0.1, 2.0]);
        let target = DMatrix::from_row_slice(2, 2, &[2.0, 0.0, 0.0, 1.0]);
        let mut d = Diis::new(6);
        d.extrapolate(vec![f1.clone()], vec![&f1 - &target]);
        let out = d.extrapolate(vec![f2.clone()], vec![&f2 - &target]);
        // The best combination of f1, f2 on the line through them.
        let e1 = &f1 - &target;
        let e2 = &f2 - &target;
        let c = -(e1.dot(&(&e2 - &e1))) / (&e2 - &e1).norm_squared();
        let expect = &f1 * (1.0 - c) + &f2 * c;
        assert!((&out[0] - expect).norm() < 1e-12);
    }
}
