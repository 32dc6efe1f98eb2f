//! Harmonic normal-mode analysis (common practice; e.g. E. B. Wilson,
//! J. C. Decius and P. C. Cross, *Molecular Vibrations*, 1955, ch. 2).
//!
//! With the Cartesian Hessian H (hartree/bohr²) and masses m (electron
//! masses), the mass-weighted Hessian is H̃ = M^{−1/2} H M^{−1/2}. Its
//! translations and rigid rotations about the centre of mass are removed
//! exactly: an orthonormal basis B of the vibrational subspace (the
//! complement of the 6, or 5 for a linear molecule, mass-weighted
//! translation/rotation vectors) is built, and Bᵀ H̃ B is diagonalised. The
//! eigenvalues are ω² (atomic units); a negative one is an imaginary
//! frequency, reported as a negative number. Frequencies in cm⁻¹ use the
//! CODATA 2018 hartree-to-wavenumber factor.

use nalgebra::{DMatrix, DVector, SymmetricEigen};

use crate::units;

/// Problems of a normal-mode analysis.
#[derive(Debug, thiserror::Error, Clone, PartialEq)]
pub enum ModesError {
    /// Shapes do not fit together.
    #[error("the Hessian is {rows}×{cols} but {atoms} atoms need {n}×{n}", n = 3 * atoms)]
    Shape {
        rows: usize,
        cols: usize,
        atoms: usize,
    },
    /// Shapes do not fit together (model coordinates).
    #[error("the Hessian is {rows}×{cols} but {n} coordinates need {n}×{n}")]
    CoordinateShape { rows: usize, cols: usize, n: usize },
    /// A mass is not positive.
    #[error("atom {index} has mass {mass}; masses must be positive")]
    Mass { index: usize, mass: f64 },
    /// Non-finite entries.
    #[error("the Hessian contains non-finite entries")]
    NonFinite,
    /// Too few atoms for vibrations.
    #[error("{0} atom(s) have no vibrations")]
    TooFewAtoms(usize),
}

/// The result of a normal-mode analysis.
#[derive(Clone, Debug, PartialEq)]
pub struct NormalModes {
    /// ω (hartree/ħ), ascending; negative for imaginary frequencies.
    pub omegas: Vec<f64>,
    /// Mass-weighted normal modes, one orthonormal column per frequency (3N rows).
    pub vectors: DMatrix<f64>,
    /// Masses (electron masses), one per atom.
    pub masses: Vec<f64>,
    /// Whether the geometry was treated as linear (5 external degrees of freedom).
    pub linear: bool,
}

impl NormalModes {
    /// Frequencies in cm⁻¹ (negative = imaginary).
    pub fn wavenumbers(&self) -> Vec<f64> {
        self.omegas
            .iter()
            .map(|&w| units::hartree_to_cm1(w))
            .collect()
    }
    /// Indices of imaginary modes.
    pub fn imaginary(&self) -> Vec<usize> {
        self.omegas
            .iter()
            .enumerate()
            .filter(|(_, w)| **w < 0.0)
            .map(|(i, _)| i)
            .collect()
    }
}

/// Mass-weighted translation and rotation vectors at `positions` (bohr),
/// orthonormalised; rotations with vanishing norm (linear molecules) dropped.
pub fn external_vectors(positions: &[[f64; 3]], masses: &[f64]) -> Vec<DVector<f64>> {
    let n = positions.len();
    let total: f64 = masses.iter().sum();
    let com: [f64; 3] = std::array::from_fn(|k| {
        positions
            .iter()
            .zip(masses)
            .map(|(p, m)| p[k] * m)
            .sum::<f64>()
            / total
    });
    let mut raw = Vec::new();
    for k in 0..3 {
        raw.push(DVector::from_fn(3 * n, |i, _| {
            if i % 3 == k {
                masses[i / 3].sqrt()
            } else {
                0.0
            }
        }));
    }
    for axis in 0..3 {
        // Rotation about `axis`: δr = e_axis × (r − com).
        raw.push(DVector::from_fn(3 * n, |i, _| {
            let (a, c) = (i / 3, i % 3);
            let r: [f64; 3] = std::array::from_fn(|k| positions[a][k] - com[k]);
            let e: [f64; 3] = std::array::from_fn(|k| if k == axis { 1.0 } else { 0.0 });
            let cross = [
                e[1] * r[2] - e[2] * r[1],
                e[2] * r[0] - e[0] * r[2],
                e[0] * r[1] - e[1] * r[0],
            ];
            cross[c] * masses[a].sqrt()
        }));
    }
    // Gram–Schmidt (twice, for stability); a rotation that collapses is dropped.
    let scale = raw.iter().map(|v| v.norm()).fold(0.0, f64::max);
    let mut basis: Vec<DVector<f64>> = Vec::new();
    for mut v in raw {
        for _ in 0..2 {
            for b in &basis {
                let p = b.dot(&v);
                v -= b * p;
            }
        }
        let norm = v.norm();
        if norm > 1e-6 * scale {
            basis.push(v / norm);
        }
    }
    basis
}

/// Normal modes of the Cartesian Hessian `hessian` (3N×3N, hartree/bohr²)
/// at `positions` (bohr) with atomic `masses` (electron masses).
pub fn normal_modes(
    hessian: &DMatrix<f64>,
    positions: &[[f64; 3]],
    masses: &[f64],
) -> Result<NormalModes, ModesError> {
    let n = positions.len();
    if hessian.nrows() != 3 * n || hessian.ncols() != 3 * n || masses.len() != n {
        return Err(ModesError::Shape {
            rows: hessian.nrows(),
            cols: hessian.ncols(),
            atoms: n,
        });
    }
    if n < 2 {
        return Err(ModesError::TooFewAtoms(n));
    }
    if let Some((index, &mass)) = masses
        .iter()
        .enumerate()
        .find(|(_, m)| !(**m > 0.0 && m.is_finite()))
    {
        return Err(ModesError::Mass { index, mass });
    }
    if hessian.iter().any(|x| !x.is_finite()) {
        return Err(ModesError::NonFinite);
    }
    let inv_sqrt: Vec<f64> = (0..3 * n).map(|i| 1.0 / masses[i / 3].sqrt()).collect();
    let sym = (hessian + hessian.transpose()) * 0.5;
    let hm = DMatrix::from_fn(3 * n, 3 * n, |i, j| sym[(i, j)] * inv_sqrt[i] * inv_sqrt[j]);
    let external = external_vectors(positions, masses);
    let linear = external.len() == 5;
    // Orthonormal basis of the complement: eigenvectors of the projector
    // 1 − Σ t tᵀ with eigenvalue 1.
    let mut projector = DMatrix::<f64>::identity(3 * n, 3 * n);
    for t in &external {
        projector -= t * t.transpose();
    }
    let eig = SymmetricEigen::new(projector);
    let cols: Vec<usize> = (0..3 * n).filter(|&k| eig.eigenvalues[k] > 0.5).collect();
    let b = DMatrix::from_fn(3 * n, cols.len(), |r, c| eig.eigenvectors[(r, cols[c])]);
    let small = b.transpose() * &hm * &b;
    let modes = SymmetricEigen::new((&small + small.transpose()) * 0.5);
    let mut order: Vec<usize> = (0..cols.len()).collect();
    order.sort_by(|&i, &j| modes.eigenvalues[i].total_cmp(&modes.eigenvalues[j]));
    let omegas = order.iter().map(|&i| {
        let l = modes.eigenvalues[i];
        l.signum() * l.abs().sqrt()
    });
    let vectors = &b
        * DMatrix::from_fn(cols.len(), cols.len(), |r, c| {
            modes.eigenvectors[(r, order[c])]
        });
    Ok(NormalModes {
        omegas: omegas.collect(),
        vectors,
        masses: masses.to_vec(),
        linear,
    })
}

/// Central finite-difference Hessian of `gradient` (a function of the 3N
/// coordinates returning dE/dq), step `h` bohr, symmetrised; 6N gradient
/// evaluations, in parallel.
pub fn finite_difference_hessian<E, F>(q0: &[f64], h: f64, gradient: F) -> Result<DMatrix<f64>, E>
where
    F: Fn(&[f64]) -> Result<Vec<f64>, E> + Sync,
    E: Send,
{
    use rayon::prelude::*;
    let n = q0.len();
    let columns: Vec<Result<Vec<f64>, E>> = (0..n)
        .into_par_iter()
        .map(|j| {
            let mut plus = q0.to_vec();
            plus[j] += h;
            let mut minus = q0.to_vec();
            minus[j] -= h;
            let gp = gradient(&plus)?;
            let gm = gradient(&minus)?;
            Ok(gp
                .iter()
                .zip(&gm)
                .map(|(a, b)| (a - b) / (2.0 * h))
                .collect())
        })
        .collect();
    let mut hess = DMatrix::zeros(n, n);
    for (j, col) in columns.into_iter().enumerate() {
        for (i, x) in col?.into_iter().enumerate() {
            hess[(i, j)] = x;
        }
    }
    Ok((&hess + hess.transpose()) * 0.5)
}

/// Normal modes of a Hessian in abstract (model) coordinates with one mass
/// per coordinate: no translations or rotations to project (LVC models are
/// already written in normal coordinates). ω² are the eigenvalues of
/// M^{−1/2} H M^{−1/2}.
pub fn normal_modes_of_coordinates(
    hessian: &DMatrix<f64>,
    masses: &[f64],
) -> Result<NormalModes, ModesError> {
    let n = masses.len();
    if hessian.nrows() != n || hessian.ncols() != n {
        return Err(ModesError::CoordinateShape {
            rows: hessian.nrows(),
            cols: hessian.ncols(),
            n,
        });
    }
    if let Some((index, &mass)) = masses
        .iter()
        .enumerate()
        .find(|(_, m)| !(**m > 0.0 && m.is_finite()))
    {
        return Err(ModesError::Mass { index, mass });
    }
    if hessian.iter().any(|x| !x.is_finite()) {
        return Err(ModesError::NonFinite);
    }
    let sym = (hessian + hessian.transpose()) * 0.5;
    let hm = DMatrix::from_fn(n, n, |i, j| sym[(i, j)] / (masses[i] * masses[j]).sqrt());
    let e = SymmetricEigen::new(hm);
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| e.eigenvalues[i].total_cmp(&e.eigenvalues[j]));
    let omegas = order
        .iter()
        .map(|&i| e.eigenvalues[i].signum() * e.eigenvalues[i].abs().sqrt())
        .collect();
    let vectors = DMatrix::from_fn(n, n, |r, c| e.eigenvectors[(r, order[c])]);
    Ok(NormalModes {
        omegas,
        vectors,
        masses: masses.to_vec(),
        linear: false,
    })
}
