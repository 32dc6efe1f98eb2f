//! Nonlinear least squares by Levenberg–Marquardt: minimise ½ Σ r_i(p)² with
//! steps (JᵀJ + λ diag JᵀJ) δ = −Jᵀr (Marquardt's scaling, J. Soc. Ind. Appl.
//! Math. 11, 431 (1963)); forward-difference Jacobian; λ shrinks after a step
//! that lowers the cost and grows after one that does not. Small problems only
//! (a handful of parameters): the normal equations are solved by Gaussian
//! elimination with partial pivoting.

/// Outcome of a fit.
#[derive(Clone, Debug, PartialEq)]
pub struct FitResult {
    /// Best parameters.
    pub params: Vec<f64>,
    /// Σ r² at the best parameters.
    pub cost: f64,
    /// Iterations done.
    pub iterations: usize,
    /// Whether a convergence test was met (otherwise the iteration limit).
    pub converged: bool,
}

/// Solve `a x = b` (n × n, row-major) in place; `None` when singular.
pub fn solve(a: &mut [f64], b: &mut [f64], n: usize) -> Option<Vec<f64>> {
    for c in 0..n {
        let piv = (c..n).max_by(|&i, &j| a[i * n + c].abs().total_cmp(&a[j * n + c].abs()))?;
        if a[piv * n + c].abs() < 1e-300 || !a[piv * n + c].is_finite() {
            return None;
        }
        if piv != c {
            for k in 0..n {
                a.swap(piv * n + k, c * n + k);
            }
            b.swap(piv, c);
        }
        for i in c + 1..n {
            let f = a[i * n + c] / a[c * n + c];
            for k in c..n {
                a[i * n + k] -= f * a[c * n + k];
            }
            b[i] -= f * b[c];
        }
    }
    let mut x = vec![0.0; n];
    for i in (0..n).rev() {
        let s: f64 = (i + 1..n).map(|k| a[i * n + k] * x[k]).sum();
        x[i] = (b[i] - s) / a[i * n + i];
    }
    Some(x)
}

/// Minimise Σ r_i(p)² where `residuals(p, r)` fills `r` (length `m`), from `p0`.
pub fn levenberg_marquardt<F: FnMut(&[f64], &mut [f64])>(
    mut residuals: F,
    m: usize,
    p0: &[f64],
    max_iter: usize,
) -> FitResult {
    let n = p0.len();
    let mut p = p0.to_vec();
    let mut r = vec![0.0; m];
    let mut r_try = vec![0.0; m];
    let mut jac = vec![0.0; m * n];
    let cost_of = |r: &[f64]| -> f64 { r.iter().map(|x| x * x).sum() };
    residuals(&p, &mut r);
    let mut cost = cost_of(&r);
    if !cost.is_finite() {
        return FitResult {
            params: p,
            cost,
            iterations: 0,
            converged: false,
        };
    }
    let mut lambda = 1e-3;
    let mut converged = false;
    let mut it = 0;
    let mut pt = p.clone();
    while it < max_iter {
        it += 1;
        // Jacobian by forward differences.
        for j in 0..n {
            let h = 1e-7 * p[j].abs().max(1e-3);
            pt.copy_from_slice(&p);
            pt[j] += h;
            residuals(&pt, &mut r_try);
            for i in 0..m {
                jac[i * n + j] = (r_try[i] - r[i]) / h;
            }
        }
        let mut jtj = vec![0.0; n * n];
        let mut jtr = vec![0.0; n];
        for i in 0..m {
            let row = &jac[i * n..(i + 1) * n];
            for a in 0..n {
                jtr[a] += row[a] * r[i];
                for b in 0..n {
                    jtj[a * n + b] += row[a] * row[b];
                }
            }
        }
        let grad_norm = jtr.iter().map(|x| x.abs()).fold(0.0, f64::max);
        if grad_norm < 1e-15 * (1.0 + cost) {
            converged = true;
            break;
        }
        // Try steps until one lowers the cost.
        let mut improved = false;
        while lambda < 1e12 {
            let mut a = jtj.clone();
            for d in 0..n {
                a[d * n + d] += lambda * jtj[d * n + d].max(1e-12);
            }
            let mut b: Vec<f64> = jtr.iter().map(|x| -x).collect();
            let Some(delta) = solve(&mut a, &mut b, n) else {
                lambda *= 10.0;
                continue;
            };
            for j in 0..n {
                pt[j] = p[j] + delta[j];
            }
            residuals(&pt, &mut r_try);
            let c = cost_of(&r_try);
            if c.is_finite() && c < cost {
                let rel = (cost - c) / cost.max(1e-300);
                let step = delta
                    .iter()
                    .zip(&p)
                    .map(|(d, x)| d.abs() / (x.abs() + 1e-8))
                    .fold(0.0, f64::max);
                p.copy_from_slice(&pt);
                std::mem::swap(&mut r, &mut r_try);
                cost = c;
                lambda = (lambda / 3.0).max(1e-12);
                improved = true;
                if rel < 1e-12 || step < 1e-10 {
                    converged = true;
                }
                break;
            }
            lambda *= 4.0;
        }
        if !improved {
            // No downhill step even with a tiny step length: a minimum.
            converged = true;
            break;
        }
        if converged {
            break;
        }
    }
    FitResult {
        params: p,
        cost,
        iterations: it,
        converged,
    }
}
