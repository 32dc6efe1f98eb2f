//! The Becke partition of space into fuzzy atomic cells (J. Chem. Phys. 88,
//! 2547 (1988)) with the atomic-size adjustment of its appendix, and the
//! analytic derivative of the cell weights with respect to the nuclear
//! positions.
//!
//! For a point r and atoms A, B with distances r_A, r_B and separation R_AB:
//!
//! * μ_AB = (r_A − r_B)/R_AB, and with the size adjustment
//!   ν_AB = μ_AB + a_AB (1 − μ_AB²), where χ = R_A/R_B (ratio of the atomic
//!   radii), u = (χ − 1)/(χ + 1), a_AB = u/(u² − 1), clipped to |a_AB| ≤ ½;
//! * s(ν) = ½ (1 − f(f(f(ν)))), f(x) = 3x/2 − x³/2 (three iterations);
//! * P_A(r) = Π_{B≠A} s(ν_AB), and the weight of atom A is
//!   w_A(r) = P_A(r) / Σ_B P_B(r). The w_A sum to one at every point.
//!
//! The atomic radii are Bragg–Slater radii (J. Chem. Phys. 41, 3199 (1964),
//! values from memory) with hydrogen set to 0.35 Å, as in the appendix of
//! the partition paper (common practice). The Bragg–Slater table has no
//! noble gases; we give He, Ne, Ar and Kr the radius of the preceding
//! element (H's adjusted 0.35 Å, F, Cl, Br) — our choice.
//!
//! Cost: O(N²) per point for N atoms (no screening of distant atoms yet; a
//! screened scheme such as Chem. Phys. Lett. 257, 213 (1996) is the natural
//! next step for large molecules).
//!
//! # Derivatives
//!
//! For analytic gradients the grid points of atom A move rigidly with A.
//! [`BeckePartition::weight_gradient`] returns ∂w_A(r)/∂R_C for all atoms C
//! under that convention (C = A includes the motion of the point). With
//! g_BD = Π_{E≠B,D} s_BE · s′_BD / R_BD (s′ = ds/dμ = ds/dν (1 − 2a μ)),
//! u_B = (r − R_B)/r_B and e_BD = (R_B − R_D)/R_BD, the term D of
//! ∂P_B contributes g_BD (u_B − u_D) to atom A, −g_BD (u_B + μ_BD e_BD) to B
//! and g_BD (u_D + μ_BD e_BD) to D; then
//! ∂w_A = (∂P_A − w_A Σ_B ∂P_B) / Σ_B P_B.

use crate::units::angstrom_to_bohr;

/// Bragg–Slater radii in Å for Z = 1…36 (J. Chem. Phys. 41, 3199 (1964),
/// values from memory), hydrogen adjusted to 0.35 Å (appendix of
/// J. Chem. Phys. 88, 2547 (1988), common practice), noble gases given the
/// preceding element's value (our choice).
const BRAGG_SLATER_ANGSTROM: [f64; 36] = [
    0.35, 0.35, // H (adjusted) He (our choice)
    1.45, 1.05, 0.85, 0.70, 0.65, 0.60, 0.50, 0.50, // Li–Ne
    1.80, 1.50, 1.25, 1.10, 1.00, 1.00, 1.00, 1.00, // Na–Ar
    2.20, 1.80, 1.60, 1.40, 1.35, 1.40, 1.40, 1.40, 1.35, 1.35, 1.35, 1.35, // K–Zn
    1.30, 1.25, 1.15, 1.15, 1.15, 1.15, // Ga–Kr
];

/// Bragg–Slater radius (bohr) of element `z` (1…36) as used here
/// (hydrogen 0.35 Å), or `None` outside the table.
pub fn bragg_slater_radius_bohr(z: usize) -> Option<f64> {
    z.checked_sub(1)
        .and_then(|i| BRAGG_SLATER_ANGSTROM.get(i))
        .map(|&r| angstrom_to_bohr(r))
}

/// f(x) = 3x/2 − x³/2.
#[inline]
fn becke_f(x: f64) -> f64 {
    1.5 * x - 0.5 * x * x * x
}

/// s(ν) = ½ (1 − f(f(f(ν)))).
#[inline]
fn becke_s(nu: f64) -> f64 {
    0.5 * (1.0 - becke_f(becke_f(becke_f(nu))))
}

/// s(ν) and ds/dν.
#[inline]
fn becke_s_ds(nu: f64) -> (f64, f64) {
    let f1 = becke_f(nu);
    let f2 = becke_f(f1);
    let f3 = becke_f(f2);
    let d = 1.5 * (1.0 - nu * nu) * 1.5 * (1.0 - f1 * f1) * 1.5 * (1.0 - f2 * f2);
    (0.5 * (1.0 - f3), -0.5 * d)
}

/// Size-adjustment parameter a_AB for radii R_A, R_B (appendix of
/// J. Chem. Phys. 88, 2547 (1988)).
#[inline]
pub fn size_adjustment(ra: f64, rb: f64) -> f64 {
    let chi = ra / rb;
    let u = (chi - 1.0) / (chi + 1.0);
    let a = u / (u * u - 1.0);
    a.clamp(-0.5, 0.5)
}

/// The partition data of one geometry: atom positions, inverse separations
/// and size adjustments. Build once per geometry; the weight functions are
/// then pure functions of the point.
#[derive(Clone, Debug)]
pub struct BeckePartition {
    positions: Vec<[f64; 3]>,
    /// 1/R_AB (row-major N×N; 0 on the diagonal).
    inv_r: Vec<f64>,
    /// a_AB (row-major N×N; antisymmetric).
    adjust: Vec<f64>,
}

/// Scratch space of [`BeckePartition::weight_with`] and
/// [`BeckePartition::weight_gradient`] (reuse to avoid allocation).
#[derive(Clone, Debug, Default)]
pub struct PartitionWork {
    dist: Vec<f64>,
    cell: Vec<f64>,
    s: Vec<f64>,
    ds: Vec<f64>,
    mu: Vec<f64>,
    unit: Vec<[f64; 3]>,
    pre: Vec<f64>,
    dz: Vec<[f64; 3]>,
    dpa: Vec<[f64; 3]>,
}

impl BeckePartition {
    /// From atom positions (bohr) and atomic radii (any common unit; only
    /// their ratios enter). The caller guarantees distinct positions
    /// ([`super::MolecularGrid::build`] checks this and returns an error).
    pub fn new(positions: &[[f64; 3]], radii: &[f64]) -> BeckePartition {
        let n = positions.len();
        let mut inv_r = vec![0.0; n * n];
        let mut adjust = vec![0.0; n * n];
        for a in 0..n {
            for b in 0..n {
                if a == b {
                    continue;
                }
                let d = dist(positions[a], positions[b]);
                inv_r[a * n + b] = 1.0 / d;
                adjust[a * n + b] = size_adjustment(radii[a], radii[b]);
            }
        }
        BeckePartition {
            positions: positions.to_vec(),
            inv_r,
            adjust,
        }
    }

    /// Number of atoms.
    pub fn natoms(&self) -> usize {
        self.positions.len()
    }

    /// The atom positions (bohr).
    pub fn positions(&self) -> &[[f64; 3]] {
        &self.positions
    }

    /// Becke weight w_owner(point) (allocates scratch; see [`Self::weight_with`]).
    pub fn weight(&self, point: [f64; 3], owner: usize) -> f64 {
        self.weight_with(point, owner, &mut PartitionWork::default())
    }

    /// Becke weight w_owner(point), using `work` as scratch.
    pub fn weight_with(&self, point: [f64; 3], owner: usize, work: &mut PartitionWork) -> f64 {
        let n = self.natoms();
        if n == 1 {
            return 1.0;
        }
        work.dist.clear();
        work.dist
            .extend(self.positions.iter().map(|&p| dist(point, p)));
        work.cell.clear();
        work.cell.resize(n, 1.0);
        for b in 0..n {
            for d in (b + 1)..n {
                let mu = (work.dist[b] - work.dist[d]) * self.inv_r[b * n + d];
                let a = self.adjust[b * n + d];
                let s = becke_s(mu + a * (1.0 - mu * mu));
                // ν_DB = −ν_BD, and s(−ν) = 1 − s(ν).
                work.cell[b] *= s;
                work.cell[d] *= 1.0 - s;
            }
        }
        let z: f64 = work.cell.iter().sum();
        if z > 0.0 {
            work.cell[owner] / z
        } else {
            0.0
        }
    }

    /// Becke weight w_owner(point) and its derivatives with respect to every
    /// atom position, `grad[C]` = ∂w/∂R_C, with the point moving rigidly with
    /// its owner atom (see the module docs). `grad.len()` must be the number
    /// of atoms. `Σ_C grad[C] = 0` (translational invariance).
    pub fn weight_gradient(
        &self,
        point: [f64; 3],
        owner: usize,
        work: &mut PartitionWork,
        grad: &mut [[f64; 3]],
    ) -> f64 {
        let n = self.natoms();
        grad.iter_mut().for_each(|g| *g = [0.0; 3]);
        if n == 1 {
            return 1.0;
        }
        let w = &mut *work;
        w.dist.clear();
        w.unit.clear();
        for &p in &self.positions {
            let v = [point[0] - p[0], point[1] - p[1], point[2] - p[2]];
            let d = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
            w.dist.push(d);
            w.unit.push(if d > 0.0 {
                [v[0] / d, v[1] / d, v[2] / d]
            } else {
                [0.0; 3]
            });
        }
        w.s.clear();
        w.s.resize(n * n, 1.0);
        w.ds.clear();
        w.ds.resize(n * n, 0.0);
        w.mu.clear();
        w.mu.resize(n * n, 0.0);
        for b in 0..n {
            for d in 0..n {
                if b == d {
                    continue;
                }
                let mu = (w.dist[b] - w.dist[d]) * self.inv_r[b * n + d];
                let a = self.adjust[b * n + d];
                let (s, dsdnu) = becke_s_ds(mu + a * (1.0 - mu * mu));
                w.s[b * n + d] = s;
                w.ds[b * n + d] = dsdnu * (1.0 - 2.0 * a * mu);
                w.mu[b * n + d] = mu;
            }
        }
        w.cell.clear();
        w.cell
            .extend((0..n).map(|b| w.s[b * n..(b + 1) * n].iter().product::<f64>()));
        let z: f64 = w.cell.iter().sum();
        if z <= 0.0 {
            return 0.0;
        }
        let wa = w.cell[owner] / z;
        w.dz.clear();
        w.dz.resize(n, [0.0; 3]);
        w.dpa.clear();
        w.dpa.resize(n, [0.0; 3]);
        w.pre.clear();
        w.pre.resize(n + 1, 1.0);
        for b in 0..n {
            let row = &w.s[b * n..(b + 1) * n];
            // pre[k] = Π_{E<k} s_BE; suffix product carried in `suf`.
            for (k, &s_bk) in row.iter().enumerate() {
                w.pre[k + 1] = w.pre[k] * s_bk;
            }
            let mut suf = 1.0;
            for d in (0..n).rev() {
                if d != b {
                    // Π_{E≠B,D} s_BE (s_BB = 1 is in the row).
                    let others = w.pre[d] * suf;
                    let g = others * w.ds[b * n + d] * self.inv_r[b * n + d];
                    if g != 0.0 {
                        let mu = w.mu[b * n + d];
                        let (pb, pd) = (self.positions[b], self.positions[d]);
                        let ir = self.inv_r[b * n + d];
                        let e = [
                            (pb[0] - pd[0]) * ir,
                            (pb[1] - pd[1]) * ir,
                            (pb[2] - pd[2]) * ir,
                        ];
                        let (ub, ud) = (w.unit[b], w.unit[d]);
                        for k in 0..3 {
                            let ta = g * (ub[k] - ud[k]);
                            let tb = -g * (ub[k] + mu * e[k]);
                            let td = g * (ud[k] + mu * e[k]);
                            w.dz[owner][k] += ta;
                            w.dz[b][k] += tb;
                            w.dz[d][k] += td;
                            if b == owner {
                                w.dpa[owner][k] += ta;
                                w.dpa[b][k] += tb;
                                w.dpa[d][k] += td;
                            }
                        }
                    }
                }
                suf *= row[d];
            }
        }
        for (c, g) in grad.iter_mut().enumerate() {
            *g = std::array::from_fn(|k| (w.dpa[c][k] - wa * w.dz[c][k]) / z);
        }
        wa
    }
}

/// Becke weight of the cell of atom `owner` at `point`, for atoms at
/// `positions` (bohr) with atomic radii `radii` (only ratios matter): a
/// convenience wrapper that builds a [`BeckePartition`] each call (for
/// finite-difference checks and one-off use).
pub fn becke_weight(point: [f64; 3], owner: usize, positions: &[[f64; 3]], radii: &[f64]) -> f64 {
    BeckePartition::new(positions, radii).weight(point, owner)
}

#[inline]
fn dist(a: [f64; 3], b: [f64; 3]) -> f64 {
    let d = [a[0] - b[0], a[1] - b[1], a[2] - b[2]];
    (d[0] * d[0] + d[1] * d[1] + d[2] * d[2]).sqrt()
}
