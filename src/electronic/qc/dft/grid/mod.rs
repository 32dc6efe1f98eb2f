//! Molecular integration grids for numerical density-functional integrals.
//!
//! A molecular grid is a union of atom-centred spherical grids: a radial
//! quadrature ([`radial`], Treutler–Ahlrichs M4 mapping with Chebyshev
//! second-kind nodes, J. Chem. Phys. 102, 346 (1995)) times Lebedev angular
//! rules ([`lebedev`], Dokl. Math. 59, 477 (1999)), each point weighted by
//! the Becke fuzzy-cell partition of its atom ([`partition`], J. Chem. Phys.
//! 88, 2547 (1988), with the atomic-size adjustment of its appendix), so that
//!
//! ∫ F(r) d³r ≈ Σ_p w_p F(r_p),  w_p = w_rad · w_ang · w_Becke,owner(r_p).
//!
//! # Levels
//!
//! [`GridSpec::level`] gives one of our named levels. Radial points depend on
//! the row of the periodic table; the angular column is the largest Lebedev
//! rule (points), used in the valence region when pruning is on.
//!
//! | level       | H–He | Li–Ne | Na–Ar | K–Kr | max Lebedev | pruned |
//! |-------------|------|-------|-------|------|-------------|--------|
//! | `coarse`    | 25   | 30    | 35    | 40   | 146         | yes    |
//! | `medium`    | 35   | 45    | 50    | 55   | 302         | yes    |
//! | `fine`      | 50   | 60    | 65    | 70   | 770         | yes    |
//! | `ultrafine` | 75   | 90    | 95    | 100  | 974         | yes    |
//!
//! [`GridSpec::explicit`] gives any radial count (all atoms), any available
//! Lebedev rule and pruning on or off. Supported elements: Z = 1…36 (the
//! extent of the radius tables).
//!
//! Measured in `tests/grids.rs` (molecules in a generic orientation): points,
//! and the largest error of the grid overlap matrix ∫φ_μφ_ν against the
//! analytic one.
//!
//! | level       | water points | water 6-31G* / cc-pVDZ | benzene points | benzene 6-31G* / cc-pVDZ |
//! |-------------|--------------|------------------------|----------------|--------------------------|
//! | `coarse`    | 6 770        | 4.1e−5 / 8.5e−5        | 26 716         | 8.3e−4 / 8.4e−4          |
//! | `medium`    | 20 221       | 7.6e−6 / 7.9e−6        | 79 288         | 4.3e−5 / 5.6e−5          |
//! | `fine`      | 61 934       | 2.6e−8 / 2.6e−8        | 238 770        | 4.3e−7 / 6.0e−7          |
//! | `ultrafine` | 119 527      | 7.1e−9 / 7.6e−9        | 463 490        | 1.4e−7 / 1.8e−7          |
//!
//! The angular rule limits the accuracy (the partition makes the integrands
//! of off-centre functions sharp near cell boundaries); the worst elements are
//! the diffuse hydrogen s functions.
//!
//! # Pruning
//!
//! Near the nucleus the density is nearly spherical (core shells) and in the
//! far tail it is smooth, so fewer angular points suffice there (common
//! practice). Our scheme uses ρ = r / R_BS, R_BS the Bragg–Slater radius of
//! the atom (hydrogen 0.35 Å, see [`partition`]). With L the index of the
//! level's largest rule in [`lebedev::LEBEDEV_ORDERS`] (so L − 2 is two rules
//! smaller):
//!
//! | region         | ρ            | angular rule                    |
//! |----------------|--------------|---------------------------------|
//! | core           | ρ < 0.25     | 26 points                       |
//! | inner          | 0.25 ≤ ρ < 0.5 | 50 points                     |
//! | intermediate   | 0.5 ≤ ρ < 1  | rule L − 2, at least 86 points  |
//! | valence        | 1 ≤ ρ < 6    | rule L                          |
//! | tail           | ρ ≥ 6        | rule L − 2, at least 86 points  |
//!
//! No region ever uses more points than rule L.
//!
//! # Screening, blocks, determinism
//!
//! Points whose final weight has |w| < [`GridSpec::weight_cutoff`] (default
//! 10⁻¹⁵) are dropped. The points of each atom are contiguous
//! ([`MolecularGrid::atom_ranges`]) and split into spatially compact blocks
//! of at most [`GridSpec::block_size`] (default 128) points by recursive
//! bisection along the longest side of their bounding box
//! ([`MolecularGrid::blocks`], each with a bounding sphere for screening basis
//! functions, see [`super::ao_values`]). Atoms are built in parallel (rayon);
//! each atom's points are computed sequentially and the atoms are
//! concatenated in input order, so the grid is bitwise independent of the
//! number of threads.
//!
//! # Weight derivatives
//!
//! Every point keeps its owning atom ([`MolecularGrid::atom_of_point`]) and its
//! unpartitioned radial × angular weight ([`MolecularGrid::quadrature_weights`]).
//! The partition weight of a point for any atom positions is
//! [`partition::becke_weight`] (or [`partition::BeckePartition::weight`]), and
//! its analytic derivative with respect to all atom positions, with points
//! moving rigidly with their atom, is
//! [`partition::BeckePartition::weight_gradient`] (tested against finite
//! differences). The grid-weight contribution to XC nuclear gradients is then
//! Σ_p w_quad,p ∂w_Becke,p/∂R_C f(r_p); assembling it belongs to the XC code.
//!
//! ```
//! use flipswarm::electronic::qc::dft::grid::{GridSpec, MolecularGrid};
//! // H2 at 1.4 bohr: integrate a normalised 1s-like Gaussian density.
//! let nuclei = [(1.0, [0.0, 0.0, -0.7]), (1.0, [0.0, 0.0, 0.7])];
//! let grid = MolecularGrid::build(&nuclei, &GridSpec::level("medium").unwrap()).unwrap();
//! let a = 1.0;
//! let norm = (2.0 * a / std::f64::consts::PI).powf(1.5);
//! let n: f64 = grid.points.iter().zip(&grid.weights).map(|(p, w)| {
//!     let r2 = p[0] * p[0] + p[1] * p[1] + (p[2] - 0.7).powi(2);
//!     w * norm * (-2.0 * a * r2).exp()
//! }).sum();
//! assert!((n - 1.0).abs() < 1e-6);
//! ```

pub mod lebedev;
pub mod partition;
pub mod radial;

use lebedev::{LebedevError, LEBEDEV_ORDERS};
use partition::{bragg_slater_radius_bohr, BeckePartition, PartitionWork};
use rayon::prelude::*;
use std::ops::Range;
use thiserror::Error;

/// Largest nuclear charge the radius tables cover (Kr).
pub const MAX_GRID_Z: usize = 36;

/// Errors of grid specification and construction.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum GridError {
    /// The level name is not one of ours.
    #[error("unknown grid level `{name}`; valid levels: {available}")]
    UnknownLevel {
        /// The name asked for.
        name: String,
        /// The valid names, comma separated.
        available: String,
    },
    /// A grid for no atoms.
    #[error("cannot build a molecular grid for zero atoms")]
    NoAtoms,
    /// A nuclear charge outside 1…36 or not an integer.
    #[error("atom {index}: nuclear charge {charge} is not an element Z = 1..=36 supported by the grid tables")]
    UnsupportedCharge {
        /// Atom index.
        index: usize,
        /// The charge given.
        charge: f64,
    },
    /// A position with a NaN or infinite coordinate.
    #[error("atom {index}: position {position:?} is not finite")]
    NonFinitePosition {
        /// Atom index.
        index: usize,
        /// The position given (bohr).
        position: [f64; 3],
    },
    /// Two atoms (nearly) on top of each other: the Becke partition is undefined.
    #[error("atoms {first} and {second} are {distance:e} bohr apart; the cell partition needs distinct nuclei")]
    CoincidentAtoms {
        /// First atom.
        first: usize,
        /// Second atom.
        second: usize,
        /// Their distance (bohr).
        distance: f64,
    },
    /// The angular order is not an available Lebedev rule.
    #[error(transparent)]
    Lebedev(#[from] LebedevError),
    /// Another invalid field of a [`GridSpec`].
    #[error("invalid grid specification: {0}")]
    InvalidSpec(String),
}

/// Our named levels, coarsest first.
const LEVELS: [&str; 4] = ["coarse", "medium", "fine", "ultrafine"];
/// Radial points per row (H–He, Li–Ne, Na–Ar, K–Kr) and max Lebedev rule.
const LEVEL_TABLE: [([usize; 4], usize); 4] = [
    ([25, 30, 35, 40], 146),
    ([35, 45, 50, 55], 302),
    ([50, 60, 65, 70], 770),
    ([75, 90, 95, 100], 974),
];

/// Default weight screening threshold.
pub const DEFAULT_WEIGHT_CUTOFF: f64 = 1e-15;
/// Default maximum number of points per block.
pub const DEFAULT_BLOCK_SIZE: usize = 128;

/// How to build a molecular grid.
#[derive(Clone, Debug, PartialEq)]
pub struct GridSpec {
    /// The level name, if built from one.
    pub name: Option<String>,
    /// Radial points for every atom; `None` uses [`Self::radial_per_row`].
    pub radial: Option<usize>,
    /// Radial points per row of the periodic table (H–He, Li–Ne, Na–Ar,
    /// K–Kr), used when [`Self::radial`] is `None`.
    pub radial_per_row: [usize; 4],
    /// The largest Lebedev rule (number of points, one of
    /// [`lebedev::LEBEDEV_ORDERS`]); used everywhere if `prune` is off.
    pub angular: usize,
    /// Reduce the angular rule near the nucleus and in the tail (module docs).
    pub prune: bool,
    /// Points with |weight| below this are dropped.
    pub weight_cutoff: f64,
    /// Maximum number of points per block.
    pub block_size: usize,
}

impl GridSpec {
    /// One of our named levels ([`Self::levels`]), case-insensitive.
    pub fn level(name: &str) -> Result<GridSpec, GridError> {
        let key = name.trim().to_ascii_lowercase();
        let i = LEVELS
            .iter()
            .position(|&l| l == key)
            .ok_or_else(|| GridError::UnknownLevel {
                name: name.to_string(),
                available: LEVELS.join(", "),
            })?;
        let (rows, ang) = LEVEL_TABLE[i];
        Ok(GridSpec {
            name: Some(LEVELS[i].to_string()),
            radial: None,
            radial_per_row: rows,
            angular: ang,
            prune: true,
            weight_cutoff: DEFAULT_WEIGHT_CUTOFF,
            block_size: DEFAULT_BLOCK_SIZE,
        })
    }

    /// The names of the levels, coarsest first.
    pub fn levels() -> &'static [&'static str] {
        &LEVELS
    }

    /// An explicit grid: `radial` points for every atom, the Lebedev rule with
    /// `angular` points, pruning on or off.
    pub fn explicit(radial: usize, angular: usize, prune: bool) -> Result<GridSpec, GridError> {
        let spec = GridSpec {
            name: None,
            radial: Some(radial),
            radial_per_row: [radial; 4],
            angular,
            prune,
            weight_cutoff: DEFAULT_WEIGHT_CUTOFF,
            block_size: DEFAULT_BLOCK_SIZE,
        };
        spec.validate()?;
        Ok(spec)
    }

    /// Check every field.
    pub fn validate(&self) -> Result<(), GridError> {
        lebedev::order_index(self.angular)?;
        if self.radial == Some(0) || (self.radial.is_none() && self.radial_per_row.contains(&0)) {
            return Err(GridError::InvalidSpec(
                "the number of radial points must be at least 1".into(),
            ));
        }
        if self.block_size == 0 {
            return Err(GridError::InvalidSpec(
                "block_size must be at least 1".into(),
            ));
        }
        if !(self.weight_cutoff.is_finite() && self.weight_cutoff >= 0.0) {
            return Err(GridError::InvalidSpec(format!(
                "weight_cutoff must be a finite number ≥ 0, got {}",
                self.weight_cutoff
            )));
        }
        Ok(())
    }

    /// Radial points for element `z`.
    pub fn radial_points(&self, z: usize) -> usize {
        self.radial.unwrap_or(self.radial_per_row[row_of(z)])
    }

    /// The Lebedev rule (points) used at radius `r` (bohr) of an atom with
    /// Bragg–Slater radius `r_bs` (bohr), following the pruning table.
    pub fn angular_at(&self, r: f64, r_bs: f64) -> usize {
        let top = lebedev::order_index(self.angular).unwrap_or(LEBEDEV_ORDERS.len() - 1);
        if !self.prune {
            return LEBEDEV_ORDERS[top];
        }
        const I26: usize = 2;
        const I50: usize = 4;
        const I86: usize = 6;
        let rho = r / r_bs;
        let reduced = top.saturating_sub(2).max(I86);
        let idx = if rho < 0.25 {
            I26
        } else if rho < 0.5 {
            I50
        } else if rho < 1.0 {
            reduced
        } else if rho < 6.0 {
            top
        } else {
            reduced
        };
        LEBEDEV_ORDERS[idx.min(top)]
    }
}

/// Row of the periodic table minus one (0 for H–He … 3 for K–Kr).
fn row_of(z: usize) -> usize {
    match z {
        0..=2 => 0,
        3..=10 => 1,
        11..=18 => 2,
        _ => 3,
    }
}

/// A spatially compact set of consecutive grid points of one atom.
#[derive(Clone, Debug, PartialEq)]
pub struct GridBlock {
    /// Indices into the grid's point arrays.
    pub range: Range<usize>,
    /// The atom owning the points.
    pub atom: usize,
    /// Centre of the bounding sphere (bohr).
    pub center: [f64; 3],
    /// Radius of the bounding sphere (bohr): every point lies within it.
    pub radius: f64,
}

impl GridBlock {
    /// Number of points.
    pub fn len(&self) -> usize {
        self.range.len()
    }
    /// Whether the block has no points.
    pub fn is_empty(&self) -> bool {
        self.range.is_empty()
    }
}

/// An integration grid for a molecule.
#[derive(Clone, Debug)]
pub struct MolecularGrid {
    /// Point positions (bohr).
    pub points: Vec<[f64; 3]>,
    /// Final weights w_rad · w_ang · w_Becke.
    pub weights: Vec<f64>,
    /// Owning atom of each point.
    pub atom_of_point: Vec<usize>,
    /// Unpartitioned radial × angular weight of each point (for weight
    /// derivatives: `weights[p] = quadrature_weights[p] · w_Becke`).
    pub quadrature_weights: Vec<f64>,
    /// Blocks of at most `spec.block_size` points, covering all points in order.
    pub blocks: Vec<GridBlock>,
    /// Points of each atom (contiguous, atom order).
    pub atom_ranges: Vec<Range<usize>>,
    /// The specification the grid was built from.
    pub spec: GridSpec,
    partition: BeckePartition,
}

/// One atom's share of the grid, before concatenation.
struct AtomGrid {
    points: Vec<[f64; 3]>,
    weights: Vec<f64>,
    quad: Vec<f64>,
    /// Blocks as local ranges.
    blocks: Vec<(Range<usize>, [f64; 3], f64)>,
}

impl MolecularGrid {
    /// Build the grid for nuclei `(Z, position in bohr)` — exactly
    /// `BasisSet::nuclei` — following `spec`.
    pub fn build(nuclei: &[(f64, [f64; 3])], spec: &GridSpec) -> Result<MolecularGrid, GridError> {
        spec.validate()?;
        if nuclei.is_empty() {
            return Err(GridError::NoAtoms);
        }
        let mut zs = Vec::with_capacity(nuclei.len());
        for (i, &(z, pos)) in nuclei.iter().enumerate() {
            if !(z.is_finite() && z.fract() == 0.0 && z >= 1.0 && z <= MAX_GRID_Z as f64) {
                return Err(GridError::UnsupportedCharge {
                    index: i,
                    charge: z,
                });
            }
            if pos.iter().any(|c| !c.is_finite()) {
                return Err(GridError::NonFinitePosition {
                    index: i,
                    position: pos,
                });
            }
            zs.push(z as usize);
        }
        for i in 0..nuclei.len() {
            for j in 0..i {
                let (a, b) = (nuclei[i].1, nuclei[j].1);
                let d =
                    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)).sqrt();
                if d < 1e-6 {
                    return Err(GridError::CoincidentAtoms {
                        first: j,
                        second: i,
                        distance: d,
                    });
                }
            }
        }
        let positions: Vec<[f64; 3]> = nuclei.iter().map(|n| n.1).collect();
        // Checked above: 1 ≤ z ≤ 36 is inside both tables.
        let r_bs: Vec<f64> = zs
            .iter()
            .map(|&z| bragg_slater_radius_bohr(z).unwrap_or(1.0))
            .collect();
        let partition = BeckePartition::new(&positions, &r_bs);

        let atoms: Vec<AtomGrid> = (0..nuclei.len())
            .into_par_iter()
            .map(|a| build_atom(a, zs[a], positions[a], r_bs[a], spec, &partition))
            .collect();

        let total: usize = atoms.iter().map(|g| g.points.len()).sum();
        let mut grid = MolecularGrid {
            points: Vec::with_capacity(total),
            weights: Vec::with_capacity(total),
            atom_of_point: Vec::with_capacity(total),
            quadrature_weights: Vec::with_capacity(total),
            blocks: Vec::new(),
            atom_ranges: Vec::with_capacity(nuclei.len()),
            spec: spec.clone(),
            partition,
        };
        for (a, g) in atoms.into_iter().enumerate() {
            let off = grid.points.len();
            grid.atom_ranges.push(off..off + g.points.len());
            grid.atom_of_point
                .extend(std::iter::repeat_n(a, g.points.len()));
            grid.points.extend(g.points);
            grid.weights.extend(g.weights);
            grid.quadrature_weights.extend(g.quad);
            for (r, center, radius) in g.blocks {
                grid.blocks.push(GridBlock {
                    range: r.start + off..r.end + off,
                    atom: a,
                    center,
                    radius,
                });
            }
        }
        Ok(grid)
    }

    /// Number of points.
    pub fn len(&self) -> usize {
        self.points.len()
    }

    /// Whether the grid has no points.
    pub fn is_empty(&self) -> bool {
        self.points.is_empty()
    }

    /// The Becke partition of the grid's geometry (for weight derivatives).
    pub fn partition(&self) -> &BeckePartition {
        &self.partition
    }

    /// Σ_p w_p f(r_p) for a function of the point.
    pub fn integrate(&self, f: impl Fn([f64; 3]) -> f64) -> f64 {
        self.points
            .iter()
            .zip(&self.weights)
            .map(|(&p, &w)| w * f(p))
            .sum()
    }
}

fn build_atom(
    atom: usize,
    z: usize,
    center: [f64; 3],
    r_bs: f64,
    spec: &GridSpec,
    partition: &BeckePartition,
) -> AtomGrid {
    let nrad = spec.radial_points(z);
    // 1 ≤ z ≤ 36 is checked by the caller.
    let xi = radial::ta_xi(z).unwrap_or(1.0);
    let (rr, wr) = radial::treutler_ahlrichs(nrad, xi);
    let mut points = Vec::new();
    let mut weights = Vec::new();
    let mut quad = Vec::new();
    let mut work = PartitionWork::default();
    for (&r, &w_r) in rr.iter().zip(&wr) {
        // angular_at only returns available orders.
        let Ok(rule) = lebedev::rule(spec.angular_at(r, r_bs)) else {
            continue;
        };
        for (u, &w_a) in rule.points.iter().zip(&rule.weights) {
            let p = [
                center[0] + r * u[0],
                center[1] + r * u[1],
                center[2] + r * u[2],
            ];
            let wq = w_r * w_a;
            let w = wq * partition.weight_with(p, atom, &mut work);
            if w.abs() >= spec.weight_cutoff && w != 0.0 {
                points.push(p);
                weights.push(w);
                quad.push(wq);
            }
        }
    }
    // Spatial blocks by recursive bisection; reorder the points accordingly.
    let mut order: Vec<usize> = (0..points.len()).collect();
    let mut ranges = Vec::new();
    bisect(&points, &mut order, 0, spec.block_size, &mut ranges);
    let points: Vec<[f64; 3]> = order.iter().map(|&i| points[i]).collect();
    let weights = order.iter().map(|&i| weights[i]).collect();
    let quad = order.iter().map(|&i| quad[i]).collect();
    let blocks = ranges
        .into_iter()
        .map(|r: Range<usize>| {
            let (c, rad) = bounding_sphere(&points[r.clone()]);
            (r, c, rad)
        })
        .collect();
    AtomGrid {
        points,
        weights,
        quad,
        blocks,
    }
}

/// Split `idx` (global offset `off`) until every piece has ≤ `max` points.
fn bisect(
    points: &[[f64; 3]],
    idx: &mut [usize],
    off: usize,
    max: usize,
    out: &mut Vec<Range<usize>>,
) {
    if idx.is_empty() {
        return;
    }
    if idx.len() <= max {
        out.push(off..off + idx.len());
        return;
    }
    let mut lo = [f64::INFINITY; 3];
    let mut hi = [f64::NEG_INFINITY; 3];
    for &i in idx.iter() {
        for k in 0..3 {
            lo[k] = lo[k].min(points[i][k]);
            hi[k] = hi[k].max(points[i][k]);
        }
    }
    let axis = (0..3)
        .max_by(|&a, &b| (hi[a] - lo[a]).total_cmp(&(hi[b] - lo[b])))
        .unwrap_or(0);
    idx.sort_by(|&a, &b| points[a][axis].total_cmp(&points[b][axis]).then(a.cmp(&b)));
    // Split at a multiple of `max` near the middle so blocks fill up.
    let nblk = idx.len().div_ceil(max);
    let mid = (nblk / 2) * max;
    let (left, right) = idx.split_at_mut(mid);
    bisect(points, left, off, max, out);
    bisect(points, right, off + mid, max, out);
}

/// Centre (box midpoint) and radius enclosing all points.
fn bounding_sphere(points: &[[f64; 3]]) -> ([f64; 3], f64) {
    let mut lo = [f64::INFINITY; 3];
    let mut hi = [f64::NEG_INFINITY; 3];
    for p in points {
        for k in 0..3 {
            lo[k] = lo[k].min(p[k]);
            hi[k] = hi[k].max(p[k]);
        }
    }
    let c = [
        0.5 * (lo[0] + hi[0]),
        0.5 * (lo[1] + hi[1]),
        0.5 * (lo[2] + hi[2]),
    ];
    let r2 = points
        .iter()
        .map(|p| (p[0] - c[0]).powi(2) + (p[1] - c[1]).powi(2) + (p[2] - c[2]).powi(2))
        .fold(0.0, f64::max);
    (c, r2.sqrt())
}
