//! Electronic amplitudes over one nuclear step, driven by state overlaps.
//!
//! In the basis of adiabatic states ψ_j(t) the time-dependent electronic
//! wavefunction Ψ = Σ_j c_j ψ_j obeys
//!
//!   dc/dt = −i E(t) c − T c,     T_kj = <ψ_k|∂ψ_j/∂t>   (ħ = 1),
//!
//! with E diagonal and T real antisymmetric. The back end gives the overlap
//! matrix S_kj = <ψ_k(t)|ψ_j(t+Δt)>. After aligning phases (diagonal positive)
//! and orthonormalising (Löwdin, S → S(SᵀS)^{−1/2}), S is the rotation that
//! carries the states over the step. If the states rotate at a constant rate,
//! Ψ(t+τ) = Ψ(t) exp(Tτ), so S = exp(TΔt) and
//!
//!   T = log(S)/Δt,
//!
//! the time-derivative coupling averaged over the step in the sense of the
//! norm-preserving interpolation of J. Phys. Chem. Lett. 5, 2351 (2014)
//! (from memory): it is exact for a uniform rotation and stays finite through
//! trivial crossings, where the finite difference (S − Sᵀ)/(2Δt) fails.
//!
//! Inside the step the energies are interpolated linearly and T is constant.
//! Each of the `substeps` electronic substeps of length h applies the Strang
//! splitting exp(−i∫E/2) · exp(−Th) · exp(−i∫E/2): both factors are unitary,
//! so the norm is preserved to rounding, and the error is O(h²) globally.
//!
//! The fewest-switches probability to leave the active state a for state j
//! (J. Chem. Phys. 93, 1061 (1990)) follows from the population flux,
//! d|c_a|²/dt = −Σ_j 2 Re(c_a* T_aj c_j), accumulated over the substeps:
//!
//!   g_{a→j} = Σ_substeps h · max(0, 2 Re(c_a* T_aj c_j)) / |c_a|².

use nalgebra::{DMatrix, SymmetricEigen};
use num_complex::Complex64;

/// Why the overlap matrix could not be turned into couplings.
#[derive(Debug, thiserror::Error, Clone, PartialEq)]
pub enum OverlapError {
    /// The matrix is not square or does not match the number of states.
    #[error("overlap matrix is {rows}×{cols}, expected {n}×{n}")]
    Shape { rows: usize, cols: usize, n: usize },
    /// The overlap matrix is singular: the states of the two steps share no space.
    #[error("overlap matrix is singular (smallest singular value {0:.2e}); the time step is too long for the electronic states")]
    Singular(f64),
    /// Non-finite entries.
    #[error("overlap matrix contains non-finite entries")]
    NonFinite,
    /// The tracked states lost part of their space over the step: |det S|
    /// (the product of the overlap's singular values) fell below the floor,
    /// and a state that left is active or populated, so its couplings and
    /// amplitudes would be meaningless.
    #[error(
        "state tracking lost: |det| of the overlap between steps is {determinant:.3} (floor {floor}); \
         state {state} keeps only {norm:.3} of its norm within the tracked states (it is active or populated, or no single state left) — \
         track more states or shorten the time step"
    )]
    TrackingLost {
        /// |det S| of the raw overlap.
        determinant: f64,
        /// The configured floor.
        floor: f64,
        /// The state that left (active or populated, else the least kept).
        state: usize,
        /// The smaller of its row and column norms.
        norm: f64,
    },
}

/// What [`check_tracking`] found when the tracked space changed.
#[derive(Clone, Debug, PartialEq)]
pub struct Exchanged {
    /// Unpopulated, inactive states exchanged with untracked ones.
    pub states: Vec<usize>,
    /// |det S| of the raw overlap.
    pub determinant: f64,
}

impl Exchanged {
    /// The overlap with the exchanged states taken as continuing into
    /// their successors (S_jj = 1, no overlap with the others): they get no
    /// coupling over this step, and the newcomer takes over their slot.
    pub fn patch(&self, s: &DMatrix<f64>) -> DMatrix<f64> {
        let mut p = s.clone();
        for &j in &self.states {
            p.row_mut(j).fill(0.0);
            p.column_mut(j).fill(0.0);
            p[(j, j)] = 1.0;
        }
        p
    }
}

/// Whether the tracked states kept their space over a step. When |det S|
/// falls below `floor`, the states that kept less than half their weight in
/// the other step's tracked set (row or column norm² < ½) were exchanged
/// with untracked states. That is a typed failure when it touches the active
/// state or a state holding more than 1 % of the population; when it
/// touches only empty states — typically the highest tracked state meeting
/// the first untracked one, harmless for the dynamics — they are returned
/// for [`Exchanged::patch`] and a warning. Checked against
/// `dynamics.min_overlap_determinant`.
pub fn check_tracking(
    s: &DMatrix<f64>,
    floor: f64,
    active: usize,
    amplitudes: &[Complex64],
) -> Result<Option<Exchanged>, OverlapError> {
    // Every step: skip the LU when a cheap lower bound already clears the
    // floor. For a column diagonally dominant matrix
    // |det S| ≥ Π_j (|S_jj| − Σ_{i≠j} |S_ij|) (Ostrowski's bound), and a
    // smooth step has S close to a signed identity.
    let bound = (0..s.ncols()).try_fold(1.0, |acc: f64, j| {
        let off: f64 = (0..s.nrows())
            .filter(|&i| i != j)
            .map(|i| s[(i, j)].abs())
            .sum();
        let margin = s[(j, j)].abs() - off;
        (margin > 0.0).then_some(acc * margin)
    });
    if bound.is_some_and(|b| b >= floor) {
        return Ok(None);
    }
    let determinant = s.determinant().abs();
    if determinant >= floor || !determinant.is_finite() {
        return Ok(None);
    }
    let kept = |j: usize| s.row(j).norm().min(s.column(j).norm());
    let lost: Vec<usize> = (0..s.ncols()).filter(|&j| kept(j).powi(2) < 0.5).collect();
    let least = (0..s.ncols())
        .min_by(|&a, &b| kept(a).total_cmp(&kept(b)))
        .unwrap_or(0);
    let matters =
        |j: &usize| *j == active || amplitudes.get(*j).is_some_and(|c| c.norm_sqr() > 0.01);
    if lost.is_empty() || lost.iter().any(matters) {
        let state = lost.iter().copied().find(matters).unwrap_or(least);
        return Err(OverlapError::TrackingLost {
            determinant,
            floor,
            state,
            norm: kept(state),
        });
    }
    Ok(Some(Exchanged {
        states: lost,
        determinant,
    }))
}

/// The coupling over one nuclear step, derived from the aligned overlaps.
#[derive(Clone, Debug)]
pub struct StepCoupling {
    /// T (1/a.u. of time), real antisymmetric, constant over the step.
    pub t: DMatrix<f64>,
    /// exp(−T h) for the substep length h it was built for.
    propagator: DMatrix<f64>,
    /// For two states, exp(−T h) as three shears (tan(α/2), sin α) of the
    /// rotation angle α = −θh/Δt: an exactly area-preserving map whose
    /// eigenvalues lie on the unit circle in floating point too, so repeated
    /// application cannot make the norm drift.
    shears: Option<(f64, f64)>,
    /// Smallest singular value of the overlap before orthonormalisation.
    pub min_singular_value: f64,
}

/// Align the phases of the back end's raw overlaps.
///
/// `previous` holds the ±1 phases that made the previous step's states
/// continuous; the returned phases make the diagonal of the aligned matrix
/// diag(previous)·S_raw·diag(current) non-negative.
pub fn align_phases(raw: &DMatrix<f64>, previous: &[f64]) -> (DMatrix<f64>, Vec<f64>) {
    let n = raw.nrows();
    let current: Vec<f64> = (0..n)
        .map(|j| {
            let d = previous[j] * raw[(j, j)];
            if d < 0.0 {
                -1.0
            } else {
                1.0
            }
        })
        .collect();
    let aligned = DMatrix::from_fn(n, n, |i, j| previous[i] * raw[(i, j)] * current[j]);
    (aligned, current)
}

impl StepCoupling {
    /// Couplings for `n` states from an already phase-aligned overlap matrix,
    /// for a nuclear step `dt` split into `substeps` electronic substeps.
    /// If orthonormalisation gives an improper rotation (determinant −1), the
    /// sign of the least-overlapping state is flipped in `phases` as well.
    pub fn from_overlaps(
        aligned: &DMatrix<f64>,
        phases: &mut [f64],
        dt: f64,
        substeps: usize,
    ) -> Result<Self, OverlapError> {
        let n = phases.len();
        if aligned.nrows() != n || aligned.ncols() != n {
            return Err(OverlapError::Shape {
                rows: aligned.nrows(),
                cols: aligned.ncols(),
                n,
            });
        }
        if aligned.iter().any(|x| !x.is_finite()) {
            return Err(OverlapError::NonFinite);
        }
        let h = dt / substeps as f64;
        if n == 2 {
            return Self::two_state(aligned, phases, dt, h);
        }
        let svd = aligned.clone().svd(true, true);
        let min_sv = svd.singular_values.min();
        if min_sv < 1e-8 {
            return Err(OverlapError::Singular(min_sv));
        }
        let (u, vt) = (svd.u.expect("requested"), svd.v_t.expect("requested"));
        let mut s = &u * &vt;
        if s.determinant() < 0.0 {
            let j = (0..n)
                .min_by(|&a, &b| s[(a, a)].abs().total_cmp(&s[(b, b)].abs()))
                .expect("n > 0");
            s.column_mut(j).neg_mut();
            phases[j] = -phases[j];
        }
        let (t, propagator) = log_and_power(&s, dt, h);
        Ok(Self {
            t,
            propagator,
            shears: None,
            min_singular_value: min_sv,
        })
    }

    /// Closed form for two states: the nearest rotation to S has angle
    /// θ = atan2(S₂₁ − S₁₂, S₁₁ + S₂₂), and T₂₁ = −T₁₂ = θ/Δt.
    fn two_state(
        s: &DMatrix<f64>,
        phases: &mut [f64],
        dt: f64,
        h: f64,
    ) -> Result<Self, OverlapError> {
        let det = s[(0, 0)] * s[(1, 1)] - s[(0, 1)] * s[(1, 0)];
        let mut s = s.clone();
        if det < 0.0 {
            let j = if s[(0, 0)].abs() < s[(1, 1)].abs() {
                0
            } else {
                1
            };
            s.column_mut(j).neg_mut();
            phases[j] = -phases[j];
        }
        let (sv_min, _) = two_by_two_singular_values(&s);
        if sv_min < 1e-8 {
            return Err(OverlapError::Singular(sv_min));
        }
        let theta = (s[(1, 0)] - s[(0, 1)]).atan2(s[(0, 0)] + s[(1, 1)]);
        let w = theta / dt;
        let t = DMatrix::from_row_slice(2, 2, &[0.0, -w, w, 0.0]);
        let alpha = -w * h;
        let (sn, cs) = alpha.sin_cos();
        // exp(−T h) is the rotation by α = −θ h/Δt.
        let propagator = DMatrix::from_row_slice(2, 2, &[cs, -sn, sn, cs]);
        // Shears only for moderate angles (tan(α/2) grows without bound near π).
        let shears = (alpha.abs() < 1.0).then(|| ((0.5 * alpha).tan(), sn));
        Ok(Self {
            t,
            propagator,
            shears,
            min_singular_value: sv_min,
        })
    }

    /// No coupling (one state, or a step with no overlap information).
    pub fn none(n: usize) -> Self {
        Self {
            t: DMatrix::zeros(n, n),
            propagator: DMatrix::identity(n, n),
            shears: None,
            min_singular_value: 1.0,
        }
    }

    /// Propagate `c` over the step with energies varying linearly from `e0`
    /// to `e1`, and return the fewest-switches probabilities g_{active→j}
    /// (zero for j = active).
    pub fn propagate(
        &self,
        c: &mut [Complex64],
        e0: &[f64],
        e1: &[f64],
        dt: f64,
        substeps: usize,
        active: usize,
    ) -> Vec<f64> {
        let n = c.len();
        let h = dt / substeps as f64;
        let mut g = vec![0.0; n];
        let mut work = vec![Complex64::new(0.0, 0.0); n];
        let energy = |j: usize, tau: f64| e0[j] + (e1[j] - e0[j]) * (tau / dt);
        // Consecutive half phases merge: for a linear E the second half of
        // substep m and the first half of substep m + 1 together give
        // exp(−i h E((m+1)h)). So the step is
        //   P(h/4) R D(h) R D(2h) … R P(Δt − h/4),
        // with half phases P(τ) = exp(−i (h/2) E(τ)) at the ends and full
        // phases D(τ) = exp(−i h E(τ)) between the rotations R = exp(−T h).
        // D advances by a constant factor from one substep to the next.
        let mut phase: Vec<Complex64> = (0..n)
            .map(|j| Complex64::from_polar(1.0, -h * energy(j, h)))
            .collect();
        let advance: Vec<Complex64> = (0..n)
            .map(|j| Complex64::from_polar(1.0, -h * h * (e1[j] - e0[j]) / dt))
            .collect();
        for (j, cj) in c.iter_mut().enumerate() {
            *cj *= Complex64::from_polar(1.0, -0.5 * h * energy(j, 0.25 * h));
        }
        for m in 0..substeps {
            self.rotate(c, &mut work);
            let pa = c[active].norm_sqr();
            if pa > 0.0 {
                for j in (0..n).filter(|&j| j != active) {
                    let flux = 2.0 * (c[active].conj() * self.t[(active, j)] * c[j]).re;
                    g[j] += h * flux.max(0.0) / pa;
                }
            }
            if m + 1 < substeps {
                for j in 0..n {
                    c[j] *= phase[j];
                    phase[j] *= advance[j];
                }
            }
        }
        for (j, cj) in c.iter_mut().enumerate() {
            *cj *= Complex64::from_polar(1.0, -0.5 * h * energy(j, dt - 0.25 * h));
        }
        g
    }

    /// c ← exp(−T h) c.
    fn rotate(&self, c: &mut [Complex64], work: &mut [Complex64]) {
        if let Some((t, s)) = self.shears {
            // Rotation by α as x ← x − tan(α/2) y; y ← y + sin(α) x; x ← x − tan(α/2) y.
            let (mut x, mut y) = (c[0], c[1]);
            x -= y * t;
            y += x * s;
            x -= y * t;
            c[0] = x;
            c[1] = y;
            return;
        }
        let n = c.len();
        for (i, w) in work.iter_mut().enumerate() {
            *w = (0..n).map(|j| c[j] * self.propagator[(i, j)]).sum();
        }
        c.copy_from_slice(work);
    }
}

/// T = log(S)/Δt and exp(−T h) for a proper real rotation S.
///
/// S is normal, so S = V diag(e^{iθ}) V†. The Hermitian matrix
/// −i(S − Sᵀ)/2 = V diag(sin θ) V† gives V; cos θ_k = Re v_k†((S + Sᵀ)/2)v_k;
/// then log S = V diag(iθ) V† and exp(−Th) = V diag(e^{−iθh/Δt}) V†.
fn log_and_power(s: &DMatrix<f64>, dt: f64, h: f64) -> (DMatrix<f64>, DMatrix<f64>) {
    let n = s.nrows();
    let i = Complex64::new(0.0, 1.0);
    let anti = DMatrix::from_fn(n, n, |r, c| -i * 0.5 * (s[(r, c)] - s[(c, r)]));
    let sym = DMatrix::from_fn(n, n, |r, c| {
        Complex64::new(0.5 * (s[(r, c)] + s[(c, r)]), 0.0)
    });
    let eig = SymmetricEigen::new(anti);
    let v = eig.eigenvectors;
    let thetas: Vec<f64> = (0..n)
        .map(|k| {
            let vk = v.column(k);
            let cos = (vk.adjoint() * &sym * vk)[(0, 0)].re;
            eig.eigenvalues[k].atan2(cos)
        })
        .collect();
    let build = |f: &dyn Fn(f64) -> Complex64| -> DMatrix<f64> {
        let d = DMatrix::from_diagonal(&nalgebra::DVector::from_iterator(
            n,
            thetas.iter().map(|&t| f(t)),
        ));
        (&v * d * v.adjoint()).map(|z| z.re)
    };
    let t = build(&|th| i * th / dt);
    // Enforce exact antisymmetry against rounding.
    let t = (&t - t.transpose()) * 0.5;
    let p = build(&|th| Complex64::from_polar(1.0, -th * h / dt));
    // One Newton step of the polar iteration, P ← P(3 − PᵀP)/2, removes the
    // reconstruction error (~1e-15) from the orthogonality of P, which would
    // otherwise bias the norm over many substeps.
    let p = &p * (DMatrix::identity(n, n) * 3.0 - p.transpose() * &p) * 0.5;
    (t, p)
}

fn two_by_two_singular_values(s: &DMatrix<f64>) -> (f64, f64) {
    let (a, b, c, d) = (s[(0, 0)], s[(0, 1)], s[(1, 0)], s[(1, 1)]);
    let s1 = (a + d).hypot(c - b);
    let s2 = (a - d).hypot(c + b);
    ((s1 - s2).abs() * 0.5, (s1 + s2) * 0.5)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rotation3(a: f64, b: f64, c: f64) -> DMatrix<f64> {
        let rx = DMatrix::from_row_slice(
            3,
            3,
            &[1.0, 0.0, 0.0, 0.0, a.cos(), -a.sin(), 0.0, a.sin(), a.cos()],
        );
        let ry = DMatrix::from_row_slice(
            3,
            3,
            &[b.cos(), 0.0, b.sin(), 0.0, 1.0, 0.0, -b.sin(), 0.0, b.cos()],
        );
        let rz = DMatrix::from_row_slice(
            3,
            3,
            &[c.cos(), -c.sin(), 0.0, c.sin(), c.cos(), 0.0, 0.0, 0.0, 1.0],
        );
        rx * ry * rz
    }

    /// exp(TΔt) must give back S (matrix logarithm round trip), and the
    /// propagator over all substeps must be exp(−TΔt) = Sᵀ.
    #[test]
    fn logarithm_round_trip_three_states() {
        let s = rotation3(0.3, -0.2, 0.45);
        let mut phases = vec![1.0; 3];
        let sc = StepCoupling::from_overlaps(&s, &mut phases, 2.0, 4).unwrap();
        // exp(TΔt) by a Taylor series (T small enough to converge fast).
        let a = &sc.t * 2.0;
        let mut term = DMatrix::identity(3, 3);
        let mut sum = DMatrix::identity(3, 3);
        for k in 1..40 {
            term = &term * &a / k as f64;
            sum += &term;
        }
        assert!((sum - &s).norm() < 1e-12);
        let p4 = &sc.propagator * &sc.propagator * &sc.propagator * &sc.propagator;
        assert!((p4 - s.transpose()).norm() < 1e-12);
        assert!((&sc.t + sc.t.transpose()).norm() < 1e-15);
    }

    /// Tracking check: a rotation (|det| = 1, any sign) passes; a state whose
    /// column keeps 40 % of its norm gives |det| = 0.4: a failure naming it
    /// when it is active or populated; when it is empty it is returned and
    /// the patched overlap gives it no coupling.
    /// Reference: det of a rotation is ±1, det scales linearly in a column
    /// (linear algebra, common practice).
    #[test]
    fn lost_tracking_is_detected_by_the_determinant() {
        let r = rotation3(0.3, -0.2, 0.7);
        // Amplitudes with these populations.
        let amps = |p: &[f64]| -> Vec<Complex64> {
            p.iter().map(|x| Complex64::new(x.sqrt(), 0.0)).collect()
        };
        let pops = amps(&[1.0, 0.0, 0.0]);
        assert_eq!(check_tracking(&r, 0.3, 0, &pops), Ok(None));
        let mut improper = r.clone();
        improper.column_mut(0).neg_mut();
        assert_eq!(check_tracking(&improper, 0.3, 0, &pops), Ok(None));
        let mut lost = DMatrix::identity(3, 3);
        lost[(1, 1)] = 0.4;
        for (active, p) in [(1, [0.0, 1.0, 0.0]), (0, [0.9, 0.1, 0.0])] {
            match check_tracking(&lost, 0.5, active, &amps(&p)) {
                Err(OverlapError::TrackingLost {
                    determinant,
                    floor,
                    state,
                    norm,
                }) => {
                    assert!((determinant - 0.4).abs() < 1e-12);
                    assert_eq!((floor, state), (0.5, 1));
                    assert!((norm - 0.4).abs() < 1e-12);
                }
                other => panic!("{other:?}"),
            }
        }
        let swapped = check_tracking(&lost, 0.5, 0, &pops)
            .unwrap()
            .expect("exchanged states");
        assert_eq!(swapped.states, vec![1]);
        assert!((swapped.determinant - 0.4).abs() < 1e-12);
        assert_eq!(swapped.patch(&lost), DMatrix::identity(3, 3));
        assert_eq!(check_tracking(&lost, 0.3, 1, &pops), Ok(None));
        assert_eq!(check_tracking(&lost, 0.0, 1, &pops), Ok(None));
        // The shortcut (Ostrowski's lower bound) never hides a small |det|:
        // random near-identity and far-from-identity matrices agree with the
        // determinant itself.
        let mut x = 0.37f64;
        for k in 0..2000 {
            let spread = if k % 2 == 0 { 0.05 } else { 0.6 };
            let m = DMatrix::from_fn(4, 4, |i, j| {
                x = (x * 3.7 + 0.13).fract();
                (if i == j { 1.0 } else { 0.0 }) + spread * (2.0 * x - 1.0)
            });
            let small = m.determinant().abs() < 0.3;
            let flagged = !matches!(
                check_tracking(&m, 0.3, 0, &amps(&[1.0, 0.0, 0.0, 0.0])),
                Ok(None)
            );
            assert_eq!(small, flagged, "{m}");
        }
    }

    /// The two-state closed form agrees with the general path (fast vs reference).
    #[test]
    fn two_state_closed_form_matches_general() {
        for &theta in &[0.0, 0.01, -0.4, 1.2] {
            let s2 = DMatrix::from_row_slice(
                2,
                2,
                &[
                    f64::cos(theta),
                    -f64::sin(theta),
                    f64::sin(theta),
                    f64::cos(theta),
                ],
            );
            let mut ph = vec![1.0; 2];
            let fast = StepCoupling::from_overlaps(&s2, &mut ph, 0.5, 3).unwrap();
            let (t, p) = log_and_power(&s2, 0.5, 0.5 / 3.0);
            assert!((fast.t - t).norm() < 1e-13, "theta {theta}");
            assert!((fast.propagator - p).norm() < 1e-13);
        }
    }

    /// The three-shear rotation equals the rotation matrix.
    #[test]
    fn shears_equal_the_rotation_matrix() {
        let s2 = DMatrix::from_row_slice(
            2,
            2,
            &[0.8f64.cos(), -0.8f64.sin(), 0.8f64.sin(), 0.8f64.cos()],
        );
        let mut ph = vec![1.0; 2];
        let sc = StepCoupling::from_overlaps(&s2, &mut ph, 1.0, 4).unwrap();
        assert!(sc.shears.is_some());
        let mut c = vec![Complex64::new(0.3, -0.2), Complex64::new(0.1, 0.9)];
        let expect: Vec<Complex64> = (0..2)
            .map(|i| (0..2).map(|j| c[j] * sc.propagator[(i, j)]).sum())
            .collect();
        let mut work = vec![Complex64::new(0.0, 0.0); 2];
        sc.rotate(&mut c, &mut work);
        for k in 0..2 {
            assert!((c[k] - expect[k]).norm() < 1e-15);
        }
    }

    #[test]
    fn improper_rotation_flips_a_phase() {
        let s = DMatrix::from_row_slice(2, 2, &[0.99, 0.1, 0.1, -0.99]);
        let mut ph = vec![1.0, 1.0];
        let sc = StepCoupling::from_overlaps(&s, &mut ph, 1.0, 1).unwrap();
        assert_eq!(ph, vec![1.0, -1.0]);
        assert!(sc.t[(1, 0)].abs() < 0.2);
    }

    #[test]
    fn singular_overlap_is_an_error() {
        let s = DMatrix::from_row_slice(3, 3, &[1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0]);
        let mut ph = vec![1.0; 3];
        assert!(matches!(
            StepCoupling::from_overlaps(&s, &mut ph, 1.0, 1),
            Err(OverlapError::Singular(_))
        ));
    }
}
