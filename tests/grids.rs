//! Molecular integration grids and AO values on grid points.
//!
//! Sources of the reference values:
//! * Exact spherical integrals of monomials, ∫_{S²} x^a y^b z^c dΩ =
//!   4π (a−1)!!(b−1)!!(c−1)!!/(a+b+c+1)!! for even a, b, c and 0 otherwise
//!   (textbook formula, e.g. Amer. Math. Monthly 108, 446 (2001), from memory).
//! * Published point counts and degrees of the Lebedev rules (Dokl. Math. 59,
//!   477 (1999) and the tables it extends; the rules themselves are written by
//!   `scripts/reference/lebedev.py` from SciPy 1.17.1, version in
//!   `data/lebedev/lebedev.txt`).
//! * Closed-form radial integrals ∫₀^∞ r² e^{−ar²} dr = √π/(4 a^{3/2}) and
//!   ∫₀^∞ r² e^{−r} dr = 2! (textbook Gaussian/Gamma integrals).
//! * The analytic overlap matrix `integrals::overlap` (checked against PySCF
//!   2.14.0 fixtures in tests/integrals.rs): the grid must reproduce
//!   S_μν = ∫ φ_μ φ_ν and the electron count tr(DS).
//! * The Becke partition (J. Chem. Phys. 88, 2547 (1988)): weights of all cells
//!   sum to one at every point; derivatives against central finite
//!   differences of the weights themselves.
//! * Hand-evaluated contracted Gaussians from the STO-3G hydrogen
//!   contraction (J. Chem. Phys. 51, 2657 (1969); the ζ = 1.24 exponents and
//!   coefficients as printed in Szabo & Ostlund, *Modern Quantum Chemistry*,
//!   eq. 3.225) and the real solid harmonic S_20 = (3z² − r²)/2 (Helgaker,
//!   Jørgensen and Olsen, *Molecular Electronic-Structure Theory*, Table 6.3).
//! * Exact invariances: translation of the molecule (the grid moves rigidly),
//!   rotation (equal up to the grid error), independence of the thread count.

#![allow(clippy::needless_range_loop)] // index loops mirror the formulas

use flipswarm::chem::{Element, Molecule};
use flipswarm::electronic::qc::basis::{BasisSet, BasisSetData, Harmonics};
use flipswarm::electronic::qc::dft::ao_values::{AoBasis, AoError, AoValues};
use flipswarm::electronic::qc::dft::grid::lebedev::{self, LEBEDEV_ORDERS};
use flipswarm::electronic::qc::dft::grid::partition::{
    becke_weight, bragg_slater_radius_bohr, PartitionWork,
};
use flipswarm::electronic::qc::dft::grid::{radial, GridError, GridSpec, MolecularGrid};
use flipswarm::electronic::qc::integrals;
use flipswarm::units::angstrom_to_bohr;
use nalgebra::{DMatrix, DMatrixView, SymmetricEigen};
use std::f64::consts::PI;

// ---------------------------------------------------------------------------
// molecules
// ---------------------------------------------------------------------------

fn molecule(atoms: &[(&str, [f64; 3])]) -> Molecule {
    let els: Vec<Element> = atoms
        .iter()
        .map(|a| Element::from_symbol(a.0).unwrap())
        .collect();
    let pos: Vec<[f64; 3]> = atoms.iter().map(|a| a.1.map(angstrom_to_bohr)).collect();
    Molecule::from_elements_positions_bohr(&els, &pos).unwrap()
}

/// Water near its experimental geometry (R_OH 0.958 Å, angle 104.5°,
/// common practice), in Å.
fn water() -> Molecule {
    molecule(&[
        ("O", [0.0, 0.0, 0.1173]),
        ("H", [0.0, 0.7572, -0.4692]),
        ("H", [0.0, -0.7572, -0.4692]),
    ])
}

/// Benzene with R_CC 1.39 Å and R_CH 1.09 Å (common practice), D6h, in Å.
fn benzene() -> Molecule {
    let mut atoms = Vec::new();
    for k in 0..6 {
        let t = k as f64 * PI / 3.0;
        atoms.push(("C", [1.39 * t.cos(), 1.39 * t.sin(), 0.0]));
    }
    for k in 0..6 {
        let t = k as f64 * PI / 3.0;
        atoms.push(("H", [2.48 * t.cos(), 2.48 * t.sin(), 0.0]));
    }
    molecule(&atoms)
}

fn transformed(mol: &Molecule, rot: [[f64; 3]; 3], shift: [f64; 3]) -> Molecule {
    let mut m = mol.clone();
    for a in &mut m.atoms {
        let p = a.position_bohr;
        let mut q = [0.0; 3];
        for i in 0..3 {
            q[i] = rot[i][0] * p[0] + rot[i][1] * p[1] + rot[i][2] * p[2] + shift[i];
        }
        a.position_bohr = q;
    }
    m
}

/// Rotation by angle t about the unit axis n (Rodrigues).
fn rotation(n: [f64; 3], t: f64) -> [[f64; 3]; 3] {
    let (s, c) = t.sin_cos();
    let k = 1.0 - c;
    [
        [
            c + n[0] * n[0] * k,
            n[0] * n[1] * k - n[2] * s,
            n[0] * n[2] * k + n[1] * s,
        ],
        [
            n[1] * n[0] * k + n[2] * s,
            c + n[1] * n[1] * k,
            n[1] * n[2] * k - n[0] * s,
        ],
        [
            n[2] * n[0] * k - n[1] * s,
            n[2] * n[1] * k + n[0] * s,
            c + n[2] * n[2] * k,
        ],
    ]
}

/// S_grid = Σ_blocks X_bᵀ W X_b on the significant AOs of each block.
fn grid_overlap(basis: &BasisSet, grid: &MolecularGrid) -> DMatrix<f64> {
    let ao = AoBasis::new(basis).unwrap();
    let n = basis.nbf;
    let mut s = DMatrix::zeros(n, n);
    let mut vals = AoValues::new();
    for b in &grid.blocks {
        ao.eval_block(grid, b, 0, &mut vals).unwrap();
        let (np, na) = (vals.npts(), vals.nao());
        if na == 0 {
            continue;
        }
        let x = DMatrixView::from_slice(vals.component(0), np, na);
        let mut wx = x.clone_owned();
        for p in 0..np {
            let w = grid.weights[b.range.start + p];
            for j in 0..na {
                wx[(p, j)] *= w;
            }
        }
        let sub = x.transpose() * wx;
        let aos = vals.aos();
        for (i, &mu) in aos.iter().enumerate() {
            for (j, &nu) in aos.iter().enumerate() {
                s[(mu, nu)] += sub[(i, j)];
            }
        }
    }
    s
}

fn max_abs_diff(a: &DMatrix<f64>, b: &DMatrix<f64>) -> f64 {
    (a - b).iter().fold(0.0, |m, v| m.max(v.abs()))
}

// ---------------------------------------------------------------------------
// Lebedev
// ---------------------------------------------------------------------------

fn odd_double_factorial(n: i64) -> f64 {
    // n!! for odd n ≥ −1.
    let mut r = 1.0;
    let mut k = n;
    while k > 1 {
        r *= k as f64;
        k -= 2;
    }
    r
}

/// ∫_{S²} x^a y^b z^c dΩ (textbook formula, see the file header).
fn sphere_monomial(a: usize, b: usize, c: usize) -> f64 {
    if a % 2 == 1 || b % 2 == 1 || c % 2 == 1 {
        return 0.0;
    }
    4.0 * PI
        * odd_double_factorial(a as i64 - 1)
        * odd_double_factorial(b as i64 - 1)
        * odd_double_factorial(c as i64 - 1)
        / odd_double_factorial((a + b + c + 1) as i64)
}

/// Compensated (Neumaier) sum, so that the test sees the rule's error and
/// not the rounding of a naive sum.
fn exact_sum(terms: impl Iterator<Item = f64>) -> f64 {
    let (mut s, mut c) = (0.0f64, 0.0f64);
    for t in terms {
        let u = s + t;
        c += if s.abs() >= t.abs() {
            (s - u) + t
        } else {
            (t - u) + s
        };
        s = u;
    }
    s + c
}

fn lebedev_monomial(rule: &lebedev::LebedevRule, a: usize, b: usize, c: usize) -> f64 {
    exact_sum(
        rule.points
            .iter()
            .zip(&rule.weights)
            .map(|(p, w)| w * p[0].powi(a as i32) * p[1].powi(b as i32) * p[2].powi(c as i32)),
    )
}

/// Source: published (points, degree) pairs of the Lebedev rules
/// (Dokl. Math. 59, 477 (1999) and earlier tables) and the exact monomial
/// integrals above.
#[test]
fn lebedev_rules_are_exact_to_their_degree_and_not_beyond() {
    let published: [(usize, usize); 19] = [
        (6, 3),
        (14, 5),
        (26, 7),
        (38, 9),
        (50, 11),
        (74, 13),
        (86, 15),
        (110, 17),
        (146, 19),
        (170, 21),
        (194, 23),
        (230, 25),
        (266, 27),
        (302, 29),
        (350, 31),
        (434, 35),
        (590, 41),
        (770, 47),
        (974, 53),
    ];
    for (np, deg) in published {
        let rule = lebedev::rule(np).unwrap();
        assert_eq!(rule.points.len(), np);
        assert_eq!(rule.degree, deg, "degree of the {np}-point rule");
        let wsum = exact_sum(rule.weights.iter().copied());
        assert!((wsum - 4.0 * PI).abs() < 1e-13, "rule {np}: Σw = {wsum}");
        for p in &rule.points {
            assert!(((p[0] * p[0] + p[1] * p[1] + p[2] * p[2]) - 1.0).abs() < 1e-15);
        }
        // Exact up to the degree.
        let mut worst = 0.0f64;
        for a in 0..=deg {
            for b in 0..=(deg - a) {
                for c in 0..=(deg - a - b) {
                    let err = (lebedev_monomial(rule, a, b, c) - sphere_monomial(a, b, c)).abs();
                    worst = worst.max(err);
                }
            }
        }
        assert!(
            worst < 1e-13,
            "rule {np}: monomial error {worst:e} within degree {deg}"
        );
        // Not exact at degree + 1 (an even total degree).
        let d1 = deg + 1;
        let mut beyond = 0.0f64;
        for a in (0..=d1).step_by(2) {
            for b in (0..=(d1 - a)).step_by(2) {
                let c = d1 - a - b;
                let exact = sphere_monomial(a, b, c);
                let err = (lebedev_monomial(rule, a, b, c) - exact).abs() / exact;
                beyond = beyond.max(err);
            }
        }
        assert!(
            beyond > 1e-8,
            "rule {np}: degree {d1} unexpectedly exact ({beyond:e})"
        );
    }
    assert_eq!(lebedev::all_rules().len(), LEBEDEV_ORDERS.len());
    let err = lebedev::rule(7).unwrap_err().to_string();
    assert!(err.contains("7") && err.contains("974"), "{err}");
}

// ---------------------------------------------------------------------------
// radial
// ---------------------------------------------------------------------------

/// Source: ∫₀^∞ r² e^{−ar²} dr = √π/(4a^{3/2}), ∫₀^∞ r² e^{−r} dr = 2.
/// Errors must fall with the number of points; with 100 points (ξ = 1) the
/// exponents of valence and polarisation functions are exact to rounding.
#[test]
fn treutler_ahlrichs_radial_integrals() {
    let exps = [0.05f64, 0.3, 1.0, 10.0, 300.0, 1e4];
    let errors = |n: usize| -> (Vec<f64>, f64) {
        let (r, w) = radial::treutler_ahlrichs(n, 1.0);
        assert_eq!(r.len(), n);
        assert!(r.windows(2).all(|p| p[0] < p[1]), "ascending radii");
        let g = exps
            .iter()
            .map(|&a| {
                let exact = PI.sqrt() / (4.0 * a.powf(1.5));
                let got = exact_sum(r.iter().zip(&w).map(|(r, w)| w * (-a * r * r).exp()));
                (got - exact).abs() / exact
            })
            .collect();
        let got = exact_sum(r.iter().zip(&w).map(|(r, w)| w * (-r).exp()));
        (g, (got - 2.0).abs() / 2.0)
    };
    let mut prev: Option<(Vec<f64>, f64)> = None;
    for n in [30usize, 60, 100, 200] {
        let (g, e) = errors(n);
        let gs: Vec<String> = g.iter().map(|x| format!("{x:.1e}")).collect();
        println!(
            "radial n = {n:3}: Gaussian rel. errors {} (a = {exps:?}), e^-r {e:.1e}",
            gs.join(" ")
        );
        if let Some((pg, pe)) = &prev {
            for k in 0..g.len() {
                assert!(
                    g[k] <= pg[k].max(1e-14),
                    "n = {n}, a = {}: {} after {}",
                    exps[k],
                    g[k],
                    pg[k]
                );
            }
            assert!(e < *pe, "e^-r: {e} after {pe}");
        }
        if n == 100 {
            for k in 1..4 {
                assert!(g[k] < 1e-13, "a = {}: {:e}", exps[k], g[k]);
            }
            assert!(
                g[4] < 1e-12 && g[5] < 1e-9 && g[0] < 1e-7 && e < 1e-7,
                "{g:?} {e}"
            );
        }
        prev = Some((g, e));
    }
    // Published ξ of carbon and hydrogen (J. Chem. Phys. 102, 346 (1995), from memory).
    assert_eq!(radial::ta_xi(6), Some(1.1));
    assert_eq!(radial::ta_xi(1), Some(0.8));
    assert_eq!(radial::ta_xi(37), None);
}

// ---------------------------------------------------------------------------
// molecular grids
// ---------------------------------------------------------------------------

/// Source: analytic overlap (integrals::overlap, checked against PySCF 2.14.0
/// in tests/integrals.rs). Errors printed per level; fine must reach 1e-6.
/// The molecules are turned to a generic orientation (grids aligned with a
/// molecular plane integrate better than the typical case).
#[test]
fn grid_overlap_matches_analytic_overlap_and_improves_with_level() {
    let s3 = 1.0 / 3f64.sqrt();
    let turn = |m: Molecule| transformed(&m, rotation([s3, s3, s3], 0.7), [0.0; 3]);
    let cases = [
        ("water", turn(water()), "6-31G*"),
        ("water", turn(water()), "cc-pVDZ"),
        ("benzene", turn(benzene()), "6-31G*"),
        ("benzene", turn(benzene()), "cc-pVDZ"),
    ];
    for (name, mol, bas) in cases {
        let basis = BasisSet::builtin(&mol, bas).unwrap();
        let s_exact = integrals::overlap(&basis);
        let mut errs = Vec::new();
        for level in GridSpec::levels() {
            let grid =
                MolecularGrid::build(&basis.nuclei, &GridSpec::level(level).unwrap()).unwrap();
            let s = grid_overlap(&basis, &grid);
            let err = max_abs_diff(&s, &s_exact);
            let diag = (0..basis.nbf)
                .map(|i| (s[(i, i)] - 1.0).abs())
                .fold(0.0, f64::max);
            println!(
                "{name:8} {bas:8} {level:10} points {:7}  max|S_grid - S| {err:.2e}  max|S_ii - 1| {diag:.2e}",
                grid.len()
            );
            errs.push(err);
        }
        // fine (index 2) to 1e-6, ultrafine better than coarse by far, and
        // no level much worse than the one before.
        assert!(errs[2] < 1e-6, "{name} {bas}: fine error {:e}", errs[2]);
        assert!(errs[3] < 0.1 * errs[0], "{name} {bas}: {errs:?}");
        for k in 1..errs.len() {
            assert!(errs[k] < 2.0 * errs[k - 1], "{name} {bas}: {errs:?}");
        }
    }
}

/// Electron count of a closed-shell density built from Löwdin orbitals:
/// D = 2 Σ_occ c cᵀ with C = S^{−1/2}, so tr(DS) = 2 n_occ exactly.
fn electron_count(mol: &Molecule, bas: &str, spec: &GridSpec, nocc: usize) -> f64 {
    let basis = BasisSet::builtin(mol, bas).unwrap();
    let s = integrals::overlap(&basis);
    let eig = SymmetricEigen::new(s.clone());
    let n = basis.nbf;
    let mut shalf = DMatrix::zeros(n, n);
    for k in 0..n {
        let v = eig.eigenvectors.column(k);
        shalf += (1.0 / eig.eigenvalues[k].sqrt()) * v * v.transpose();
    }
    let c = shalf.columns(0, nocc);
    let d = 2.0 * &c * c.transpose();
    let grid = MolecularGrid::build(&basis.nuclei, spec).unwrap();
    let ao = AoBasis::new(&basis).unwrap();
    let mut vals = AoValues::new();
    let mut total = 0.0;
    for b in &grid.blocks {
        ao.eval_block(&grid, b, 0, &mut vals).unwrap();
        let (np, na) = (vals.npts(), vals.nao());
        if na == 0 {
            continue;
        }
        let aos = vals.aos();
        let dsub = DMatrix::from_fn(na, na, |i, j| d[(aos[i], aos[j])]);
        let x = DMatrixView::from_slice(vals.component(0), np, na);
        let xd = x * dsub;
        for p in 0..np {
            let rho: f64 = (0..na).map(|j| xd[(p, j)] * x[(p, j)]).sum();
            total += grid.weights[b.range.start + p] * rho;
        }
    }
    total
}

/// Source: tr(DS) = N for the Löwdin-orbital density (exact), translation
/// invariance (exact up to rounding) and rotation (equal within grid error).
#[test]
fn electron_count_and_invariances() {
    let spec = GridSpec::level("fine").unwrap();
    let n0 = electron_count(&water(), "cc-pVDZ", &spec, 5);
    println!("water cc-pVDZ fine: N = {n0:.12} (exact 10)");
    assert!((n0 - 10.0).abs() < 1e-6, "{n0}");
    let moved = transformed(&water(), rotation([1.0, 0.0, 0.0], 0.0), [1.3, -0.7, 2.1]);
    let n1 = electron_count(&moved, "cc-pVDZ", &spec, 5);
    assert!((n1 - n0).abs() < 1e-11, "translation: {n0} vs {n1}");
    let s3 = 1.0 / 3f64.sqrt();
    let turned = transformed(&water(), rotation([s3, s3, s3], 0.7), [0.0; 3]);
    let n2 = electron_count(&turned, "cc-pVDZ", &spec, 5);
    println!("rotated: N = {n2:.12}");
    assert!((n2 - 10.0).abs() < 1e-6, "rotation: {n2}");
    let nb = electron_count(&benzene(), "6-31G*", &spec, 21);
    println!("benzene 6-31G* fine: N = {nb:.12} (exact 42)");
    assert!((nb - 42.0).abs() < 1e-5, "{nb}");
}

/// Source: the Becke construction (J. Chem. Phys. 88, 2547 (1988)):
/// Σ_A w_A(r) = 1 everywhere; w_A → 1 at nucleus A.
#[test]
fn becke_weights_sum_to_one() {
    for mol in [water(), benzene()] {
        let pos: Vec<[f64; 3]> = mol.atoms.iter().map(|a| a.position_bohr).collect();
        let radii: Vec<f64> = mol
            .atoms
            .iter()
            .map(|a| bragg_slater_radius_bohr(a.element.atomic_number() as usize).unwrap())
            .collect();
        let mut k = 0u64;
        for i in 0..200 {
            // deterministic scattered points within ±4 bohr
            let mut q = [0.0; 3];
            for c in 0..3 {
                k = k
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                q[c] = ((k >> 11) as f64 / (1u64 << 53) as f64 - 0.5) * 8.0;
            }
            let total: f64 = (0..pos.len())
                .map(|a| becke_weight(q, a, &pos, &radii))
                .sum();
            assert!((total - 1.0).abs() < 1e-14, "point {i}: Σw = {total}");
        }
        for a in 0..pos.len() {
            let w = becke_weight(pos[a], a, &pos, &radii);
            assert!((w - 1.0).abs() < 1e-12, "own nucleus {a}: {w}");
        }
    }
    // And on the grid: quadrature weight × partition weight = weight.
    let mol = water();
    let nuclei: Vec<(f64, [f64; 3])> = mol
        .atoms
        .iter()
        .map(|a| (a.element.atomic_number() as f64, a.position_bohr))
        .collect();
    let grid = MolecularGrid::build(&nuclei, &GridSpec::level("coarse").unwrap()).unwrap();
    let part = grid.partition();
    for p in (0..grid.len()).step_by(97) {
        let w = grid.quadrature_weights[p] * part.weight(grid.points[p], grid.atom_of_point[p]);
        assert!(
            (w - grid.weights[p]).abs() <= 1e-14 * w.abs().max(1e-300),
            "point {p}"
        );
    }
}

/// Source: central finite differences of the Becke weight, with the point
/// moving rigidly with its owner atom; Σ_C ∂w/∂R_C = 0 (translation).
#[test]
fn becke_weight_gradient_matches_finite_differences() {
    let mol = water();
    let pos: Vec<[f64; 3]> = mol.atoms.iter().map(|a| a.position_bohr).collect();
    let radii: Vec<f64> = mol
        .atoms
        .iter()
        .map(|a| bragg_slater_radius_bohr(a.element.atomic_number() as usize).unwrap())
        .collect();
    let part = flipswarm::electronic::qc::dft::grid::partition::BeckePartition::new(&pos, &radii);
    let mut work = PartitionWork::default();
    let mut grad = vec![[0.0; 3]; pos.len()];
    let offsets = [
        [0.3, -0.4, 0.9],
        [-1.1, 0.2, 0.5],
        [0.6, 0.8, -0.7],
        [0.05, -0.9, -0.2],
    ];
    let h = 1e-5;
    let mut worst = 0.0f64;
    for owner in 0..pos.len() {
        for off in offsets {
            let point = [
                pos[owner][0] + off[0],
                pos[owner][1] + off[1],
                pos[owner][2] + off[2],
            ];
            let w = part.weight_gradient(point, owner, &mut work, &mut grad);
            assert!((w - becke_weight(point, owner, &pos, &radii)).abs() < 1e-15);
            let mut sum = [0.0; 3];
            for c in 0..pos.len() {
                for k in 0..3 {
                    sum[k] += grad[c][k];
                    let eval = |d: f64| {
                        let mut p2 = pos.clone();
                        p2[c][k] += d;
                        let mut q = point;
                        if c == owner {
                            q[k] += d;
                        }
                        becke_weight(q, owner, &p2, &radii)
                    };
                    let fd = (eval(h) - eval(-h)) / (2.0 * h);
                    worst = worst.max((fd - grad[c][k]).abs());
                }
            }
            for k in 0..3 {
                assert!(sum[k].abs() < 1e-12, "translation sum {sum:?}");
            }
        }
    }
    println!("Becke weight gradient vs FD: max deviation {worst:.2e}");
    assert!(worst < 1e-8, "{worst:e}");
}

/// Source: design invariants of the grid (blocks cover the points in order,
/// bounded size, points inside their block sphere) and thread independence.
#[test]
fn blocks_cover_points_and_build_is_thread_independent() {
    let mol = benzene();
    let basis = BasisSet::builtin(&mol, "6-31G*").unwrap();
    let spec = GridSpec::level("medium").unwrap();
    let one = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();
    let two = rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .unwrap();
    let g1 = one
        .install(|| MolecularGrid::build(&basis.nuclei, &spec))
        .unwrap();
    let g2 = two
        .install(|| MolecularGrid::build(&basis.nuclei, &spec))
        .unwrap();
    assert_eq!(g1.points, g2.points);
    assert_eq!(g1.weights, g2.weights);
    assert_eq!(g1.blocks, g2.blocks);
    let mut next = 0;
    for b in &g1.blocks {
        assert_eq!(b.range.start, next);
        assert!(!b.is_empty() && b.len() <= spec.block_size);
        for p in b.range.clone() {
            assert_eq!(g1.atom_of_point[p], b.atom);
            let q = g1.points[p];
            let d = ((q[0] - b.center[0]).powi(2)
                + (q[1] - b.center[1]).powi(2)
                + (q[2] - b.center[2]).powi(2))
            .sqrt();
            assert!(d <= b.radius * (1.0 + 1e-12) + 1e-14);
        }
        next = b.range.end;
    }
    assert_eq!(next, g1.len());
    assert!(g1.weights.iter().all(|w| w.abs() >= spec.weight_cutoff));
    for (a, r) in g1.atom_ranges.iter().enumerate() {
        assert!(g1.atom_of_point[r.clone()].iter().all(|&x| x == a));
    }
    // Pruning keeps the accuracy at a fraction of the points.
    let s_exact = integrals::overlap(&basis);
    let pruned = GridSpec::explicit(50, 302, true).unwrap();
    let full = GridSpec::explicit(50, 302, false).unwrap();
    let gp = MolecularGrid::build(&basis.nuclei, &pruned).unwrap();
    let gf = MolecularGrid::build(&basis.nuclei, &full).unwrap();
    let ep = max_abs_diff(&grid_overlap(&basis, &gp), &s_exact);
    let ef = max_abs_diff(&grid_overlap(&basis, &gf), &s_exact);
    println!(
        "benzene 6-31G* (50, 302): pruned {} points err {ep:.2e}; unpruned {} points err {ef:.2e}",
        gp.len(),
        gf.len()
    );
    assert!(gp.len() < gf.len() * 3 / 4);
    assert!(ep < 3.0 * ef.max(1e-7), "pruned {ep:e} vs unpruned {ef:e}");
}

// ---------------------------------------------------------------------------
// AO values
// ---------------------------------------------------------------------------

fn spdfg_water() -> BasisSet {
    let path = format!(
        "{}/tests/data/qc/basis_spdfg_test.json",
        env!("CARGO_MANIFEST_DIR")
    );
    let data = BasisSetData::from_file(std::path::Path::new(&path), Harmonics::Spherical).unwrap();
    BasisSet::new(&water(), &data, None).unwrap()
}

/// Source: central finite differences of the AO values (first derivatives)
/// and of the AO gradients (second derivatives), for Cartesian and spherical
/// shells up to g.
#[test]
fn ao_derivatives_match_finite_differences() {
    let cart = {
        let path = format!(
            "{}/tests/data/qc/basis_spdfg_test.json",
            env!("CARGO_MANIFEST_DIR")
        );
        let data =
            BasisSetData::from_file(std::path::Path::new(&path), Harmonics::Spherical).unwrap();
        BasisSet::new(&water(), &data, Some(Harmonics::Cartesian)).unwrap()
    };
    let bases = [
        BasisSet::builtin(&water(), "6-31G*").unwrap(),
        BasisSet::builtin(&water(), "cc-pVDZ").unwrap(),
        spdfg_water(),
        cart,
    ];
    let pts = [
        [0.3, -0.2, 0.5],
        [-0.6, 1.1, -0.4],
        [0.1, 0.05, 1.4],
        [1.2, -0.8, -1.0],
    ];
    let h = 1e-4;
    for basis in &bases {
        let ao = AoBasis::with_threshold(basis, 0.0).unwrap();
        let mut v = AoValues::new();
        ao.eval(&pts, 2, &mut v).unwrap();
        assert_eq!(v.nao(), basis.nbf);
        assert_eq!(v.ncomp(), 10);
        let mut plus = AoValues::new();
        let mut minus = AoValues::new();
        let mut worst1 = 0.0f64;
        let mut worst2 = 0.0f64;
        for (p, &q) in pts.iter().enumerate() {
            for k in 0..3 {
                let mut qp = q;
                let mut qm = q;
                qp[k] += h;
                qm[k] -= h;
                ao.eval(&[qp], 1, &mut plus).unwrap();
                ao.eval(&[qm], 1, &mut minus).unwrap();
                for j in 0..basis.nbf {
                    let fd = (plus.get(0, j, 0) - minus.get(0, j, 0)) / (2.0 * h);
                    let scale = 1.0 + v.get(1 + k, j, p).abs();
                    worst1 = worst1.max((fd - v.get(1 + k, j, p)).abs() / scale);
                    // second derivatives ∂_k ∂_m from FD of ∂_m
                    for m in 0..3 {
                        let fd2 = (plus.get(1 + m, j, 0) - minus.get(1 + m, j, 0)) / (2.0 * h);
                        let (a, b) = (k.min(m), k.max(m));
                        let comp = 4 + [[0, 1, 2], [1, 3, 4], [2, 4, 5]][a][b];
                        let an = v.get(comp, j, p);
                        worst2 = worst2.max((fd2 - an).abs() / (1.0 + an.abs()));
                    }
                }
            }
        }
        println!(
            "{} ({:?}): AO gradient FD dev {worst1:.1e}, hessian FD dev {worst2:.1e}",
            basis.name, basis.harmonics
        );
        assert!(worst1 < 1e-6 && worst2 < 1e-6, "{worst1:e} {worst2:e}");
    }
}

/// Source: hand-evaluated functions — the STO-3G hydrogen 1s (exponents and
/// coefficients of J. Chem. Phys. 51, 2657 (1969), printed in Szabo & Ostlund
/// eq. 3.225), a Cartesian d_xy and the real solid harmonic d_z² =
/// (3z² − r²)/2 with N² = (2α/π)^{3/2} (4α)²/3 (Helgaker et al., Table 6.3).
#[test]
fn ao_values_match_hand_evaluated_gaussians() {
    // H 1s, STO-3G, at 0.4 bohr off the nucleus.
    let h = Element::from_symbol("H").unwrap();
    let mol = Molecule::from_elements_positions_bohr(&[h], &[[0.0, 0.0, 0.0]]).unwrap();
    let basis = BasisSet::builtin(&mol, "STO-3G").unwrap();
    let alpha = [3.42525, 0.623913, 0.168856];
    let d = [0.154329, 0.535328, 0.444635];
    let prim = |a: f64, r2: f64| (2.0 * a / PI).powf(0.75) * (-a * r2).exp();
    let mut norm = 0.0;
    for i in 0..3 {
        for j in 0..3 {
            norm += d[i]
                * d[j]
                * (2.0 * f64::sqrt(alpha[i] * alpha[j]) / (alpha[i] + alpha[j])).powf(1.5);
        }
    }
    let q = [0.1, -0.2, 0.3464];
    let r2 = q[0] * q[0] + q[1] * q[1] + q[2] * q[2];
    let hand: f64 = (0..3).map(|i| d[i] * prim(alpha[i], r2)).sum::<f64>() / norm.sqrt();
    let ao = AoBasis::new(&basis).unwrap();
    let mut v = AoValues::new();
    ao.eval(&[q], 0, &mut v).unwrap();
    // Printed data have six digits: agree to 1e-5 relative.
    assert!(
        (v.get(0, 0, 0) - hand).abs() < 1e-5 * hand,
        "{} vs {hand}",
        v.get(0, 0, 0)
    );

    // d functions of oxygen: 6-31G* (Cartesian) and cc-pVDZ (spherical),
    // both a single primitive.
    let o = Element::from_symbol("O").unwrap();
    let mol = Molecule::from_elements_positions_bohr(&[o], &[[0.2, -0.1, 0.3]]).unwrap();
    let q = [0.7, 0.4, -0.5];
    let (x, y, z) = (q[0] - 0.2, q[1] + 0.1, q[2] - 0.3);
    let r2 = x * x + y * y + z * z;
    for (bas, pure) in [("6-31G*", false), ("cc-pVDZ", true)] {
        let basis = BasisSet::builtin(&mol, bas).unwrap();
        let (si, sh) = basis
            .shells
            .iter()
            .enumerate()
            .find(|(_, s)| s.l == 2)
            .unwrap();
        assert_eq!(sh.exponents.len(), 1);
        let a = sh.exponents[0];
        let n2 = (2.0 * a / PI).powf(1.5) * (4.0 * a).powi(2);
        let ao = AoBasis::new(&basis).unwrap();
        let mut v = AoValues::new();
        ao.eval(&[q], 0, &mut v).unwrap();
        let off = basis.offsets[si];
        let j = v.aos().iter().position(|&m| m == off).unwrap();
        if pure {
            // m = 0 is the third of m = −2..2.
            let hand = (n2 / 3.0).sqrt() * 0.5 * (3.0 * z * z - r2) * (-a * r2).exp();
            let got = v.get(0, j + 2, 0);
            assert!(
                (got - hand).abs() < 1e-13 * hand.abs().max(1.0),
                "d_z2 {got} vs {hand}"
            );
        } else {
            // xy is the second Cartesian component (xx, xy, xz, yy, yz, zz).
            let hand = n2.sqrt() * x * y * (-a * r2).exp();
            let got = v.get(0, j + 1, 0);
            assert!(
                (got - hand).abs() < 1e-13 * hand.abs().max(1.0),
                "d_xy {got} vs {hand}"
            );
        }
    }
}

/// Source: the documented screening bound — AOs dropped for a block are
/// below the threshold (values and derivatives) at every point of the block.
#[test]
fn ao_screening_drops_only_negligible_functions() {
    let basis = BasisSet::builtin(&benzene(), "cc-pVDZ").unwrap();
    let grid = MolecularGrid::build(&basis.nuclei, &GridSpec::level("coarse").unwrap()).unwrap();
    let screened = AoBasis::new(&basis).unwrap();
    let all = AoBasis::with_threshold(&basis, 0.0).unwrap();
    let (mut vs, mut va) = (AoValues::new(), AoValues::new());
    let mut dropped = 0usize;
    let mut worst = 0.0f64;
    for b in grid.blocks.iter().step_by(7) {
        screened.eval_block(&grid, b, 2, &mut vs).unwrap();
        all.eval_block(&grid, b, 2, &mut va).unwrap();
        assert_eq!(va.nao(), basis.nbf);
        for mu in 0..basis.nbf {
            match vs.aos().iter().position(|&m| m == mu) {
                Some(j) => {
                    for c in 0..10 {
                        for p in 0..vs.npts() {
                            assert_eq!(vs.get(c, j, p), va.get(c, mu, p));
                        }
                    }
                }
                None => {
                    dropped += 1;
                    for c in 0..10 {
                        for p in 0..va.npts() {
                            worst = worst.max(va.get(c, mu, p).abs());
                        }
                    }
                }
            }
        }
    }
    println!("screening: {dropped} AO×block pairs dropped, largest dropped |value/derivative| {worst:.1e}");
    assert!(dropped > 0);
    assert!(worst < 1e-12, "{worst:e}");
}

// ---------------------------------------------------------------------------
// errors
// ---------------------------------------------------------------------------

/// Source: the API contract (typed errors naming what is wrong).
#[test]
fn error_cases() {
    let err = GridSpec::level("superfine").unwrap_err();
    let msg = err.to_string();
    assert!(matches!(err, GridError::UnknownLevel { .. }));
    for l in GridSpec::levels() {
        assert!(msg.contains(l), "{msg}");
    }
    assert!(GridSpec::level("Fine").is_ok());
    assert_eq!(
        MolecularGrid::build(&[], &GridSpec::level("fine").unwrap()).unwrap_err(),
        GridError::NoAtoms
    );
    let e = GridSpec::explicit(40, 300, true).unwrap_err();
    assert!(e.to_string().contains("302"), "{e}");
    assert!(GridSpec::explicit(0, 302, true).is_err());
    let spec = GridSpec::level("coarse").unwrap();
    assert!(matches!(
        MolecularGrid::build(&[(1.5, [0.0; 3])], &spec),
        Err(GridError::UnsupportedCharge { index: 0, .. })
    ));
    assert!(matches!(
        MolecularGrid::build(&[(37.0, [0.0; 3])], &spec),
        Err(GridError::UnsupportedCharge { .. })
    ));
    assert!(matches!(
        MolecularGrid::build(&[(1.0, [0.0; 3]), (1.0, [0.0; 3])], &spec),
        Err(GridError::CoincidentAtoms {
            first: 0,
            second: 1,
            ..
        })
    ));
    assert!(matches!(
        MolecularGrid::build(&[(1.0, [f64::NAN, 0.0, 0.0])], &spec),
        Err(GridError::NonFinitePosition { .. })
    ));
    let basis = BasisSet::builtin(&water(), "STO-3G").unwrap();
    let ao = AoBasis::new(&basis).unwrap();
    assert_eq!(
        ao.eval(&[[0.0; 3]], 3, &mut AoValues::new()).unwrap_err(),
        AoError::InvalidDerivative(3)
    );
    assert!(AoBasis::with_threshold(&basis, -1.0).is_err());
}
