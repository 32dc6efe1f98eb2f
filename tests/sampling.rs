//! Normal modes and Wigner sampling against analytic results.

use flipswarm::sampling::modes::{finite_difference_hessian, normal_modes, ModesError};
use flipswarm::sampling::wigner;
use flipswarm::units;
use nalgebra::DMatrix;
use rand::SeedableRng;

/// A network of harmonic springs V = Σ ½k(r_ij − r0_ij)²: energy gradient and
/// analytic Hessian (textbook calculus of central forces).
struct Springs {
    pairs: Vec<(usize, usize, f64, f64)>, // (i, j, k, r0)
}

impl Springs {
    fn gradient(&self, q: &[f64]) -> Vec<f64> {
        let mut g = vec![0.0; q.len()];
        for &(i, j, k, r0) in &self.pairs {
            let d: Vec<f64> = (0..3).map(|c| q[3 * i + c] - q[3 * j + c]).collect();
            let r = d.iter().map(|x| x * x).sum::<f64>().sqrt();
            for c in 0..3 {
                let f = k * (r - r0) * d[c] / r;
                g[3 * i + c] += f;
                g[3 * j + c] -= f;
            }
        }
        g
    }
    fn hessian(&self, q: &[f64]) -> DMatrix<f64> {
        let n = q.len();
        let mut h = DMatrix::zeros(n, n);
        for &(i, j, k, r0) in &self.pairs {
            let d: Vec<f64> = (0..3).map(|c| q[3 * i + c] - q[3 * j + c]).collect();
            let r = d.iter().map(|x| x * x).sum::<f64>().sqrt();
            for a in 0..3 {
                for b in 0..3 {
                    let uu = d[a] * d[b] / (r * r);
                    let id = if a == b { 1.0 } else { 0.0 };
                    let block = k * (uu + (1.0 - r0 / r) * (id - uu));
                    h[(3 * i + a, 3 * i + b)] += block;
                    h[(3 * j + a, 3 * j + b)] += block;
                    h[(3 * i + a, 3 * j + b)] -= block;
                    h[(3 * j + a, 3 * i + b)] -= block;
                }
            }
        }
        h
    }
}

fn flat(p: &[[f64; 3]]) -> Vec<f64> {
    p.iter().flatten().copied().collect()
}

/// A linear symmetric triatomic X–Y–X with central springs k: the stretches
/// have ω_s² = k/m_X and ω_a² = k(1/m_X + 2/m_Y), the two bends have zero
/// frequency (textbook: H. Goldstein, Classical Mechanics, §6.4); five
/// external degrees of freedom are removed.
#[test]
fn linear_triatomic_frequencies_are_analytic() {
    let (mx, my) = (units::amu_to_me(15.994_914_619_57), units::amu_to_me(12.0));
    let k = 1.0; // hartree/bohr²
    let r = 2.2;
    let pos = [[0.0, 0.0, -r], [0.0, 0.0, 0.0], [0.0, 0.0, r]];
    let s = Springs {
        pairs: vec![(0, 1, k, r), (1, 2, k, r)],
    };
    let modes = normal_modes(&s.hessian(&flat(&pos)), &pos, &[mx, my, mx]).unwrap();
    assert!(modes.linear);
    assert_eq!(modes.omegas.len(), 4);
    let ws = (k / mx).sqrt();
    let wa = (k * (1.0 / mx + 2.0 / my)).sqrt();
    // ω = √|λ| turns rounding of λ (1e-20 against k/m ≈ 3e-5) into ~1e-10.
    let bends: Vec<f64> = modes.wavenumbers()[..2].to_vec();
    assert!(bends.iter().all(|b| b.abs() < 0.01), "bends {bends:?} cm-1");
    assert!(
        (modes.omegas[2] / ws - 1.0).abs() < 1e-6,
        "{} vs {ws}",
        modes.omegas[2]
    );
    assert!(
        (modes.omegas[3] / wa - 1.0).abs() < 1e-6,
        "{} vs {wa}",
        modes.omegas[3]
    );
    // Orthonormal mass-weighted modes.
    let v = &modes.vectors;
    assert!((v.transpose() * v - DMatrix::identity(4, 4)).norm() < 1e-12);
}

fn rotation(a: f64, b: f64, c: f64) -> [[f64; 3]; 3] {
    let (sa, ca) = a.sin_cos();
    let (sb, cb) = b.sin_cos();
    let (sc, cc) = c.sin_cos();
    let rx = [[1.0, 0.0, 0.0], [0.0, ca, -sa], [0.0, sa, ca]];
    let ry = [[cb, 0.0, sb], [0.0, 1.0, 0.0], [-sb, 0.0, cb]];
    let rz = [[cc, -sc, 0.0], [sc, cc, 0.0], [0.0, 0.0, 1.0]];
    let mul = |p: [[f64; 3]; 3], q: [[f64; 3]; 3]| -> [[f64; 3]; 3] {
        std::array::from_fn(|i| std::array::from_fn(|j| (0..3).map(|k| p[i][k] * q[k][j]).sum()))
    };
    mul(mul(rx, ry), rz)
}

/// A bent triatomic (three springs, a triangle): 6 external degrees of
/// freedom are removed; a rotated and translated copy gives the same
/// frequencies (invariance, common practice) and its external modes, kept in
/// the full Hessian, are below 1 cm⁻¹.
#[test]
fn bent_triatomic_is_invariant_under_rigid_motion() {
    let m = [
        units::amu_to_me(15.995),
        units::amu_to_me(1.008),
        units::amu_to_me(1.008),
    ];
    let pos = [[0.0, 0.0, 0.0], [1.43, 1.11, 0.0], [-1.43, 1.11, 0.0]];
    let d = |a: [f64; 3], b: [f64; 3]| {
        ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)).sqrt()
    };
    let s = Springs {
        pairs: vec![
            (0, 1, 0.5, d(pos[0], pos[1])),
            (0, 2, 0.5, d(pos[0], pos[2])),
            (1, 2, 0.05, d(pos[1], pos[2])),
        ],
    };
    let base = normal_modes(&s.hessian(&flat(&pos)), &pos, &m).unwrap();
    assert!(!base.linear);
    assert_eq!(base.omegas.len(), 3);
    assert!(base.omegas.iter().all(|w| *w > 0.0));
    let rot = rotation(0.3, -1.1, 2.0);
    let moved: Vec<[f64; 3]> = pos
        .iter()
        .map(|p| {
            std::array::from_fn(|i| {
                (0..3).map(|k| rot[i][k] * p[k]).sum::<f64>() + [3.0, -2.0, 7.5][i]
            })
        })
        .collect();
    let other = normal_modes(&s.hessian(&flat(&moved)), &moved, &m).unwrap();
    for (a, b) in base.omegas.iter().zip(&other.omegas) {
        assert!((a / b - 1.0).abs() < 1e-10, "{a} vs {b}");
    }
    // Without projection, the 6 lowest eigenvalues of the mass-weighted
    // Hessian at this stationary geometry are below 1 cm⁻¹.
    let h = s.hessian(&flat(&moved));
    let hm = DMatrix::from_fn(9, 9, |i, j| h[(i, j)] / (m[i / 3] * m[j / 3]).sqrt());
    let mut ev: Vec<f64> = nalgebra::SymmetricEigen::new(hm)
        .eigenvalues
        .iter()
        .copied()
        .collect();
    ev.sort_by(|a, b| a.abs().total_cmp(&b.abs()));
    for e in &ev[..6] {
        assert!(
            units::hartree_to_cm1(e.abs().sqrt()) < 1.0,
            "external mode {} cm-1",
            units::hartree_to_cm1(e.abs().sqrt())
        );
    }
}

/// The finite-difference Hessian of analytic gradients agrees with the
/// analytic Hessian to 1e-5 relative (central differences, error O(h²)).
#[test]
fn finite_difference_hessian_matches_analytic() {
    let pos = [
        [0.0, 0.0, 0.0],
        [1.5, 1.0, 0.2],
        [-1.4, 1.2, -0.1],
        [0.1, -1.6, 0.4],
    ];
    let q = flat(&pos);
    // Springs away from their rest lengths: a non-stationary geometry.
    let s = Springs {
        pairs: vec![
            (0, 1, 0.5, 1.7),
            (0, 2, 0.5, 1.9),
            (1, 2, 0.1, 2.5),
            (0, 3, 0.4, 1.8),
            (2, 3, 0.2, 3.0),
        ],
    };
    let fd = finite_difference_hessian::<(), _>(&q, 1e-4, |x| Ok(s.gradient(x))).unwrap();
    let exact = s.hessian(&q);
    let err = (&fd - &exact).abs().max() / exact.abs().max();
    assert!(err < 1e-5, "relative deviation {err}");
}

#[test]
fn wrong_hessian_shape_names_the_shapes() {
    let e = normal_modes(&DMatrix::zeros(8, 9), &[[0.0; 3]; 3], &[1.0; 3]).unwrap_err();
    assert_eq!(
        e,
        ModesError::Shape {
            rows: 8,
            cols: 9,
            atoms: 3
        }
    );
    assert!(
        e.to_string().contains("8×9") && e.to_string().contains("9×9"),
        "{e}"
    );
    let e = normal_modes(
        &DMatrix::zeros(6, 6),
        &[[0.0; 3], [1.0, 0.0, 0.0]],
        &[1.0, -2.0],
    )
    .unwrap_err();
    assert!(e.to_string().contains("atom 1"), "{e}");
}

/// Thermal harmonic Wigner distribution (Phys. Rep. 106, 121 (1984)):
/// sample variances of Q and P equal (ħ/2ω)coth(ħω/2kT) and
/// (ħω/2)coth(ħω/2kT), and the mean energy per mode (ħω/2)coth(ħω/2kT), at
/// T = 0, 300 K and 3000 K, within 5 standard errors.
#[test]
fn wigner_moments_match_the_thermal_harmonic_oscillator() {
    let omegas = [
        units::cm1_to_hartree(200.0),
        units::cm1_to_hartree(1600.0),
        units::cm1_to_hartree(3700.0),
    ];
    let n = 100_000;
    for t in [0.0, 300.0, 3000.0] {
        let kt = units::kelvin_to_hartree(t);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(t as u64 + 1);
        let mut sq = [0.0; 3];
        let mut sp = [0.0; 3];
        for _ in 0..n {
            let (q, p) = wigner::sample(&omegas, kt, &[], &mut rng);
            for k in 0..3 {
                sq[k] += q[k] * q[k];
                sp[k] += p[k] * p[k];
            }
        }
        for k in 0..3 {
            let w = omegas[k];
            let c = if t == 0.0 {
                1.0
            } else {
                1.0 / (w / (2.0 * kt)).tanh()
            };
            let (vq, vp) = (sq[k] / n as f64, sp[k] / n as f64);
            let (eq, ep) = (0.5 * c / w, 0.5 * c * w);
            let tol = 5.0 * (2.0 / n as f64).sqrt();
            assert!(
                (vq / eq - 1.0).abs() < tol,
                "T={t} mode {k}: <Q²> {vq} vs {eq}"
            );
            assert!(
                (vp / ep - 1.0).abs() < tol,
                "T={t} mode {k}: <P²> {vp} vs {ep}"
            );
            let energy = 0.5 * vp + 0.5 * w * w * vq;
            assert!(
                (energy / (0.5 * w * c) - 1.0).abs() < tol,
                "T={t} mode {k}: energy"
            );
        }
    }
    // Frozen modes stay at rest.
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
    let (q, p) = wigner::sample(&omegas, 0.0, &[1], &mut rng);
    assert_eq!((q[1], p[1]), (0.0, 0.0));
}

/// After `remove_net_momenta` the total linear momentum and the angular
/// momentum about the centre of mass vanish (to 1e-12 of their size before),
/// for a bent and for a linear geometry (definitions of classical mechanics).
#[test]
fn net_linear_and_angular_momenta_are_removed() {
    use rand::Rng;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
    let geometries: [(Vec<f64>, Vec<f64>); 2] = [
        (
            vec![
                0.0, 0.0, 0.0, 1.43, 1.11, 0.1, -1.43, 1.11, -0.2, 0.3, -1.5, 0.9,
            ],
            vec![29000.0, 1837.0, 1837.0, 21900.0],
        ),
        (
            vec![0.0, 0.0, -2.2, 0.0, 0.0, 0.0, 0.0, 0.0, 2.2],
            vec![29000.0, 21900.0, 29000.0],
        ),
    ];
    for (q, m) in geometries {
        let mut v: Vec<f64> = (0..q.len()).map(|_| rng.gen_range(-1e-3..1e-3)).collect();
        let moments = |v: &[f64]| {
            let n = m.len();
            let total: f64 = m.iter().sum();
            let com: Vec<f64> = (0..3)
                .map(|k| (0..n).map(|a| m[a] * q[3 * a + k]).sum::<f64>() / total)
                .collect();
            let p: Vec<f64> = (0..3)
                .map(|k| (0..n).map(|a| m[a] * v[3 * a + k]).sum())
                .collect();
            let mut l = [0.0; 3];
            for a in 0..n {
                let d: Vec<f64> = (0..3).map(|k| q[3 * a + k] - com[k]).collect();
                let u: Vec<f64> = (0..3).map(|k| v[3 * a + k]).collect();
                l[0] += m[a] * (d[1] * u[2] - d[2] * u[1]);
                l[1] += m[a] * (d[2] * u[0] - d[0] * u[2]);
                l[2] += m[a] * (d[0] * u[1] - d[1] * u[0]);
            }
            (
                p.iter().map(|x| x * x).sum::<f64>().sqrt(),
                l.iter().map(|x| x * x).sum::<f64>().sqrt(),
            )
        };
        let (p0, l0) = moments(&v);
        wigner::remove_net_momenta(&q, &mut v, &m);
        let (p1, l1) = moments(&v);
        assert!(
            p1 < 1e-12 * p0.max(1e-300) + 1e-18,
            "linear momentum {p1} (was {p0})"
        );
        assert!(
            l1 < 1e-12 * l0.max(1e-300) + 1e-18,
            "angular momentum {l1} (was {l0})"
        );
    }
}
