//! The analytic model back ends against the back-end contract
//! (`src/electronic/mod.rs`): every derivative is checked against finite
//! differences of the quantity it is the derivative of (design rule
//! "finite-difference checks of every derivative"), overlaps and caching
//! against their documented meaning, snapshots against bit-for-bit
//! continuation, and failures against the typed `BackendError` variants.
//!
//! Models: Tully's three models (J. Chem. Phys. 93, 1061 (1990)), two LVC
//! fixtures in `tests/data/models/`, harmonic and Morse oscillators.
//!
//! Finite differences: central, step h = 1e-5, error O(h²). Tully models 1 and
//! 3 are defined piecewise with a jump of the second derivative at x = 0; a
//! central difference straddling that point is only first-order accurate, so
//! there (and only there) the derivative is checked with the second-order
//! one-sided formulas f'(0) ≈ (−3f(0) + 4f(h) − f(2h))/(2h) on both sides
//! (standard numerical analysis, from memory).

use std::path::{Path, PathBuf};

use flipswarm::electronic::models::{DiabaticBackend, Harmonic, Lvc, Morse, Tully, TullyModel};
use flipswarm::electronic::{Backend, BackendError, Request};
use nalgebra::DMatrix;

/// Hartree in eV, CODATA 2018 (from memory), kept independent of `units`.
const HARTREE_EV: f64 = 27.211_386_245_988;

/// The finite-difference step used everywhere unless stated otherwise.
const H: f64 = 1e-5;

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/models")
        .join(name)
}

fn lvc3() -> Lvc {
    Lvc::from_file(&fixture("three-state-four-mode.toml")).expect("fixture parses")
}

fn cone() -> Lvc {
    Lvc::from_file(&fixture("two-state-cone.toml")).expect("fixture parses")
}

/// How the derivative at a point is estimated.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Scheme {
    /// (f(h) − f(−h))/(2h).
    Central,
    /// Both one-sided second-order formulas (at a kink of the model).
    OneSided,
}

/// A model to test: a factory for fresh back ends and the test geometries.
struct Case {
    label: String,
    make: Box<dyn Fn() -> Box<dyn Backend>>,
    points: Vec<(Vec<f64>, Scheme)>,
    /// Finite-difference step for coupling vectors from overlaps.
    nac_step: f64,
}

fn tully_case(model: TullyModel, xs: &[f64]) -> Case {
    let t = Tully::new(model);
    let kink = matches!(
        model,
        TullyModel::SimpleAvoidedCrossing | TullyModel::ExtendedCoupling
    );
    let points = xs
        .iter()
        .map(|&x| {
            (
                vec![x],
                if kink && x == 0.0 {
                    Scheme::OneSided
                } else {
                    Scheme::Central
                },
            )
        })
        .collect();
    let label = format!("{model:?}");
    Case {
        label,
        make: Box::new(move || Box::new(DiabaticBackend::new(t.clone()))),
        points,
        nac_step: H,
    }
}

/// Dimensionless normal coordinates Q → the back end's x_i = Q_i/√ω_i.
fn lvc_x(model: &Lvc, q: &[f64]) -> Vec<f64> {
    q.iter()
        .zip(&model.omegas)
        .map(|(q, w)| q / w.sqrt())
        .collect()
}

fn lvc_case(label: &str, model: Lvc, qs: &[&[f64]], nac_step: f64) -> Case {
    let points = qs
        .iter()
        .map(|q| (lvc_x(&model, q), Scheme::Central))
        .collect();
    Case {
        label: label.into(),
        make: Box::new(move || Box::new(DiabaticBackend::new(model.clone()))),
        points,
        nac_step,
    }
}

/// Every model with its test geometries: Tully models near 0 on both sides,
/// on both sides of the avoided crossings and in the asymptotic regions.
fn multi_state_cases() -> Vec<Case> {
    vec![
        tully_case(
            TullyModel::SimpleAvoidedCrossing,
            &[-6.0, -1.2, -0.3, -1e-3, 0.0, 1e-3, 0.3, 1.2, 6.0],
        ),
        // ±1.5735: where V22 crosses V11 = 0 (the two avoided crossings).
        tully_case(
            TullyModel::DualAvoidedCrossing,
            &[-6.0, -1.5735, -0.5, -1e-3, 0.0, 1e-3, 0.5, 1.5735, 6.0],
        ),
        tully_case(
            TullyModel::ExtendedCoupling,
            &[-8.0, -2.0, -0.4, -1e-3, 0.0, 1e-3, 0.4, 2.0, 8.0],
        ),
        lvc_case(
            "lvc 3 states x 4 modes",
            lvc3(),
            &[
                &[0.3, -0.5, 0.7, -0.2],
                &[2.0, 1.0, 0.5, -0.5],
                &[0.9, -1.3, -0.6, 0.4],
                &[-1.5, 0.8, 1.2, 0.6],
            ],
            // Mass-weighted x = Q/√ω: one unit of Q is about 16 units of x, so
            // 1e-3 is still a small step (6e-5 in Q). A larger step than
            // elsewhere: the eigenvectors once carried ~1e-12 noise in weakly
            // coupled components (see
            // `regression_general_eigensolver_keeps_weak_couplings_in_overlaps`).
            1e-3,
        ),
        lvc_case(
            "lvc cone (away from the intersection)",
            cone(),
            &[&[0.0, 0.0], &[1.3, 0.4], &[0.7, -0.2], &[-0.5, 1.1]],
            H,
        ),
    ]
}

fn one_state_cases() -> Vec<Case> {
    let harmonic = Harmonic {
        masses: vec![1836.15, 1.0],
        omegas: vec![0.02, 0.5],
        centres: vec![0.3, -1.0],
    };
    let morse = Morse {
        mass: 1836.15,
        depth: 0.17,
        alpha: 1.1,
        r_eq: 1.4,
    };
    vec![
        Case {
            label: "harmonic (2 coordinates)".into(),
            make: Box::new(move || Box::new(DiabaticBackend::new(harmonic.clone()))),
            points: vec![
                (vec![0.3, -1.0], Scheme::Central),
                (vec![1.0, 0.5], Scheme::Central),
                (vec![-2.0, 3.0], Scheme::Central),
            ],
            nac_step: H,
        },
        Case {
            label: "morse".into(),
            make: Box::new(move || Box::new(DiabaticBackend::new(morse.clone()))),
            points: [0.8, 1.2, 1.4, 2.0, 3.5, 8.0]
                .iter()
                .map(|&r| (vec![r], Scheme::Central))
                .collect(),
            nac_step: H,
        },
    ]
}

fn displaced(q: &[f64], k: usize, t: f64) -> Vec<f64> {
    let mut p = q.to_vec();
    p[k] += t;
    p
}

/// Derivative estimates of f at t = 0: one (central) or two (left, right).
fn derivative_estimates(scheme: Scheme, h: f64, f: &dyn Fn(f64) -> f64) -> Vec<f64> {
    match scheme {
        Scheme::Central => vec![(f(h) - f(-h)) / (2.0 * h)],
        Scheme::OneSided => {
            let f0 = f(0.0);
            vec![
                (-3.0 * f0 + 4.0 * f(h) - f(2.0 * h)) / (2.0 * h),
                (3.0 * f0 - 4.0 * f(-h) + f(-2.0 * h)) / (2.0 * h),
            ]
        }
    }
}

fn energies(make: &dyn Fn() -> Box<dyn Backend>, q: &[f64]) -> Vec<f64> {
    make()
        .compute(q, &Request::energies())
        .expect("energies")
        .energies
        .clone()
}

/// Shows: ∂E_i/∂q_k from the back end (Hellmann–Feynman) equals central finite
/// differences of the adiabatic energies, for every state, coordinate, model
/// and test point. Source: the definition of a gradient (design rule).
#[test]
fn gradients_match_finite_differences_of_energies() {
    let mut worst = 0.0_f64;
    for case in multi_state_cases().into_iter().chain(one_state_cases()) {
        let mut case_worst = 0.0_f64;
        for (q, scheme) in &case.points {
            let mut b = (case.make)();
            let n = b.info().n_states;
            let all = Request {
                gradients: (0..n).collect(),
                ..Request::default()
            };
            let res = b.compute(q, &all).expect("compute").clone();
            assert_eq!(res.energies.len(), n);
            assert!(
                res.energies.windows(2).all(|w| w[0] <= w[1]),
                "{}: energies not ascending",
                case.label
            );
            for s in 0..n {
                let g = res.gradient(s).expect("requested gradient present");
                assert_eq!(g.len(), q.len());
                for k in 0..q.len() {
                    let f = |t: f64| energies(&*case.make, &displaced(q, k, t))[s];
                    for fd in derivative_estimates(*scheme, H, &f) {
                        let dev = (fd - g[k]).abs();
                        let scale = g[k].abs().max(1e-2);
                        case_worst = case_worst.max(dev / scale);
                        assert!(
                            dev <= 1e-7 * scale,
                            "{} q={q:?} state {s} coord {k}: analytic {:.12e}, finite difference {fd:.12e}",
                            case.label,
                            g[k]
                        );
                    }
                }
            }
        }
        eprintln!(
            "{}: largest gradient deviation {case_worst:.2e}",
            case.label
        );
        worst = worst.max(case_worst);
    }
    eprintln!("largest gradient deviation (relative to max(|g|, 1e-2)): {worst:.2e}");
}

/// S(q, q + t e_k) with the columns' signs fixed so that the diagonal is
/// positive (aligns the phases at q + t with those at q). Two calls on a fresh
/// back end: q first, then the displaced geometry with overlaps requested.
fn aligned_overlap(
    make: &dyn Fn() -> Box<dyn Backend>,
    q: &[f64],
    k: usize,
    t: f64,
) -> DMatrix<f64> {
    let mut b = make();
    b.compute(q, &Request::energies())
        .expect("reference geometry");
    let req = Request {
        overlaps: true,
        ..Request::default()
    };
    let mut s = b
        .compute(&displaced(q, k, t), &req)
        .expect("displaced")
        .overlaps
        .clone()
        .expect("overlaps after two geometries");
    for j in 0..s.ncols() {
        if s[(j, j)] < 0.0 {
            s.column_mut(j).neg_mut();
        }
    }
    s
}

/// Shows: the nonadiabatic coupling vectors d_ij = <u_i|∂u_j/∂q> of the back end
/// equal finite differences of the eigenvectors taken through its own overlap
/// matrices. With S(t) = S(q, q + t e_k) (phases aligned):
/// S_ij(t) = δ_ij + t d_ij,k + t²/2 <u_i|∂²u_j> + O(t³), hence
/// d_ij,k = (S_ij(h) − S_ij(−h))/(2h) + O(h²) (Taylor expansion, derived here).
/// Also: the finite-difference matrix is antisymmetric and has a zero diagonal,
/// as is `Couplings::get`. Source: definition of d_ij (design rule).
#[test]
fn coupling_vectors_match_finite_differences_of_overlaps() {
    let mut worst = 0.0_f64;
    for case in multi_state_cases() {
        let mut case_worst = 0.0_f64;
        for (q, scheme) in &case.points {
            let mut b = (case.make)();
            let n = b.info().n_states;
            let d = b
                .compute(
                    q,
                    &Request {
                        couplings: true,
                        ..Request::default()
                    },
                )
                .expect("compute")
                .couplings
                .clone()
                .expect("couplings requested");
            assert_eq!(d.n_states(), n);
            for k in 0..q.len() {
                // S(t) for the few t the scheme needs, computed once each.
                let h = case.nac_step;
                let ts: Vec<f64> = match scheme {
                    Scheme::Central => vec![h, -h],
                    Scheme::OneSided => vec![h, 2.0 * h, -h, -2.0 * h],
                };
                let mats: Vec<(f64, DMatrix<f64>)> = ts
                    .iter()
                    .map(|&t| (t, aligned_overlap(&*case.make, q, k, t)))
                    .collect();
                let s_at = |t: f64| -> DMatrix<f64> {
                    if t == 0.0 {
                        return DMatrix::identity(n, n);
                    }
                    mats.iter()
                        .find(|(x, _)| *x == t)
                        .expect("precomputed")
                        .1
                        .clone()
                };
                let mut fd_mats = Vec::new();
                for i in 0..n {
                    for j in 0..n {
                        let f = |t: f64| s_at(t)[(i, j)];
                        for (m, fd) in derivative_estimates(*scheme, h, &f).into_iter().enumerate()
                        {
                            if fd_mats.len() <= m {
                                fd_mats.push(DMatrix::zeros(n, n));
                            }
                            fd_mats[m][(i, j)] = fd;
                        }
                    }
                }
                for fd in &fd_mats {
                    for i in 0..n {
                        assert!(
                            fd[(i, i)].abs() < 1e-6,
                            "{} q={q:?}: diagonal d_{i}{i} = {}",
                            case.label,
                            fd[(i, i)]
                        );
                        assert_eq!(d.get(i, i)[k], 0.0);
                        for j in 0..n {
                            if i == j {
                                continue;
                            }
                            let analytic = d.get(i, j)[k];
                            assert_eq!(
                                analytic,
                                -d.get(j, i)[k],
                                "Couplings::get must be antisymmetric"
                            );
                            let scale = analytic.abs().max(1e-2);
                            let dev = (fd[(i, j)] - analytic).abs();
                            case_worst = case_worst.max(dev / scale);
                            assert!(
                                dev <= 1e-6 * scale,
                                "{} q={q:?} d_{i}{j},{k}: analytic {analytic:.12e}, from overlaps {:.12e}",
                                case.label,
                                fd[(i, j)]
                            );
                            assert!(
                                (fd[(i, j)] + fd[(j, i)]).abs() <= 1e-6 * scale,
                                "{} q={q:?}: finite-difference d not antisymmetric",
                                case.label
                            );
                        }
                    }
                }
            }
        }
        eprintln!(
            "{}: largest coupling deviation {case_worst:.2e}",
            case.label
        );
        worst = worst.max(case_worst);
    }
    eprintln!("largest coupling deviation (relative to max(|d|, 1e-2)): {worst:.2e}");
}

/// Shows: the Tully-1 coupling peaks where published, d_12(0) = AB/(2C) = 1.6
/// bohr⁻¹ in magnitude (A = 0.01, B = 1.6, C = 0.005, J. Chem. Phys. 93, 1061
/// (1990); the value follows from d = (V11' V12 − V12' V11)/(2(V11² + V12²)),
/// derived by hand from the two-state rotation angle).
#[test]
fn tully1_coupling_at_the_crossing_has_the_analytic_value() {
    let mut b = DiabaticBackend::new(Tully::new(TullyModel::SimpleAvoidedCrossing));
    let d = b
        .compute(
            &[0.0],
            &Request {
                couplings: true,
                ..Request::default()
            },
        )
        .unwrap()
        .couplings
        .clone()
        .unwrap();
    let expected = 0.01 * 1.6 / (2.0 * 0.005);
    assert!(
        (d.get(0, 1)[0].abs() - expected).abs() < 1e-12,
        "d_01(0) = {}",
        d.get(0, 1)[0]
    );
}

fn overlap_after(make: &dyn Fn() -> Box<dyn Backend>, a: &[f64], b: &[f64]) -> DMatrix<f64> {
    let mut be = make();
    be.compute(a, &Request::energies()).unwrap();
    be.compute(
        b,
        &Request {
            overlaps: true,
            ..Request::default()
        },
    )
    .unwrap()
    .overlaps
    .clone()
    .unwrap()
}

fn max_abs(m: &DMatrix<f64>) -> f64 {
    m.iter().fold(0.0, |a, x| a.max(x.abs()))
}

/// Shows: when the electronic Hamiltonian at the two geometries is the same,
/// the overlap matrix is a signed identity. Tully-1 at x = 30 and x = 32 has
/// bitwise identical diabatic matrices (e^{−48} and e^{−900} vanish in double
/// precision; asserted below); one-state models always give S = ±1.
/// Source: definition S = U(previous)ᵀ U(current) (back-end contract).
#[test]
fn overlaps_for_identical_hamiltonians_are_a_signed_identity() {
    let t = Tully::new(TullyModel::SimpleAvoidedCrossing);
    assert_eq!(
        t.matrix(30.0),
        t.matrix(32.0),
        "precondition: identical diabatic matrices"
    );
    let make = move || -> Box<dyn Backend> { Box::new(DiabaticBackend::new(t.clone())) };
    let s = overlap_after(&make, &[30.0], &[32.0]);
    let signs = DMatrix::from_fn(2, 2, |i, j| if i == j { s[(i, i)].signum() } else { 0.0 });
    assert!(max_abs(&(&s - signs)) < 1e-14, "S = {s}");

    // Also the first call has no overlaps, and the same geometry again does not
    // create any (they refer to the previous *distinct* geometry).
    let mut b = make();
    let req = Request {
        overlaps: true,
        ..Request::default()
    };
    assert!(b.compute(&[1.0], &req).unwrap().overlaps.is_none());
    assert!(b.compute(&[1.0], &req).unwrap().overlaps.is_none());

    for case in one_state_cases() {
        let (a, _) = &case.points[0];
        let (c, _) = &case.points[1];
        let s = overlap_after(&*case.make, a, c);
        assert_eq!(s.shape(), (1, 1));
        assert!(
            (s[(0, 0)].abs() - 1.0).abs() < 1e-15,
            "{}: S = {s}",
            case.label
        );
    }
}

/// Shows: for a small step of length h the overlap matrix is orthogonal (here
/// exactly, to rounding, since every state of the model is tracked), deviates
/// from a signed identity by O(h) through its antisymmetric part only, and its
/// symmetric part deviates from the identity by O(h²) (S = exp(hA) with A
/// antisymmetric, to first order). Checked by the scaling when h shrinks ten
/// times. Source: Taylor expansion of <u_i(q)|u_j(q + h e)> (derived above).
#[test]
fn small_step_overlaps_are_orthogonal_to_second_order() {
    for case in multi_state_cases() {
        for (q, _) in case.points.iter().filter(|(_, s)| *s == Scheme::Central) {
            // A fixed direction with components on every coordinate.
            let dir: Vec<f64> = (0..q.len()).map(|k| 1.0 + 0.37 * k as f64).collect();
            let norm = dir.iter().map(|x| x * x).sum::<f64>().sqrt();
            let mut sym_dev = Vec::new();
            for &h in &[1e-3, 1e-4] {
                let p: Vec<f64> = q.iter().zip(&dir).map(|(x, d)| x + h * d / norm).collect();
                let mut s = overlap_after(&*case.make, q, &p);
                for j in 0..s.ncols() {
                    if s[(j, j)] < 0.0 {
                        s.column_mut(j).neg_mut();
                    }
                }
                let n = s.nrows();
                let id = DMatrix::<f64>::identity(n, n);
                let ortho = max_abs(&(s.transpose() * &s - &id));
                assert!(ortho < 1e-13, "{} q={q:?}: SᵀS − 1 = {ortho:e}", case.label);
                sym_dev.push(max_abs(&((&s + s.transpose()) * 0.5 - &id)));
            }
            // O(h²): ten times smaller step, about a hundred times smaller
            // deviation (unless already at rounding level).
            if sym_dev[0] > 1e-10 {
                let ratio = sym_dev[0] / sym_dev[1];
                assert!(
                    (50.0..200.0).contains(&ratio),
                    "{} q={q:?}: symmetric-part ratio {ratio}",
                    case.label
                );
            } else {
                assert!(sym_dev[1] < 1e-11, "{} q={q:?}", case.label);
            }
        }
    }
}

/// Shows the caching contract: a second call at the same geometry computes only
/// what is new, returns the same energies and gradients as before (bitwise), and
/// its overlaps refer to the previous distinct geometry — equal to those of a
/// back end that asked for overlaps at once. Source: back-end contract
/// (`src/electronic/mod.rs`).
#[test]
fn caching_keeps_results_and_overlaps_refer_to_previous_distinct_geometry() {
    let model = lvc3();
    let q1 = lvc_x(&model, &[0.3, -0.5, 0.7, -0.2]);
    let q2 = lvc_x(&model, &[0.9, -1.3, -0.6, 0.4]);
    let mut a = DiabaticBackend::new(model.clone());
    a.compute(&q1, &Request::energies()).unwrap();
    let first = a.compute(&q2, &Request::gradient_of(1)).unwrap().clone();
    assert!(first.overlaps.is_none() && first.couplings.is_none());
    assert_eq!(first.gradients.len(), 1);

    let more = Request {
        gradients: vec![0, 1, 2],
        overlaps: true,
        couplings: true,
        ..Request::default()
    };
    let second = a.compute(&q2, &more).unwrap().clone();
    assert_eq!(second.energies, first.energies);
    assert_eq!(second.gradient(1), first.gradient(1));
    assert!(second.gradient(0).is_some() && second.gradient(2).is_some());
    let s_cached = second
        .overlaps
        .clone()
        .expect("previous distinct geometry is q1");

    // A back end asked for everything at once along the same path.
    let mut b = DiabaticBackend::new(model.clone());
    b.compute(&q1, &Request::energies()).unwrap();
    let direct = b.compute(&q2, &more).unwrap().clone();
    assert_eq!(direct.energies, second.energies);
    for s in 0..3 {
        assert_eq!(direct.gradient(s), second.gradient(s), "state {s}");
    }
    assert_eq!(direct.overlaps, second.overlaps);
    assert_eq!(direct.couplings, second.couplings);
    // The overlaps are S(q1, q2), clearly not S(q2, q2) = signed identity.
    let off: f64 = (0..3)
        .flat_map(|i| (0..3).filter(move |&j| j != i).map(move |j| (i, j)))
        .map(|(i, j)| s_cached[(i, j)].abs())
        .fold(0.0, f64::max);
    assert!(
        off > 1e-2,
        "overlaps look like the same geometry: {s_cached}"
    );

    // A third call asking for less keeps everything.
    let third = a.compute(&q2, &Request::energies()).unwrap().clone();
    assert_eq!(third, second);
}

/// Shows: a snapshot carries what is needed to continue exactly. A fresh back
/// end restored from it produces overlaps at the next geometry that are bitwise
/// those of the uninterrupted back end; and the stored phases are really used
/// (flipping a stored eigenvector flips the matching row of the next overlap
/// matrix). Also survives a JSON round trip. Source: back-end contract.
#[test]
fn snapshot_restore_continues_bit_for_bit() {
    let model = lvc3();
    let path: Vec<Vec<f64>> = [
        [0.3, -0.5, 0.7, -0.2],
        [0.31, -0.49, 0.69, -0.19],
        [0.33, -0.47, 0.68, -0.18],
    ]
    .iter()
    .map(|q| lvc_x(&model, q))
    .collect();
    let req = Request {
        gradients: vec![1],
        overlaps: true,
        couplings: true,
        ..Request::default()
    };
    let mut a = DiabaticBackend::new(model.clone());
    a.compute(&path[0], &req).unwrap();
    a.compute(&path[1], &req).unwrap();
    let snap = a.snapshot();
    assert_eq!(snap.geometry, path[1]);
    let uninterrupted = a.compute(&path[2], &req).unwrap().clone();

    let mut b = DiabaticBackend::new(model.clone());
    b.restore(&snap).unwrap();
    let resumed = b.compute(&path[2], &req).unwrap().clone();
    assert_eq!(
        resumed, uninterrupted,
        "restored back end must continue bit for bit"
    );

    let json = serde_json::to_string(&snap).unwrap();
    let back: flipswarm::electronic::Snapshot = serde_json::from_str(&json).unwrap();
    let mut c = DiabaticBackend::new(model.clone());
    c.restore(&back).unwrap();
    assert_eq!(
        c.compute(&path[2], &req).unwrap().overlaps,
        uninterrupted.overlaps,
        "after a JSON round trip"
    );

    // Flip the sign of stored eigenvector 2: row 2 of the next S flips.
    let mut flipped = snap.clone();
    let n = 3;
    for r in 0..n {
        flipped.reals[2 * n + r] = -flipped.reals[2 * n + r];
    }
    let mut d = DiabaticBackend::new(model);
    d.restore(&flipped).unwrap();
    let s = d.compute(&path[2], &req).unwrap().overlaps.clone().unwrap();
    let expected = uninterrupted.overlaps.clone().unwrap();
    for i in 0..n {
        for j in 0..n {
            let sign = if i == 2 { -1.0 } else { 1.0 };
            assert_eq!(s[(i, j)], sign * expected[(i, j)]);
        }
    }

    // An empty snapshot (taken before any call) restores to a fresh back end.
    let empty = DiabaticBackend::new(cone()).snapshot();
    let mut e = DiabaticBackend::new(cone());
    e.restore(&empty).unwrap();
    assert!(e.compute(&[0.0, 0.0], &req).unwrap().overlaps.is_none());
}

/// Shows: bad calls give the typed `BackendError` variants (no panic), and a
/// refused call leaves the back end's state untouched. Source: back-end
/// contract.
#[test]
fn errors_are_typed_and_leave_the_back_end_usable() {
    let model = lvc3();
    let mut b = DiabaticBackend::new(model.clone());
    let q = lvc_x(&model, &[0.3, -0.5, 0.7, -0.2]);
    b.compute(&q, &Request::energies()).unwrap();

    assert_eq!(
        b.compute(&[0.0; 3], &Request::energies()).unwrap_err(),
        BackendError::Dimension {
            expected: 4,
            got: 3
        }
    );
    assert_eq!(
        b.compute(&[0.0; 5], &Request::energies()).unwrap_err(),
        BackendError::Dimension {
            expected: 4,
            got: 5
        }
    );
    assert_eq!(
        b.compute(&[0.0, f64::NAN, 0.0, 0.0], &Request::energies())
            .unwrap_err(),
        BackendError::NonFinite { index: 1 }
    );
    assert_eq!(
        b.compute(&[0.0, 0.0, 0.0, f64::INFINITY], &Request::energies())
            .unwrap_err(),
        BackendError::NonFinite { index: 3 }
    );
    assert_eq!(
        b.compute(&q, &Request::gradient_of(3)).unwrap_err(),
        BackendError::NoSuchState {
            state: 3,
            n_states: 3
        }
    );
    assert_eq!(
        b.compute(
            &q,
            &Request {
                gradients: vec![0, 7],
                ..Request::default()
            }
        )
        .unwrap_err(),
        BackendError::NoSuchState {
            state: 7,
            n_states: 3
        }
    );
    let mut t = DiabaticBackend::new(Tully::new(TullyModel::DualAvoidedCrossing));
    assert_eq!(
        t.compute(&[0.0], &Request::gradient_of(2)).unwrap_err(),
        BackendError::NoSuchState {
            state: 2,
            n_states: 2
        }
    );
    let mut m = DiabaticBackend::new(Morse {
        mass: 1.0,
        depth: 0.1,
        alpha: 1.0,
        r_eq: 1.0,
    });
    assert_eq!(
        m.compute(&[1.0], &Request::gradient_of(1)).unwrap_err(),
        BackendError::NoSuchState {
            state: 1,
            n_states: 1
        }
    );

    // After the refused calls the overlaps still refer to q.
    let p = lvc_x(&model, &[0.35, -0.5, 0.7, -0.2]);
    let s = b
        .compute(
            &p,
            &Request {
                overlaps: true,
                ..Request::default()
            },
        )
        .unwrap()
        .overlaps
        .clone()
        .unwrap();
    let mut fresh = DiabaticBackend::new(model.clone());
    fresh.compute(&q, &Request::energies()).unwrap();
    assert_eq!(
        fresh
            .compute(
                &p,
                &Request {
                    overlaps: true,
                    ..Request::default()
                }
            )
            .unwrap()
            .overlaps
            .clone()
            .unwrap(),
        s
    );

    // Snapshots of another model, or malformed ones, are refused.
    let mut tully1 = DiabaticBackend::new(Tully::new(TullyModel::SimpleAvoidedCrossing));
    tully1.compute(&[0.5], &Request::energies()).unwrap();
    let foreign = tully1.snapshot();
    assert!(matches!(t.restore(&foreign), Err(BackendError::Snapshot(m)) if m.contains("tully-1")));
    assert!(matches!(
        b.restore(&foreign),
        Err(BackendError::Snapshot(_))
    ));
    let mut short = b.snapshot();
    short.reals.pop();
    assert!(matches!(
        DiabaticBackend::new(model.clone()).restore(&short),
        Err(BackendError::Snapshot(_))
    ));
    let mut wrong_dim = b.snapshot();
    wrong_dim.geometry.push(0.0);
    assert!(matches!(
        DiabaticBackend::new(model.clone()).restore(&wrong_dim),
        Err(BackendError::Snapshot(_))
    ));
    let mut nan = b.snapshot();
    nan.geometry[0] = f64::NAN;
    assert!(matches!(
        DiabaticBackend::new(model).restore(&nan),
        Err(BackendError::Snapshot(_))
    ));
}

/// Shows: the LVC back end implements the documented model (lvc.rs module
/// docs, a common vibronic-coupling form): at Q = 0 the adiabatic energies are
/// the vertical energies of the file, and the gradients there are κ_i⁽ⁿ⁾√ω_i in
/// the mass-weighted coordinates x = Q/√ω (no coupling acts at Q = 0).
/// Values hand-computed from the fixture (eV → hartree with CODATA 2018).
#[test]
fn lvc_reference_geometry_values() {
    let model = lvc3();
    assert_eq!(model.n_modes(), 4);
    let mut b = DiabaticBackend::new(model.clone());
    let res = b
        .compute(
            &[0.0; 4],
            &Request {
                gradients: vec![0, 1, 2],
                ..Request::default()
            },
        )
        .unwrap()
        .clone();
    for (e, want) in res.energies.iter().zip([0.0, 3.80, 4.10]) {
        assert!((e - want / HARTREE_EV).abs() < 1e-13, "{e} vs {want} eV");
    }
    let w: Vec<f64> = [0.10, 0.15, 0.21, 0.30]
        .iter()
        .map(|x| x / HARTREE_EV)
        .collect();
    let kappa = [
        [0.0, 0.03, 0.0, 0.0],
        [-0.12, 0.0, 0.0, 0.05],
        [0.09, -0.07, 0.0, 0.0],
    ];
    for s in 0..3 {
        for k in 0..4 {
            let want = kappa[s][k] / HARTREE_EV * w[k].sqrt();
            let got = res.gradient(s).unwrap()[k];
            assert!(
                (got - want).abs() < 1e-13,
                "state {s} mode {k}: {got} vs {want}"
            );
        }
    }
}

/// Shows: the two-state two-mode fixture has a conical intersection where it
/// must (W11 = W22 and W12 = 0 at Q = (1, 0), derived in the fixture's
/// comment); the gap vanishes there and grows linearly in every direction,
/// gap = r·√((Δκ √ω0 cos φ)² + (2λ √ω1 sin φ)²) in the mass-weighted
/// coordinates (derived by hand from the model definition), the double-cone
/// topology (common practice). Both surfaces meet at E0 + ω0/2 + κ0 = 0.25 eV.
#[test]
fn lvc_conical_intersection_at_the_analytic_point() {
    let model = cone();
    let w0 = 0.10 / HARTREE_EV;
    let w1 = 0.20 / HARTREE_EV;
    let dkappa = (0.2 - -0.3) / HARTREE_EV;
    let lambda = 0.1 / HARTREE_EV;
    let ci = vec![1.0 / w0.sqrt(), 0.0];
    let mut b = DiabaticBackend::new(model);
    let e = b
        .compute(&ci, &Request::energies())
        .unwrap()
        .energies
        .clone();
    assert!(
        (e[1] - e[0]).abs() < 1e-12,
        "gap at the intersection {:e}",
        e[1] - e[0]
    );
    assert!(
        (e[0] - 0.25 / HARTREE_EV).abs() < 1e-12,
        "energy at the intersection {}",
        e[0]
    );

    let mut worst = 0.0_f64;
    for deg in [0.0, 30.0, 90.0, 135.0, 180.0, 200.0, 270.0, 300.0_f64] {
        let (s, c) = deg.to_radians().sin_cos();
        let slope =
            ((dkappa * w0.sqrt() * c).powi(2) + (2.0 * lambda * w1.sqrt() * s).powi(2)).sqrt();
        for r in [1e-4, 1e-2, 1.0, 10.0] {
            let q = [ci[0] + r * c, ci[1] + r * s];
            let e = b
                .compute(&q, &Request::energies())
                .unwrap()
                .energies
                .clone();
            let gap = e[1] - e[0];
            let rel = (gap - slope * r).abs() / (slope * r);
            worst = worst.max(rel);
            assert!(
                rel < 1e-8,
                "φ = {deg}°, r = {r}: gap {gap:e}, cone {:e}",
                slope * r
            );
        }
    }
    eprintln!("largest relative deviation of the gap from the cone: {worst:.2e}");
}

/// Shows: malformed LVC model files are refused with a message naming the file
/// and the offending key or entry (and the line for TOML-level problems).
/// Source: the file layout documented in lvc.rs.
#[test]
fn lvc_file_errors_name_the_entry() {
    const GOOD: &str = "frequencies_ev = [0.1, 0.2, 0.3]\nvertical_ev = [0.0, 4.0, 4.4]\n\n[[gradient]]\nstate = 1\nmode = 0\nvalue_ev = -0.1\n\n[[coupling]]\nstates = [1, 2]\nmode = 1\nvalue_ev = 0.05\n";
    let good = Lvc::from_toml(GOOD, "m.toml").expect("the good text parses");
    assert_eq!(
        (
            good.n_modes(),
            good.vertical.len(),
            good.gradients.len(),
            good.couplings.len()
        ),
        (3, 3, 1, 1)
    );

    let cases: &[(&str, String, &[&str])] = &[
        (
            "unknown key",
            GOOD.replace("vertical_ev", "vertcal_ev"),
            &["line 2", "vertcal_ev"],
        ),
        (
            "unknown key in an entry",
            GOOD.replace("mode = 1", "mod = 1"),
            &["line 11", "mod"],
        ),
        (
            "gradient mode out of range",
            GOOD.replace("mode = 0", "mode = 3"),
            &["[[gradient]] entry 0", "key `mode`", "3 modes"],
        ),
        (
            "coupling mode out of range",
            GOOD.replace("mode = 1", "mode = 9"),
            &["[[coupling]] entry 0", "key `mode`"],
        ),
        (
            "gradient state out of range",
            GOOD.replace("state = 1", "state = 3"),
            &["[[gradient]] entry 0", "key `state`", "3 states"],
        ),
        (
            "coupling state out of range",
            GOOD.replace("states = [1, 2]", "states = [1, 5]"),
            &["[[coupling]] entry 0", "key `states`"],
        ),
        (
            "negative frequency",
            GOOD.replace("[0.1, 0.2, 0.3]", "[0.1, -0.2, 0.3]"),
            &["key `frequencies_ev`", "mode 1", "positive"],
        ),
        (
            "zero frequency",
            GOOD.replace("[0.1, 0.2, 0.3]", "[0.0, 0.2, 0.3]"),
            &["key `frequencies_ev`", "mode 0"],
        ),
        (
            "state coupled to itself",
            GOOD.replace("states = [1, 2]", "states = [2, 2]"),
            &["[[coupling]] entry 0", "itself"],
        ),
        (
            "no modes",
            GOOD.replace("[0.1, 0.2, 0.3]", "[]"),
            &["key `frequencies_ev`"],
        ),
        (
            "no states",
            GOOD.replace("[0.0, 4.0, 4.4]", "[]"),
            &["key `vertical_ev`"],
        ),
        (
            "missing key",
            GOOD.replace("vertical_ev = [0.0, 4.0, 4.4]\n", ""),
            &["vertical_ev"],
        ),
        (
            "negative index",
            GOOD.replace("state = 1", "state = -1"),
            &["line 5"],
        ),
        (
            "not a number",
            GOOD.replace("value_ev = -0.1", "value_ev = \"big\""),
            &["line 7"],
        ),
        (
            "second entry named",
            GOOD.to_string() + "\n[[coupling]]\nstates = [0, 3]\nmode = 0\nvalue_ev = 0.01\n",
            &["[[coupling]] entry 1", "key `states`"],
        ),
    ];
    for (name, text, says) in cases {
        let err = Lvc::from_toml(text, "m.toml")
            .err()
            .unwrap_or_else(|| panic!("{name}: accepted"));
        let msg = err.to_string();
        assert!(msg.starts_with("m.toml: "), "{name}: no origin in {msg:?}");
        for s in *says {
            assert!(msg.contains(s), "{name}: {msg:?} does not mention {s:?}");
        }
    }

    let missing = fixture("no-such-model.toml");
    let msg = Lvc::from_file(&missing).unwrap_err().to_string();
    assert!(
        msg.contains("no-such-model.toml") && msg.contains("cannot read"),
        "{msg}"
    );
}

/// Regression test for a bug found here and fixed by the Jacobi eigensolver
/// of `diabatic.rs` (accuracy of the n ≥ 3 eigenvector path, textbook
/// numerical linear algebra). Before the fix: a backward-stable symmetric eigensolver returns
/// eigenpairs with residual ‖W u − E u‖ of a few ε‖W‖ (≈ 1e-16 hartree here);
/// the back end's eigenvectors (exposed in the snapshot) had residuals up to
/// ~3e-10 hartree. Consequence: at the LVC reference geometry Q = 0 (diagonal
/// W), a step h along mode 1 switches on W01 = λ√ω1·h, which rotates states 0
/// and 1 by h·d01 (first-order perturbation theory, textbook), so S01(0, h e1)
/// must be h·d01 + O(h²) ≈ 3.9e-9 for h = 1e-5; the back end returned exactly 0
/// (the coupling vanishes from the overlaps that drive the amplitudes, while
/// `couplings` reports it). Near the 1–2 near-degeneracy at
/// Q = (−1, 0.4, −0.3, 0.9) finite differences of S give d_02 wrong by 6 %.
#[test]
fn regression_general_eigensolver_keeps_weak_couplings_in_overlaps() {
    use flipswarm::electronic::models::DiabaticModel;
    let model = lvc3();
    for qq in [
        [0.3, -0.5, 0.7, -0.2],
        [-1.0, 0.4, -0.3, 0.9],
        [1e-3, 1e-3, 1e-3, 1e-3],
        [2.0, 1.0, 0.5, -0.5],
    ] {
        let q = lvc_x(&model, &qq);
        let mut b = DiabaticBackend::new(model.clone());
        let e = b
            .compute(&q, &Request::energies())
            .unwrap()
            .energies
            .clone();
        let u = DMatrix::from_column_slice(3, 3, &b.snapshot().reals);
        let mut w = DMatrix::zeros(3, 3);
        let mut dw = vec![DMatrix::zeros(3, 3); 4];
        model.diabatic(&q, &mut w, &mut dw);
        let residual =
            max_abs(&(&w * &u - &u * DMatrix::from_diagonal(&nalgebra::DVector::from_vec(e))));
        assert!(
            residual < 100.0 * f64::EPSILON * w.norm(),
            "Q = {qq:?}: eigen residual {residual:e} hartree"
        );
    }
    let make = move || -> Box<dyn Backend> { Box::new(DiabaticBackend::new(model.clone())) };
    let origin = [0.0; 4];
    let d01 = make()
        .compute(
            &origin,
            &Request {
                couplings: true,
                ..Request::default()
            },
        )
        .unwrap()
        .couplings
        .clone()
        .unwrap()
        .get(0, 1)[1];
    assert!(
        d01.abs() > 1e-4,
        "precondition: a real coupling, d01 = {d01}"
    );
    for h in [1e-5, 1e-6] {
        let s = aligned_overlap(&make, &origin, 1, h);
        let want = h * d01;
        assert!(
            (s[(0, 1)] - want).abs() < 1e-3 * want.abs(),
            "h = {h:e}: S01 = {:e}, first-order theory {want:e}",
            s[(0, 1)]
        );
    }
}
