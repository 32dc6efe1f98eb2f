//! Lebedev angular quadrature on the unit sphere.
//!
//! The rules are the published point sets (Dokl. Math. 59, 477 (1999), and the
//! lower-order tables that paper extends), from 6 points (degree 3) to 974
//! points (degree 53). They are stored in `data/lebedev/lebedev.txt`, written
//! by `scripts/reference/lebedev.py` from SciPy's `scipy.integrate.lebedev_rule`
//! (version in the file header), and embedded with `include_str!`, so nothing
//! is read at run time.
//!
//! The file keeps one representative per octahedral orbit (the image with
//! x ≥ y ≥ z ≥ 0); [`LebedevRule`] regenerates each orbit by all coordinate
//! permutations and sign changes, dropping duplicates. The generator checks
//! that this expansion reproduces SciPy's points bit for bit.
//!
//! **Normalisation:** the weights of a [`LebedevRule`] sum to **4π**, so
//! ∫_{S²} f dΩ ≈ Σᵢ wᵢ f(x̂ᵢ) directly. (The table itself stores weights that
//! sum to 1, the convention of the published tables.)

use std::sync::OnceLock;
use thiserror::Error;

const TABLE: &str = include_str!("../../../../../data/lebedev/lebedev.txt");

/// Point counts of the available rules, ascending.
pub const LEBEDEV_ORDERS: [usize; 19] = [
    6, 14, 26, 38, 50, 74, 86, 110, 146, 170, 194, 230, 266, 302, 350, 434, 590, 770, 974,
];

/// Errors of the Lebedev tables.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum LebedevError {
    /// No rule with this number of points.
    #[error("no Lebedev rule with {npoints} points; available point counts: {available}")]
    UnknownOrder {
        /// The number of points asked for.
        npoints: usize,
        /// The available counts, comma separated.
        available: String,
    },
}

/// One Lebedev rule: unit vectors and weights (Σ w = 4π).
#[derive(Clone, Debug, PartialEq)]
pub struct LebedevRule {
    /// Number of points.
    pub npoints: usize,
    /// Algebraic degree: all polynomials of total degree ≤ `degree` in
    /// x, y, z are integrated exactly over the sphere.
    pub degree: usize,
    /// Points on the unit sphere.
    pub points: Vec<[f64; 3]>,
    /// Weights, summing to 4π.
    pub weights: Vec<f64>,
}

/// Distinct images of `rep` under the octahedral group (permutations and
/// sign changes); zero coordinates are never negated, so duplicates compare
/// bitwise equal and are dropped.
fn orbit(rep: [f64; 3], out: &mut Vec<[f64; 3]>) {
    const PERMS: [[usize; 3]; 6] = [
        [0, 1, 2],
        [0, 2, 1],
        [1, 0, 2],
        [1, 2, 0],
        [2, 0, 1],
        [2, 1, 0],
    ];
    let start = out.len();
    for perm in PERMS {
        for signs in 0..8u32 {
            let mut p = [0.0; 3];
            for k in 0..3 {
                let c = rep[perm[k]];
                p[k] = if c != 0.0 && (signs >> k) & 1 == 1 {
                    -c
                } else {
                    c
                };
            }
            if !out[start..].contains(&p) {
                out.push(p);
            }
        }
    }
}

fn parse_table() -> Vec<LebedevRule> {
    // The table is part of the source tree and checked by the tests; a
    // malformed table is a build defect, not a user error.
    let mut rules = Vec::new();
    let mut lines = TABLE
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty() && !l.starts_with('#'));
    while let Some(head) = lines.next() {
        let f: Vec<&str> = head.split_whitespace().collect();
        assert!(
            f.len() == 4 && f[0] == "rule",
            "lebedev table: bad header `{head}`"
        );
        let num = |s: &str| -> usize { s.parse().expect("lebedev table: bad integer") };
        let (npoints, degree, norbits) = (num(f[1]), num(f[2]), num(f[3]));
        let mut points = Vec::with_capacity(npoints);
        let mut weights = Vec::with_capacity(npoints);
        for _ in 0..norbits {
            let line = lines.next().expect("lebedev table: truncated rule");
            let v: Vec<f64> = line
                .split_whitespace()
                .map(|s| s.parse().expect("lebedev table: bad number"))
                .collect();
            assert!(v.len() == 4, "lebedev table: bad line `{line}`");
            let before = points.len();
            orbit([v[0], v[1], v[2]], &mut points);
            weights.resize(points.len(), 4.0 * std::f64::consts::PI * v[3]);
            debug_assert!(points.len() > before);
        }
        assert_eq!(
            points.len(),
            npoints,
            "lebedev table: rule {npoints} expands to {}",
            points.len()
        );
        rules.push(LebedevRule {
            npoints,
            degree,
            points,
            weights,
        });
    }
    rules
}

/// All rules, ascending in size (parsed once).
pub fn all_rules() -> &'static [LebedevRule] {
    static RULES: OnceLock<Vec<LebedevRule>> = OnceLock::new();
    RULES.get_or_init(parse_table)
}

/// The rule with exactly `npoints` points (one of [`LEBEDEV_ORDERS`]).
pub fn rule(npoints: usize) -> Result<&'static LebedevRule, LebedevError> {
    all_rules()
        .iter()
        .find(|r| r.npoints == npoints)
        .ok_or_else(|| LebedevError::UnknownOrder {
            npoints,
            available: available_list(),
        })
}

/// Index of the rule with `npoints` points in [`LEBEDEV_ORDERS`].
pub(crate) fn order_index(npoints: usize) -> Result<usize, LebedevError> {
    LEBEDEV_ORDERS
        .iter()
        .position(|&n| n == npoints)
        .ok_or_else(|| LebedevError::UnknownOrder {
            npoints,
            available: available_list(),
        })
}

fn available_list() -> String {
    LEBEDEV_ORDERS
        .iter()
        .map(|n| n.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}
