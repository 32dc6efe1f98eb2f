//! Lowest eigenpairs of a symmetric operator known only through its
//! products: block Davidson with diagonal preconditioning, subspace collapse,
//! per-root convergence and locking, and a dense fallback for small spaces.
//!
//! # Algorithm (Davidson, J. Comput. Phys. 17, 87 (1975), from memory;
//! common practice for the details)
//! 1. Guesses: the caller's vectors if any (a warm start from the previous
//!    geometry, [`lowest_eigenpairs_from`]), then unit vectors on the
//!    smallest diagonal elements (ties by index), max(2m, m + 4) in all for
//!    m roots (m + 2 for a warm start with at least m vectors).
//! 2. Each iteration: the Rayleigh matrix G = Vᵀ A V of the orthonormal
//!    subspace V, its lowest m eigenpairs (θ_r, y_r), Ritz vectors
//!    u_r = V y_r and residuals r_r = A u_r − θ_r u_r (from the stored
//!    products, no extra operator call).
//! 3. A root is converged when ‖r_r‖ < `residual_tolerance` and either its
//!    θ moved less than `energy_tolerance` or ‖r_r‖² (the order of the
//!    eigenvalue error) is below it; converged roots are **locked**: they get
//!    no new correction vector (they stay in the subspace, and are unlocked
//!    if a later residual grows again).
//! 4. Corrections δ_r = r_r / (θ_r − D) (denominators kept away from zero by
//!    1e−4), orthogonalised twice against V and each other (modified
//!    Gram–Schmidt), dropped if their norm falls below 1e−4 of the original.
//! 5. When V would exceed `max_subspace`, it collapses onto the lowest
//!    Ritz vectors (m + 4 of them, products rotated along, no new products).
//!
//! All trial vectors of an iteration go to the operator in one call, so the
//! operator can batch its Coulomb/exchange builds.
//!
//! With residual norm ε the eigenvalue error is of order ε²/gap, so the
//! default 1e−5 gives energies to ~1e−10 Eh.

use super::ResponseError;
use nalgebra::{DMatrix, DVector};

/// Eigenvalues (ascending) and eigenvectors of a symmetric matrix, checked.
///
/// nalgebra 0.33.3's `symmetric_eigen` was seen here to return eigenvectors
/// paired with the wrong eigenvalues (a 53-dimensional MRSF block: two
/// pairs exchanged, residuals 0.39 Eh). So each eigenvector's eigenvalue is
/// recomputed as its Rayleigh quotient, the pairs sorted by it, and the
/// residuals ‖M v − λ v‖ checked; if any exceeds 1e−11 (1 + max|M_ij|), the cyclic
/// Jacobi method (common practice; slow but unconditionally reliable) is
/// used instead.
pub fn symmetric_eigen(m: &DMatrix<f64>) -> (Vec<f64>, DMatrix<f64>) {
    let n = m.nrows();
    let e = m.clone().symmetric_eigen();
    let scale = 1.0 + m.amax();
    let mut pairs: Vec<(f64, usize)> = (0..n)
        .map(|k| {
            let v = e.eigenvectors.column(k);
            ((m * v).dot(&v) / v.dot(&v), k)
        })
        .collect();
    pairs.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut vecs = DMatrix::zeros(n, n);
    let mut ok = true;
    for (c, &(lam, k)) in pairs.iter().enumerate() {
        let v = e.eigenvectors.column(k);
        let r = (m * v - v * lam).norm();
        if r.is_nan() || r > 1e-11 * scale {
            ok = false;
        }
        vecs.set_column(c, &v);
    }
    if ok {
        (pairs.iter().map(|p| p.0).collect(), vecs)
    } else {
        tracing::debug!("symmetric eigensolver: falling back to Jacobi (dimension {n})");
        jacobi(m)
    }
}

/// Cyclic Jacobi diagonalisation of a symmetric matrix (ascending).
pub fn jacobi(m: &DMatrix<f64>) -> (Vec<f64>, DMatrix<f64>) {
    let n = m.nrows();
    let mut a = m.clone();
    let mut v = DMatrix::<f64>::identity(n, n);
    let norm = a.norm().max(f64::MIN_POSITIVE);
    for _sweep in 0..100 {
        let mut off = 0.0;
        for p in 0..n {
            for q in p + 1..n {
                off += a[(p, q)] * a[(p, q)];
            }
        }
        if off.sqrt() <= 1e-15 * norm {
            break;
        }
        for p in 0..n {
            for q in p + 1..n {
                let apq = a[(p, q)];
                if apq.abs() <= 1e-300 {
                    continue;
                }
                let theta = (a[(q, q)] - a[(p, p)]) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let t = if theta == 0.0 { 1.0 } else { t };
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..n {
                    let akp = a[(k, p)];
                    let akq = a[(k, q)];
                    a[(k, p)] = c * akp - s * akq;
                    a[(k, q)] = s * akp + c * akq;
                }
                for k in 0..n {
                    let apk = a[(p, k)];
                    let aqk = a[(q, k)];
                    a[(p, k)] = c * apk - s * aqk;
                    a[(q, k)] = s * apk + c * aqk;
                }
                for k in 0..n {
                    let vkp = v[(k, p)];
                    let vkq = v[(k, q)];
                    v[(k, p)] = c * vkp - s * vkq;
                    v[(k, q)] = s * vkp + c * vkq;
                }
            }
        }
    }
    let mut idx: Vec<usize> = (0..n).collect();
    idx.sort_by(|&x, &y| a[(x, x)].total_cmp(&a[(y, y)]));
    let mut vecs = DMatrix::zeros(n, n);
    for (c, &k) in idx.iter().enumerate() {
        vecs.set_column(c, &v.column(k));
    }
    (idx.iter().map(|&k| a[(k, k)]).collect(), vecs)
}

/// A symmetric linear operator for the eigensolver.
pub trait Operator {
    /// Dimension of the space.
    fn dim(&self) -> usize;
    /// Diagonal (exact or approximate: used for guesses and preconditioning).
    fn diagonal(&self) -> DVector<f64>;
    /// Products A·x for a batch of vectors.
    fn apply(&mut self, xs: &[DVector<f64>]) -> Result<Vec<DVector<f64>>, ResponseError>;
}

/// Tunables of [`lowest_eigenpairs`].
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct DavidsonOptions {
    /// Residual-norm threshold per root (default 1e−5).
    pub residual_tolerance: f64,
    /// Change of a Ritz value between iterations (Eh, default 1e−9).
    pub energy_tolerance: f64,
    /// Iteration limit (default 100).
    pub max_iterations: usize,
    /// Subspace size limit; 0 means automatic, max(40, 12 m) (default 0).
    pub max_subspace: usize,
    /// Spaces of at most this dimension are diagonalised densely, from
    /// operator products on unit vectors (default 64).
    pub dense_below: usize,
}

impl Default for DavidsonOptions {
    fn default() -> Self {
        DavidsonOptions {
            residual_tolerance: 1e-5,
            energy_tolerance: 1e-9,
            max_iterations: 100,
            max_subspace: 0,
            dense_below: 64,
        }
    }
}

impl DavidsonOptions {
    fn validate(&self) -> Result<(), ResponseError> {
        if !(self.residual_tolerance > 0.0 && self.residual_tolerance.is_finite()) {
            return Err(ResponseError::InvalidOption(format!(
                "residual_tolerance must be positive, got {}",
                self.residual_tolerance
            )));
        }
        if !(self.energy_tolerance > 0.0 && self.energy_tolerance.is_finite()) {
            return Err(ResponseError::InvalidOption(format!(
                "energy_tolerance must be positive, got {}",
                self.energy_tolerance
            )));
        }
        if self.max_iterations == 0 {
            return Err(ResponseError::InvalidOption(
                "max_iterations must be at least 1".into(),
            ));
        }
        Ok(())
    }
}

/// How the eigenpairs were found.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum SolverKind {
    /// Dense diagonalisation.
    Dense,
    /// Davidson iterations.
    Davidson,
}

/// Eigenpairs and solver statistics.
#[derive(Clone, Debug)]
pub struct Eigenpairs {
    /// Eigenvalues, ascending.
    pub values: Vec<f64>,
    /// Normalised eigenvectors.
    pub vectors: Vec<DVector<f64>>,
    /// The statistics.
    pub info: SolverInfo,
}

/// Solver statistics.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct SolverInfo {
    /// Dense or Davidson.
    pub kind: SolverKind,
    /// Space dimension.
    pub dimension: usize,
    /// Iterations (1 for dense).
    pub iterations: usize,
    /// Operator products.
    pub products: usize,
    /// Final residual norms.
    pub residuals: Vec<f64>,
}

/// The `nroots` lowest eigenpairs of `op`: dense if the dimension is at
/// most `opts.dense_below`, Davidson otherwise.
pub fn lowest_eigenpairs(
    op: &mut dyn Operator,
    nroots: usize,
    opts: &DavidsonOptions,
) -> Result<Eigenpairs, ResponseError> {
    lowest_eigenpairs_from(op, nroots, opts, &[])
}

/// As [`lowest_eigenpairs`], starting the Davidson iterations from the
/// given vectors (e.g. the previous geometry's states; vectors of the wrong
/// length or linearly dependent ones are skipped), completed with unit
/// vectors on the smallest diagonal elements.
pub fn lowest_eigenpairs_from(
    op: &mut dyn Operator,
    nroots: usize,
    opts: &DavidsonOptions,
    initial: &[DVector<f64>],
) -> Result<Eigenpairs, ResponseError> {
    opts.validate()?;
    let n = op.dim();
    if nroots > n {
        return Err(ResponseError::TooManyRoots {
            requested: nroots,
            available: n,
            kind: "operator",
        });
    }
    if nroots == 0 {
        return Ok(Eigenpairs {
            values: vec![],
            vectors: vec![],
            info: SolverInfo {
                kind: SolverKind::Dense,
                dimension: n,
                iterations: 0,
                products: 0,
                residuals: vec![],
            },
        });
    }
    if n <= opts.dense_below {
        dense(op, nroots)
    } else {
        davidson(op, nroots, opts, initial)
    }
}

/// The operator as a dense matrix (products on unit vectors, symmetrised).
pub fn dense_matrix(op: &mut dyn Operator) -> Result<DMatrix<f64>, ResponseError> {
    let n = op.dim();
    let mut m = DMatrix::zeros(n, n);
    let mut start = 0;
    while start < n {
        let end = (start + 64).min(n);
        let units: Vec<DVector<f64>> = (start..end)
            .map(|k| {
                let mut e = DVector::zeros(n);
                e[k] = 1.0;
                e
            })
            .collect();
        let cols = op.apply(&units)?;
        for (k, c) in (start..end).zip(cols) {
            m.set_column(k, &c);
        }
        start = end;
    }
    let t = m.transpose();
    Ok((m + t) * 0.5)
}

fn dense(op: &mut dyn Operator, nroots: usize) -> Result<Eigenpairs, ResponseError> {
    let n = op.dim();
    let m = dense_matrix(op)?;
    if m.iter().any(|v| !v.is_finite()) {
        return Err(ResponseError::NonFinite("dense response matrix"));
    }
    let (vals, vecs) = symmetric_eigen(&m);
    Ok(Eigenpairs {
        values: vals[..nroots].to_vec(),
        vectors: (0..nroots).map(|k| vecs.column(k).into_owned()).collect(),
        info: SolverInfo {
            kind: SolverKind::Dense,
            dimension: n,
            iterations: 1,
            products: n,
            residuals: vec![0.0; nroots],
        },
    })
}

/// Orthogonalise `t` against the columns in `basis` (twice) and normalise;
/// None if it falls below `keep` of its norm.
fn orthonormalize(mut t: DVector<f64>, basis: &[DVector<f64>], keep: f64) -> Option<DVector<f64>> {
    let n0 = t.norm();
    if n0.is_nan() || n0 <= 0.0 || !n0.is_finite() {
        return None;
    }
    t /= n0;
    for _ in 0..2 {
        for b in basis {
            let d = b.dot(&t);
            t.axpy(-d, b, 1.0);
        }
    }
    let n1 = t.norm();
    if n1 < keep {
        None
    } else {
        Some(t / n1)
    }
}

fn davidson(
    op: &mut dyn Operator,
    nroots: usize,
    opts: &DavidsonOptions,
    initial: &[DVector<f64>],
) -> Result<Eigenpairs, ResponseError> {
    let n = op.dim();
    let diag = op.diagonal();
    let max_sub = if opts.max_subspace == 0 {
        (12 * nroots).max(40)
    } else {
        opts.max_subspace.max(2 * nroots + 4)
    }
    .min(n);
    let warm = initial.iter().filter(|g| g.len() == n).count() >= nroots;
    let nguess = if warm {
        nroots + 2
    } else {
        (2 * nroots).max(nroots + 4)
    }
    .min(n)
    .min(max_sub);
    let keep_after_collapse = (nroots + 4).min(max_sub / 2).max(nroots);
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| diag[a].total_cmp(&diag[b]).then(a.cmp(&b)));
    let mut v: Vec<DVector<f64>> = Vec::with_capacity(nguess);
    for g in initial.iter().filter(|g| g.len() == n) {
        if v.len() >= nguess {
            break;
        }
        if let Some(q) = orthonormalize(g.clone(), &v, 1e-3) {
            v.push(q);
        }
    }
    for &k in &order {
        if v.len() >= nguess {
            break;
        }
        let mut e = DVector::zeros(n);
        e[k] = 1.0;
        if let Some(q) = orthonormalize(e, &v, 1e-3) {
            v.push(q);
        }
    }
    let mut s: Vec<DVector<f64>> = op.apply(&v)?;
    let mut products = v.len();
    let mut theta_prev = vec![f64::INFINITY; nroots];
    let mut residuals = vec![f64::INFINITY; nroots];
    let mut done = 0;
    for iteration in 1..=opts.max_iterations {
        done = iteration;
        let m = v.len();
        let g = DMatrix::from_fn(m, m, |a, b| 0.5 * (v[a].dot(&s[b]) + v[b].dot(&s[a])));
        if g.iter().any(|x| !x.is_finite()) {
            return Err(ResponseError::NonFinite("Davidson subspace matrix"));
        }
        let (theta, y) = symmetric_eigen(&g);
        let ritz = |r: usize, basis: &[DVector<f64>]| {
            let mut u = DVector::zeros(n);
            for (a, b) in basis.iter().enumerate() {
                u.axpy(y[(a, r)], b, 1.0);
            }
            u
        };
        let mut corrections = Vec::new();
        let mut all_converged = true;
        let mut xs = Vec::with_capacity(nroots);
        for r in 0..nroots {
            let u = ritz(r, &v);
            let au = ritz(r, &s);
            let res = &au - &u * theta[r];
            residuals[r] = res.norm();
            // The eigenvalue error is about ‖r‖²/gap: a small enough
            // residual needs no second look at θ.
            let converged = residuals[r] < opts.residual_tolerance
                && ((theta[r] - theta_prev[r]).abs() < opts.energy_tolerance
                    || residuals[r] * residuals[r] < opts.energy_tolerance);
            theta_prev[r] = theta[r];
            if !converged {
                all_converged = false;
                let t = DVector::from_fn(n, |k, _| {
                    let d = theta[r] - diag[k];
                    let d = if d.abs() < 1e-4 {
                        1e-4f64.copysign(d)
                    } else {
                        d
                    };
                    res[k] / d
                });
                corrections.push(t);
            }
            xs.push(u);
        }
        if all_converged {
            tracing::debug!(
                "Davidson: {nroots} roots converged in {iteration} iterations, {products} products"
            );
            return Ok(Eigenpairs {
                values: theta[..nroots].to_vec(),
                vectors: xs
                    .into_iter()
                    .map(|u| {
                        let nn = u.norm();
                        u / nn
                    })
                    .collect(),
                info: SolverInfo {
                    kind: SolverKind::Davidson,
                    dimension: n,
                    iterations: iteration,
                    products,
                    residuals,
                },
            });
        }
        tracing::debug!(
            "Davidson iteration {iteration}: subspace {m}, residuals {:?}",
            residuals
        );
        // Collapse if needed.
        if m + corrections.len() > max_sub {
            let keep = keep_after_collapse.min(m);
            let nv: Vec<DVector<f64>> = (0..keep).map(|r| ritz(r, &v)).collect();
            let ns: Vec<DVector<f64>> = (0..keep).map(|r| ritz(r, &s)).collect();
            // Re-orthonormalise the collapsed basis (round-off).
            let mut ov: Vec<DVector<f64>> = Vec::with_capacity(keep);
            let mut os: Vec<DVector<f64>> = Vec::with_capacity(keep);
            for (a, b) in nv.into_iter().zip(ns) {
                let nrm = a.norm();
                ov.push(a / nrm);
                os.push(b / nrm);
            }
            v = ov;
            s = os;
        }
        let mut new: Vec<DVector<f64>> = Vec::new();
        for t in corrections {
            let mut against: Vec<DVector<f64>> = v.clone();
            against.extend(new.iter().cloned());
            if let Some(q) = orthonormalize(t, &against, 1e-4) {
                if v.len() + new.len() < max_sub {
                    new.push(q);
                }
            }
        }
        if new.is_empty() {
            break;
        }
        let sn = op.apply(&new)?;
        products += new.len();
        v.extend(new);
        s.extend(sn);
    }
    Err(ResponseError::NotConverged {
        iterations: done,
        products,
        residuals,
    })
}
