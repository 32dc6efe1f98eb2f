//! Electron-repulsion integrals (ab|cd) = ∫∫ a(1) b(1) r₁₂⁻¹ c(2) d(2) by
//! McMurchie–Davidson, with shell-pair data computed once, Schwarz screening
//! |(ab|cd)| ≤ Q_ab Q_cd, Q_ab = √max(ab|ab), and the 8-fold permutational
//! symmetry (ab|cd) = (ba|cd) = (ab|dc) = (cd|ab) = ….
//!
//! Per primitive quartet, with p, q the pair exponents and α = pq/(p+q):
//!   (ab|cd) = 2π^{5/2}/(pq√(p+q)) Σ_tuv E^{ab}_tuv Σ_τνφ (−1)^{τ+ν+φ} E^{cd}_τνφ R_{t+τ,u+ν,v+φ}(α, P−Q).
//! The ket sum is accumulated over ket primitives into `W[tuv][cd]` before the
//! bra coefficients are applied (contraction-aware; all buffers live in a
//! caller-owned [`EriWork`], so the inner loops do not allocate).
//!
//! Coulomb and exchange matrices for densities D (any, not necessarily
//! symmetric): J_pq = Σ_rs (pq|rs) D_rs and K_pr = Σ_qs (pq|rs) D_qs.

#![allow(clippy::needless_range_loop)] // index loops mirror the formulas

use super::cart::{components_table, is_diagonal, transform};
use super::hermite::{E1d, RWork};
use super::one_electron::RawShell;
use crate::electronic::qc::basis::BasisSet;
use nalgebra::DMatrix;
use rayon::prelude::*;
use std::f64::consts::PI;
use std::sync::OnceLock;
use thiserror::Error;

/// Errors of the two-electron builds.
#[derive(Debug, Error, PartialEq)]
pub enum TwoElectronError {
    /// A density matrix does not match the basis.
    #[error("density {index} is {rows}x{cols}, the basis has {nbf} functions")]
    DensityShape {
        /// Which density.
        index: usize,
        /// Its rows.
        rows: usize,
        /// Its columns.
        cols: usize,
        /// Basis size.
        nbf: usize,
    },
}

/// Hermite index triples (t,u,v) with t+u+v ≤ L.
pub fn hermite_table(l: usize) -> &'static [[usize; 3]] {
    static T: OnceLock<Vec<Vec<[usize; 3]>>> = OnceLock::new();
    &T.get_or_init(|| {
        (0..=hermite_max())
            .map(|l| {
                let mut v = Vec::new();
                for n in 0..=l {
                    for t in (0..=n).rev() {
                        for u in (0..=(n - t)).rev() {
                            v.push([t, u, n - t - u]);
                        }
                    }
                }
                v
            })
            .collect()
    })[l]
}

fn hermite_max() -> usize {
    2 * (crate::electronic::qc::basis::MAX_L + 1)
}

/// One primitive pair of a shell pair.
#[derive(Clone, Copy, Debug)]
pub struct PrimPair {
    /// Total exponent p = a + b.
    pub p: f64,
    /// Product centre P.
    pub center: [f64; 3],
}

/// A generally contracted shell as the ERI kernel sees it: several
/// contractions sharing one set of exponents (e.g. the 1s and 2s rows of
/// cc-pVDZ); each contraction's coefficients include normalisation.
#[derive(Clone, Debug)]
pub struct RawGroup {
    /// Angular momentum.
    pub l: usize,
    /// Centre (bohr).
    pub center: [f64; 3],
    /// Shared exponents.
    pub exps: Vec<f64>,
    /// One coefficient vector per contraction.
    pub coefs: Vec<Vec<f64>>,
}

impl RawGroup {
    /// A single contraction.
    pub fn single(s: &RawShell) -> RawGroup {
        RawGroup {
            l: s.l,
            center: s.center,
            exps: s.exps.clone(),
            coefs: vec![s.coefs.clone()],
        }
    }
}

/// Precomputed data of a shell pair (a, b): primitive pairs, their Hermite
/// expansion coefficients, and per primitive pair the products of contraction
/// coefficients (times exp(−μ|AB|²)) for every pair of contractions.
#[derive(Clone, Debug)]
pub struct ShellPairData {
    /// Angular momenta.
    pub la: usize,
    /// Angular momenta.
    pub lb: usize,
    /// Contractions of a and b.
    pub nctr: (usize, usize),
    /// Number of Cartesian component pairs (one contraction each).
    pub nab: usize,
    /// Number of Hermite functions (t+u+v ≤ la+lb).
    pub nherm: usize,
    /// Significant primitive pairs.
    pub prims: Vec<PrimPair>,
    /// Per primitive pair a block `[nherm][nab]` (no coefficients).
    pub e: Vec<f64>,
    /// Per primitive pair the coefficient products `[ctr_a][ctr_b]`.
    pub k: Vec<f64>,
}

impl ShellPairData {
    /// Build from two single-contraction shells.
    pub fn new(a: &RawShell, b: &RawShell) -> ShellPairData {
        ShellPairData::from_groups(&RawGroup::single(a), &RawGroup::single(b))
    }

    /// Build from two generally contracted shells; primitive pairs whose
    /// overlap-size contribution is below 1e−17 for every contraction pair
    /// are dropped.
    pub fn from_groups(a: &RawGroup, b: &RawGroup) -> ShellPairData {
        let ca = components_table(a.l);
        let cb = components_table(b.l);
        let nab = ca.len() * cb.len();
        let lab = a.l + b.l;
        let herm = hermite_table(lab);
        let nherm = herm.len();
        let (ga, gb) = (a.coefs.len(), b.coefs.len());
        let ab = [
            a.center[0] - b.center[0],
            a.center[1] - b.center[1],
            a.center[2] - b.center[2],
        ];
        let r2 = ab[0] * ab[0] + ab[1] * ab[1] + ab[2] * ab[2];
        let mut prims = Vec::new();
        let mut e = Vec::new();
        let mut kv = Vec::new();
        let (mut ex, mut ey, mut ez) = (E1d::new(), E1d::new(), E1d::new());
        for (pa, &ea) in a.exps.iter().enumerate() {
            for (pb, &eb) in b.exps.iter().enumerate() {
                let p = ea + eb;
                let g = (-ea * eb / p * r2).exp();
                let ks: Vec<f64> = (0..ga)
                    .flat_map(|x| (0..gb).map(move |y| (x, y)))
                    .map(|(x, y)| a.coefs[x][pa] * b.coefs[y][pb] * g)
                    .collect();
                let kmax = ks.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                if kmax * (PI / p).powf(1.5) < 1e-17 {
                    continue;
                }
                let pc = [
                    (ea * a.center[0] + eb * b.center[0]) / p,
                    (ea * a.center[1] + eb * b.center[1]) / p,
                    (ea * a.center[2] + eb * b.center[2]) / p,
                ];
                let o2p = 0.5 / p;
                ex.fill(a.l, b.l, o2p, pc[0] - a.center[0], pc[0] - b.center[0]);
                ey.fill(a.l, b.l, o2p, pc[1] - a.center[1], pc[1] - b.center[1]);
                ez.fill(a.l, b.l, o2p, pc[2] - a.center[2], pc[2] - b.center[2]);
                let start = e.len();
                e.resize(start + nherm * nab, 0.0);
                for (h, tuv) in herm.iter().enumerate() {
                    for (ia, xa) in ca.iter().enumerate() {
                        for (ib, xb) in cb.iter().enumerate() {
                            e[start + h * nab + ia * cb.len() + ib] = ex.get(xa[0], xb[0], tuv[0])
                                * ey.get(xa[1], xb[1], tuv[1])
                                * ez.get(xa[2], xb[2], tuv[2]);
                        }
                    }
                }
                kv.extend(ks);
                prims.push(PrimPair { p, center: pc });
            }
        }
        ShellPairData {
            la: a.l,
            lb: b.l,
            nctr: (ga, gb),
            nab,
            nherm,
            prims,
            e,
            k: kv,
        }
    }

    /// Rows of the raw block: contractions × Cartesian components of a and b.
    pub fn nrows(&self) -> usize {
        self.nctr.0 * self.nctr.1 * self.nab
    }
}

/// Caller-owned workspace of the ERI kernel.
pub struct EriWork {
    r: RWork,
    w: Vec<f64>,
    v: Vec<f64>,
    raw: Vec<f64>,
    offs_ab: Vec<usize>,
    offs_cd: Vec<usize>,
    sign_cd: Vec<f64>,
    t1: Vec<f64>,
    t2: Vec<f64>,
    scale: [Vec<f64>; 4],
    /// Transformed block of the last [`ShellPairs::quartet`] call.
    pub out: Vec<f64>,
}

impl EriWork {
    /// A fresh workspace.
    pub fn new() -> EriWork {
        EriWork {
            r: RWork::new(),
            w: Vec::new(),
            v: Vec::new(),
            raw: Vec::new(),
            offs_ab: Vec::new(),
            offs_cd: Vec::new(),
            sign_cd: Vec::new(),
            t1: Vec::new(),
            t2: Vec::new(),
            scale: [Vec::new(), Vec::new(), Vec::new(), Vec::new()],
            out: Vec::new(),
        }
    }
}

impl Default for EriWork {
    fn default() -> Self {
        Self::new()
    }
}

/// Raw Cartesian quartet into `w.raw`, layout `[A][B][C][D]` with each index
/// running over (contraction, Cartesian component) of its shell.
pub fn raw_quartet(bra: &ShellPairData, ket: &ShellPairData, w: &mut EriWork) {
    let lt = bra.la + bra.lb + ket.la + ket.lb;
    let d = lt + 1;
    let hab = hermite_table(bra.la + bra.lb);
    let hcd = hermite_table(ket.la + ket.lb);
    w.offs_ab.clear();
    w.offs_ab
        .extend(hab.iter().map(|t| (t[0] * d + t[1]) * d + t[2]));
    w.offs_cd.clear();
    w.offs_cd
        .extend(hcd.iter().map(|t| (t[0] * d + t[1]) * d + t[2]));
    w.sign_cd.clear();
    w.sign_cd.extend(hcd.iter().map(|t| {
        if (t[0] + t[1] + t[2]) % 2 == 0 {
            1.0
        } else {
            -1.0
        }
    }));
    let (nca, ncb) = (
        components_table(bra.la).len(),
        components_table(bra.lb).len(),
    );
    let (ncc, ncd) = (
        components_table(ket.la).len(),
        components_table(ket.lb).len(),
    );
    let (ga, gb) = bra.nctr;
    let (gc, gd) = ket.nctr;
    let (nab, ncdc) = (bra.nab, ket.nab);
    let nrow_b = gb * ncb; // extent of index B
    let ncol = gc * ncc * gd * ncd; // extent of the combined ket index
    let (nhab, nhcd) = (bra.nherm, ket.nherm);
    let ket_single = gc * gd == 1;
    w.raw.clear();
    w.raw.resize(ga * nca * nrow_b * ncol, 0.0);
    w.w.resize(nhab * ncol, 0.0);
    if !ket_single {
        w.v.resize(nhab * ncdc, 0.0);
    }
    let two_pi_52 = 2.0 * PI.powf(2.5);
    for (ip, pp) in bra.prims.iter().enumerate() {
        w.w.fill(0.0);
        for (iq, qq) in ket.prims.iter().enumerate() {
            let (p, q) = (pp.p, qq.p);
            let alpha = p * q / (p + q);
            let pq = [
                pp.center[0] - qq.center[0],
                pp.center[1] - qq.center[1],
                pp.center[2] - qq.center[2],
            ];
            let mut pref = two_pi_52 / (p * q * (p + q).sqrt());
            if ket_single {
                pref *= ket.k[iq];
            }
            w.r.compute(lt, alpha, pq, pref);
            let r = &w.r.r;
            let ecd = &ket.e[iq * nhcd * ncdc..(iq + 1) * nhcd * ncdc];
            // V[tuv][cd] = Σ_τνφ (−1)^{τ+ν+φ} R_{t+τ,u+ν,v+φ} E^{cd}_τνφ
            let target: &mut [f64] = if ket_single { &mut w.w } else { &mut w.v };
            if !ket_single {
                target.fill(0.0);
            }
            for h1 in 0..nhab {
                let o1 = w.offs_ab[h1];
                let row = &mut target[h1 * ncdc..(h1 + 1) * ncdc];
                for h2 in 0..nhcd {
                    let rv = r[o1 + w.offs_cd[h2]] * w.sign_cd[h2];
                    let erow = &ecd[h2 * ncdc..(h2 + 1) * ncdc];
                    for (x, &e) in row.iter_mut().zip(erow) {
                        *x += rv * e;
                    }
                }
            }
            if !ket_single {
                let kq = &ket.k[iq * gc * gd..(iq + 1) * gc * gd];
                for h1 in 0..nhab {
                    let vrow = &w.v[h1 * ncdc..(h1 + 1) * ncdc];
                    let wrow = &mut w.w[h1 * ncol..(h1 + 1) * ncol];
                    for c1 in 0..gc {
                        for d1 in 0..gd {
                            let k = kq[c1 * gd + d1];
                            if k == 0.0 {
                                continue;
                            }
                            for cc in 0..ncc {
                                let base = (c1 * ncc + cc) * (gd * ncd) + d1 * ncd;
                                for dd in 0..ncd {
                                    wrow[base + dd] += k * vrow[cc * ncd + dd];
                                }
                            }
                        }
                    }
                }
            }
        }
        let eab = &bra.e[ip * nhab * nab..(ip + 1) * nhab * nab];
        let kp = &bra.k[ip * ga * gb..(ip + 1) * ga * gb];
        for a1 in 0..ga {
            for b1 in 0..gb {
                let k = kp[a1 * gb + b1];
                if k == 0.0 {
                    continue;
                }
                for h1 in 0..nhab {
                    let wrow = &w.w[h1 * ncol..(h1 + 1) * ncol];
                    for ca in 0..nca {
                        for cb in 0..ncb {
                            let e = eab[h1 * nab + ca * ncb + cb];
                            if e == 0.0 {
                                continue;
                            }
                            let e = e * k;
                            let row = (a1 * nca + ca) * nrow_b + b1 * ncb + cb;
                            let orow = &mut w.raw[row * ncol..(row + 1) * ncol];
                            for (o, &x) in orow.iter_mut().zip(wrow) {
                                *o += e * x;
                            }
                        }
                    }
                }
            }
        }
    }
}

/// Transform index `k` (of 4) of a row-major tensor with dims `dims`; the
/// index runs over `nctr` blocks, each transformed by `t` (nf × nc). Returns
/// the new dims.
fn transform_index(
    data: &[f64],
    dims: [usize; 4],
    k: usize,
    t: &[f64],
    nctr: usize,
    out: &mut Vec<f64>,
) -> [usize; 4] {
    let nc = dims[k] / nctr;
    let nf = t.len() / nc;
    let outer: usize = dims[..k].iter().product::<usize>() * nctr;
    let inner: usize = dims[k + 1..].iter().product();
    let mut nd = dims;
    nd[k] = nf * nctr;
    out.clear();
    out.resize(outer * nf * inner, 0.0);
    for o in 0..outer {
        for f in 0..nf {
            let dst = (o * nf + f) * inner;
            for c in 0..nc {
                let tv = t[f * nc + c];
                if tv == 0.0 {
                    continue;
                }
                let src = (o * nc + c) * inner;
                for i in 0..inner {
                    out[dst + i] += tv * data[src + i];
                }
            }
        }
    }
    nd
}

/// (l, pure, number of contractions) of the four shells of a quartet.
pub type QuartetShells = [(usize, bool, usize); 4];

/// Map `w.raw` to output functions into `w.out` (layout `[A][B][C][D]`, each
/// index over (contraction, function)).
pub fn transform_quartet(shells: QuartetShells, w: &mut EriWork) {
    let dims = shells.map(|(l, _, g)| components_table(l).len() * g);
    if shells.iter().all(|&(l, p, _)| is_diagonal(l, p)) {
        // Diagonal scalings only: factor per (contraction, component).
        let f = &mut w.scale;
        for (x, &(l, p, g)) in shells.iter().enumerate() {
            let t = transform(l, p);
            let nc = components_table(l).len();
            f[x].clear();
            for _ in 0..g {
                f[x].extend((0..nc).map(|c| t[c * nc + c]));
            }
        }
        let f = &w.scale;
        w.out.clear();
        w.out.resize(w.raw.len(), 0.0);
        let mut idx = 0;
        for a in 0..dims[0] {
            for b in 0..dims[1] {
                let fab = f[0][a] * f[1][b];
                for c in 0..dims[2] {
                    let fabc = fab * f[2][c];
                    for d in 0..dims[3] {
                        w.out[idx] = w.raw[idx] * fabc * f[3][d];
                        idx += 1;
                    }
                }
            }
        }
        return;
    }
    let mut dims_cur = dims;
    w.t1.clear();
    w.t1.extend_from_slice(&w.raw);
    for (k, &(l, pure, g)) in shells.iter().enumerate() {
        if is_diagonal(l, pure) && l < 2 {
            continue; // s and p: identity
        }
        dims_cur = transform_index(&w.t1, dims_cur, k, transform(l, pure), g, &mut w.t2);
        std::mem::swap(&mut w.t1, &mut w.t2);
    }
    std::mem::swap(&mut w.out, &mut w.t1);
}

/// All pairs of shell groups (i ≥ j) of a basis with their data and Schwarz
/// factors. A group is a run of consecutive shells on one atom with the same
/// angular momentum and the same exponents (a general contraction); its
/// functions are contiguous in AO order, contraction-major.
pub struct ShellPairs {
    /// Pair data indexed by i(i+1)/2 + j over groups.
    pub pairs: Vec<ShellPairData>,
    /// Q_ij = √max|(ij|ij)| per group pair.
    pub schwarz: Vec<f64>,
    /// (l, pure, contractions) per group.
    pub group_info: Vec<(usize, bool, usize)>,
    /// First AO and number of functions per group.
    pub group_ao: Vec<(usize, usize)>,
    /// Number of basis functions.
    pub nbf: usize,
}

fn group_shells(basis: &BasisSet) -> Vec<(RawGroup, bool, usize, usize)> {
    let mut out: Vec<(RawGroup, bool, usize, usize)> = Vec::new();
    let mut last: Option<(usize, usize, bool)> = None;
    for (s, &off) in basis.shells.iter().zip(&basis.offsets) {
        let key = (s.atom, s.l, s.pure);
        if let (Some(k), Some(g)) = (last, out.last_mut()) {
            if k == key && g.0.exps == s.exponents {
                g.0.coefs.push(s.coefficients.clone());
                g.3 += s.nfunc();
                continue;
            }
        }
        out.push((
            RawGroup {
                l: s.l,
                center: s.center,
                exps: s.exponents.clone(),
                coefs: vec![s.coefficients.clone()],
            },
            s.pure,
            off,
            s.nfunc(),
        ));
        last = Some(key);
    }
    out
}

impl ShellPairs {
    /// Pair data and Schwarz factors of a basis (parallel over pairs).
    pub fn new(basis: &BasisSet) -> ShellPairs {
        let groups = group_shells(basis);
        let ng = groups.len();
        let idx: Vec<(usize, usize)> = (0..ng).flat_map(|i| (0..=i).map(move |j| (i, j))).collect();
        let group_info: Vec<(usize, bool, usize)> = groups
            .iter()
            .map(|g| (g.0.l, g.1, g.0.coefs.len()))
            .collect();
        let group_ao: Vec<(usize, usize)> = groups.iter().map(|g| (g.2, g.3)).collect();
        let pairs: Vec<ShellPairData> = idx
            .par_iter()
            .map(|&(i, j)| ShellPairData::from_groups(&groups[i].0, &groups[j].0))
            .collect();
        let schwarz = schwarz_factors(&pairs, &idx, &group_info, &group_ao);
        ShellPairs {
            pairs,
            schwarz,
            group_info,
            group_ao,
            nbf: basis.nbf,
        }
    }

    /// Number of shell groups.
    pub fn ngroups(&self) -> usize {
        self.group_info.len()
    }

    /// The transformed block of group quartet (i j|k l), i ≥ j, k ≥ l, into
    /// `w.out` with layout `[a][b][c][d]` over the groups' functions.
    pub fn quartet(&self, i: usize, j: usize, k: usize, l: usize, w: &mut EriWork) {
        raw_quartet(
            &self.pairs[pair_index(i, j)],
            &self.pairs[pair_index(k, l)],
            w,
        );
        transform_quartet(
            [
                self.group_info[i],
                self.group_info[j],
                self.group_info[k],
                self.group_info[l],
            ],
            w,
        );
    }
}

fn schwarz_factors(
    pairs: &[ShellPairData],
    idx: &[(usize, usize)],
    info: &[(usize, bool, usize)],
    ao: &[(usize, usize)],
) -> Vec<f64> {
    idx.par_iter()
        .enumerate()
        .map_init(EriWork::new, |w, (k, &(i, j))| {
            let pd = &pairs[k];
            raw_quartet(pd, pd, w);
            transform_quartet([info[i], info[j], info[i], info[j]], w);
            let (ni, nj) = (ao[i].1, ao[j].1);
            let mut m: f64 = 0.0;
            for a in 0..ni {
                for b in 0..nj {
                    let ab = a * nj + b;
                    m = m.max(w.out[ab * ni * nj + ab].abs());
                }
            }
            m.sqrt()
        })
        .collect()
}

/// Single-shell pairs (k ≥ l) and their Schwarz factors (derivative code).
fn single_shell_pairs(basis: &BasisSet, raws: &[RawShell]) -> (Vec<ShellPairData>, Vec<f64>) {
    let ns = raws.len();
    let idx: Vec<(usize, usize)> = (0..ns).flat_map(|i| (0..=i).map(move |j| (i, j))).collect();
    let info: Vec<(usize, bool, usize)> = basis.shells.iter().map(|s| (s.l, s.pure, 1)).collect();
    let ao: Vec<(usize, usize)> = basis
        .shells
        .iter()
        .zip(&basis.offsets)
        .map(|(s, &o)| (o, s.nfunc()))
        .collect();
    let pairs: Vec<ShellPairData> = idx
        .par_iter()
        .map(|&(i, j)| ShellPairData::new(&raws[i], &raws[j]))
        .collect();
    let q = schwarz_factors(&pairs, &idx, &info, &ao);
    (pairs, q)
}

#[inline]
fn pair_index(i: usize, j: usize) -> usize {
    if i >= j {
        i * (i + 1) / 2 + j
    } else {
        j * (j + 1) / 2 + i
    }
}

/// Packed index of a function quartet (any index order).
#[inline]
pub fn packed_index(i: usize, j: usize, k: usize, l: usize) -> usize {
    let ij = pair_index(i, j);
    let kl = pair_index(k, l);
    pair_index(ij, kl)
}

/// All unique ERIs of a basis in a packed 8-fold store:
/// element (ij|kl) at pidx(pidx(i,j), pidx(k,l)), pidx(a,b) = a(a+1)/2 + b for a ≥ b.
pub struct EriStore {
    /// Number of basis functions.
    pub nbf: usize,
    /// The packed values.
    pub values: Vec<f64>,
    /// Shell quartets computed and skipped by Schwarz screening.
    pub quartets: (usize, usize),
}

/// A raw pointer into the packed store for disjoint parallel writes.
#[derive(Clone, Copy)]
struct SharedSlice(*mut f64, usize);
unsafe impl Send for SharedSlice {}
unsafe impl Sync for SharedSlice {}
impl SharedSlice {
    /// # Safety
    /// No other thread may write or read element `i` concurrently.
    #[inline]
    unsafe fn write(self, i: usize, v: f64) {
        assert!(i < self.1);
        *self.0.add(i) = v;
    }
}

/// Canonical shell quartets (i≥j, k≥l, ij≥kl) of one bra pair that survive screening.
fn for_each_quartet(
    sp: &ShellPairs,
    i: usize,
    j: usize,
    threshold: f64,
    mut f: impl FnMut(usize, usize) -> bool,
) -> (usize, usize) {
    let qij = sp.schwarz[pair_index(i, j)];
    let ij = pair_index(i, j);
    let (mut done, mut skipped) = (0, 0);
    for k in 0..=i {
        for l in 0..=k {
            if pair_index(k, l) > ij {
                break;
            }
            if qij * sp.schwarz[pair_index(k, l)] < threshold {
                skipped += 1;
                continue;
            }
            if f(k, l) {
                done += 1;
            } else {
                skipped += 1;
            }
        }
    }
    (done, skipped)
}

fn bra_pairs(ns: usize) -> Vec<(usize, usize)> {
    (0..ns).flat_map(|i| (0..=i).map(move |j| (i, j))).collect()
}

impl EriStore {
    /// Bytes a store for `nbf` functions needs.
    pub fn bytes_needed(nbf: usize) -> usize {
        let npair = nbf * (nbf + 1) / 2;
        npair * (npair + 1) / 2 * std::mem::size_of::<f64>()
    }

    /// Compute all unique ERIs (Schwarz-screened below `threshold`).
    pub fn new(sp: &ShellPairs, threshold: f64) -> EriStore {
        let n = sp.nbf;
        let npair = n * (n + 1) / 2;
        let len = npair * (npair + 1) / 2;
        let bras = bra_pairs(sp.ngroups());
        let mut values = vec![0.0; len];
        let out = SharedSlice(values.as_mut_ptr(), len);
        let counts: Vec<(usize, usize)> = bras
            .par_iter()
            .map_init(EriWork::new, |w, &(i, j)| {
                for_each_quartet(sp, i, j, threshold, |k, l| {
                    sp.quartet(i, j, k, l, w);
                    let (oi, ni) = sp.group_ao[i];
                    let (oj, nj) = sp.group_ao[j];
                    let (ok, nk) = sp.group_ao[k];
                    let (ol, nl) = sp.group_ao[l];
                    let mut x = 0;
                    for a in 0..ni {
                        for b in 0..nj {
                            for c in 0..nk {
                                for d in 0..nl {
                                    // SAFETY: a canonical function quartet lies in exactly one
                                    // canonical group quartet, and each group quartet is handled
                                    // by one task; so no two tasks write the same element. Within
                                    // the block, mirror images write the same value.
                                    unsafe {
                                        out.write(
                                            packed_index(oi + a, oj + b, ok + c, ol + d),
                                            w.out[x],
                                        )
                                    };
                                    x += 1;
                                }
                            }
                        }
                    }
                    true
                })
            })
            .collect();
        let quartets = counts
            .iter()
            .fold((0, 0), |acc, c| (acc.0 + c.0, acc.1 + c.1));
        EriStore {
            nbf: n,
            values,
            quartets,
        }
    }

    /// (ij|kl) for any index order.
    pub fn get(&self, i: usize, j: usize, k: usize, l: usize) -> f64 {
        self.values[packed_index(i, j, k, l)]
    }

    /// J and K for each density (row-major flat n×n in and out).
    fn jk_flat(&self, dens: &[Vec<f64>], want_k: bool) -> JkParts {
        let n = self.nbf;
        let npair = n * (n + 1) / 2;
        let nd = dens.len();
        // Fixed partition of the bra pairs into chunks of similar work
        // (pair ij carries ij+1 integrals) so the sum order does not depend on
        // the number of threads.
        let nchunks = 32.min(npair.max(1));
        let total = self.values.len();
        let mut bounds = vec![0usize];
        let mut acc = 0usize;
        for ij in 0..npair {
            acc += ij + 1;
            if acc * nchunks >= total * bounds.len() && bounds.len() < nchunks {
                bounds.push(ij + 1);
            }
        }
        if *bounds.last().unwrap() != npair {
            bounds.push(npair);
        }
        let pairs_of: Vec<(usize, usize)> =
            (0..n).flat_map(|i| (0..=i).map(move |j| (i, j))).collect();
        let parts: Vec<JkParts> = bounds
            .windows(2)
            .collect::<Vec<_>>()
            .par_iter()
            .map(|w| {
                let mut j = vec![vec![0.0; n * n]; nd];
                let mut k = vec![vec![0.0; n * n]; if want_k { nd } else { 0 }];
                for ij in w[0]..w[1] {
                    let (i, jj) = pairs_of[ij];
                    let base = ij * (ij + 1) / 2;
                    for kl in 0..=ij {
                        let v0 = self.values[base + kl];
                        if v0 == 0.0 {
                            continue;
                        }
                        let (kk, l) = pairs_of[kl];
                        let f = v0 * degeneracy(i == jj, kk == l, ij == kl);
                        scatter_densities(n, [i, jj, kk, l], f, dens, &mut j, &mut k, want_k);
                    }
                }
                (j, k)
            })
            .collect();
        sum_parts(parts, n, nd, want_k)
    }
}

/// Per-density J and K matrices (row-major flat), one partial sum.
type JkParts = (Vec<Vec<f64>>, Vec<Vec<f64>>);

fn sum_parts(parts: Vec<JkParts>, n: usize, nd: usize, want_k: bool) -> JkParts {
    let mut j = vec![vec![0.0; n * n]; nd];
    let mut k = vec![vec![0.0; n * n]; if want_k { nd } else { 0 }];
    for (pj, pk) in parts {
        for m in 0..nd {
            for (x, y) in j[m].iter_mut().zip(&pj[m]) {
                *x += y;
            }
            if want_k {
                for (x, y) in k[m].iter_mut().zip(&pk[m]) {
                    *x += y;
                }
            }
        }
    }
    (j, k)
}

/// Add the 8 permutations of a canonical integral (scaled by its degeneracy
/// factor f) to J and K of one density (row-major n×n).
/// Weight of one unique integral in the 8-fold sum: ½ for each of the
/// coincidences i = j, k = l and (ij) = (kl), which make mirror images of
/// the same integral.
#[inline(always)]
fn degeneracy(same_ij: bool, same_kl: bool, same_pairs: bool) -> f64 {
    let half = |b: bool| if b { 0.5 } else { 1.0 };
    half(same_ij) * half(same_kl) * half(same_pairs)
}

/// [`scatter`] one weighted integral into J (and K) of every density.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn scatter_densities(n: usize, [i, j, k, l]: [usize; 4], f: f64, dens: &[Vec<f64>], jm: &mut [Vec<f64>], km: &mut [Vec<f64>], want_k: bool) {
    for m in 0..dens.len() {
        scatter(n, i, j, k, l, f, &dens[m], &mut jm[m], if want_k { Some(&mut km[m]) } else { None });
    }
}

#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn scatter(
    n: usize,
    i: usize,
    j: usize,
    k: usize,
    l: usize,
    f: f64,
    d: &[f64],
    jm: &mut [f64],
    km: Option<&mut [f64]>,
) {
    // (ij|kl) (ji|kl) (ij|lk) (ji|lk) (kl|ij) (lk|ij) (kl|ji) (lk|ji)
    let dkl = d[k * n + l] + d[l * n + k];
    let dij = d[i * n + j] + d[j * n + i];
    jm[i * n + j] += f * dkl;
    jm[j * n + i] += f * dkl;
    jm[k * n + l] += f * dij;
    jm[l * n + k] += f * dij;
    if let Some(km) = km {
        // K_pr += (pq|rs) D_qs for each permutation (p q r s).
        km[i * n + k] += f * d[j * n + l];
        km[j * n + k] += f * d[i * n + l];
        km[i * n + l] += f * d[j * n + k];
        km[j * n + l] += f * d[i * n + k];
        km[k * n + i] += f * d[l * n + j];
        km[l * n + i] += f * d[k * n + j];
        km[k * n + j] += f * d[l * n + i];
        km[l * n + j] += f * d[k * n + i];
    }
}

/// Options of the J/K builds.
#[derive(Clone, Debug)]
pub struct JkOptions {
    /// Schwarz threshold: quartets with Q_ab Q_cd (× max density in the
    /// direct build) below it are skipped. Default 1e−12.
    pub threshold: f64,
    /// In-core (packed store) when the store needs at most this many bytes,
    /// direct otherwise. Default 512 MiB (about 150 basis functions); several
    /// trajectories may run side by side, so keep it modest.
    pub max_in_core_bytes: usize,
    /// Build K as well as J. Default true.
    pub exchange: bool,
}

impl Default for JkOptions {
    fn default() -> Self {
        JkOptions {
            threshold: 1e-12,
            max_in_core_bytes: 512 << 20,
            exchange: true,
        }
    }
}

/// J and K for each density, and how they were made.
#[derive(Clone, Debug)]
pub struct JkResult {
    /// Coulomb matrices, one per density.
    pub j: Vec<DMatrix<f64>>,
    /// Exchange matrices, one per density (empty if not asked for).
    pub k: Vec<DMatrix<f64>>,
    /// Whether the packed in-core store was used.
    pub in_core: bool,
    /// Shell quartets computed and skipped.
    pub quartets: (usize, usize),
}

fn to_flat(d: &DMatrix<f64>) -> Vec<f64> {
    let n = d.nrows();
    let mut v = vec![0.0; n * n];
    for r in 0..n {
        for c in 0..n {
            v[r * n + c] = d[(r, c)];
        }
    }
    v
}

fn check_densities(
    nbf: usize,
    densities: &[DMatrix<f64>],
) -> Result<Vec<Vec<f64>>, TwoElectronError> {
    densities
        .iter()
        .enumerate()
        .map(|(index, d)| {
            if d.nrows() != nbf || d.ncols() != nbf {
                Err(TwoElectronError::DensityShape {
                    index,
                    rows: d.nrows(),
                    cols: d.ncols(),
                    nbf,
                })
            } else {
                Ok(to_flat(d))
            }
        })
        .collect()
}

/// J (and K) for several densities: in-core if the packed store fits in
/// `opts.max_in_core_bytes`, else direct. For repeated builds keep a
/// [`ShellPairs`] and an [`EriStore`] and call [`coulomb_exchange_in_core`]
/// or [`coulomb_exchange_direct`].
pub fn coulomb_exchange(
    basis: &BasisSet,
    densities: &[DMatrix<f64>],
    opts: &JkOptions,
) -> Result<JkResult, TwoElectronError> {
    check_densities(basis.nbf, densities)?;
    let sp = ShellPairs::new(basis);
    if EriStore::bytes_needed(basis.nbf) <= opts.max_in_core_bytes {
        let store = EriStore::new(&sp, opts.threshold);
        coulomb_exchange_in_core(&store, densities, opts.exchange)
    } else {
        coulomb_exchange_direct(&sp, densities, opts)
    }
}

/// J (and K) from a packed store.
pub fn coulomb_exchange_in_core(
    store: &EriStore,
    densities: &[DMatrix<f64>],
    exchange: bool,
) -> Result<JkResult, TwoElectronError> {
    let dens = check_densities(store.nbf, densities)?;
    let n = store.nbf;
    let (j, k) = store.jk_flat(&dens, exchange);
    Ok(JkResult {
        j: j.iter().map(|v| DMatrix::from_row_slice(n, n, v)).collect(),
        k: k.iter().map(|v| DMatrix::from_row_slice(n, n, v)).collect(),
        in_core: true,
        quartets: store.quartets,
    })
}

/// J (and K) by recomputing the integrals (integral-direct), with Schwarz and
/// density screening, parallel over bra shell pairs in a fixed partition (the
/// summation order does not depend on the number of threads).
pub fn coulomb_exchange_direct(
    sp: &ShellPairs,
    densities: &[DMatrix<f64>],
    opts: &JkOptions,
) -> Result<JkResult, TwoElectronError> {
    let n = sp.nbf;
    let dens = check_densities(n, densities)?;
    let nd = dens.len();
    let ns = sp.ngroups();
    // Largest density element per shell block, over all densities.
    let mut dmax = vec![0.0f64; ns * ns];
    for a in 0..ns {
        for b in 0..ns {
            let (oa, na) = sp.group_ao[a];
            let (ob, nb) = sp.group_ao[b];
            let mut m: f64 = 0.0;
            for d in &dens {
                for x in oa..oa + na {
                    for y in ob..ob + nb {
                        m = m.max(d[x * n + y].abs()).max(d[y * n + x].abs());
                    }
                }
            }
            dmax[a * ns + b] = m;
        }
    }
    let bras = bra_pairs(ns);
    let nchunks = 32.min(bras.len().max(1));
    let chunk = bras.len().div_ceil(nchunks);
    let want_k = opts.exchange;
    let parts: Vec<(JkParts, (usize, usize))> = bras
        .chunks(chunk.max(1))
        .collect::<Vec<_>>()
        .par_iter()
        .map(|list| {
            let mut w = EriWork::new();
            let mut jm = vec![vec![0.0; n * n]; nd];
            let mut km = vec![vec![0.0; n * n]; if want_k { nd } else { 0 }];
            let mut counts = (0, 0);
            for &(i, j) in list.iter() {
                let c = for_each_quartet(sp, i, j, 0.0, |k, l| {
                    let q = sp.schwarz[pair_index(i, j)] * sp.schwarz[pair_index(k, l)];
                    let mut dm = dmax[i * ns + j].max(dmax[k * ns + l]);
                    if want_k {
                        dm = dm
                            .max(dmax[i * ns + k])
                            .max(dmax[i * ns + l])
                            .max(dmax[j * ns + k])
                            .max(dmax[j * ns + l]);
                    }
                    if q * dm < opts.threshold {
                        return false;
                    }
                    sp.quartet(i, j, k, l, &mut w);
                    let (oi, ni) = sp.group_ao[i];
                    let (oj, nj) = sp.group_ao[j];
                    let (ok, nk) = sp.group_ao[k];
                    let (ol, nl) = sp.group_ao[l];
                    let mut x = 0;
                    for a in 0..ni {
                        for b in 0..nj {
                            for c in 0..nk {
                                for d in 0..nl {
                                    let (ga, gb, gc, gd) = (oi + a, oj + b, ok + c, ol + d);
                                    let v = w.out[x];
                                    x += 1;
                                    if ga < gb || gc < gd {
                                        continue;
                                    }
                                    // Within one shell quartet each unordered function
                                    // quartet appears once, except for the mirror images
                                    // that i = j, k = l or (ij) = (kl) produce.
                                    let (pab, pcd) = (pair_index(ga, gb), pair_index(gc, gd));
                                    if i == k && j == l && pab < pcd {
                                        continue;
                                    }
                                    let f = v * degeneracy(ga == gb, gc == gd, pab == pcd);                                    scatter_densities(n, [ga, gb, gc, gd], f, &dens, &mut jm, &mut km, want_k);
                                }
                            }
                        }
                    }
                    true
                });
                counts.0 += c.0;
                counts.1 += c.1;
            }
            ((jm, km), counts)
        })
        .collect();
    let mut quartets = (0, 0);
    let mut jk_parts = Vec::with_capacity(parts.len());
    for (p, c) in parts {
        quartets.0 += c.0;
        quartets.1 += c.1;
        jk_parts.push(p);
    }
    let (j, k) = sum_parts(jk_parts, n, nd, want_k);
    Ok(JkResult {
        j: j.iter().map(|v| DMatrix::from_row_slice(n, n, v)).collect(),
        k: k.iter().map(|v| DMatrix::from_row_slice(n, n, v)).collect(),
        in_core: false,
        quartets,
    })
}

/// All n⁴ ERIs, row-major `[i][j][k][l]` (small bases only: tests, debugging).
pub fn eri_tensor(basis: &BasisSet) -> Vec<f64> {
    let sp = ShellPairs::new(basis);
    let store = EriStore::new(&sp, 0.0);
    let n = basis.nbf;
    let mut t = vec![0.0; n * n * n * n];
    for i in 0..n {
        for j in 0..n {
            for k in 0..n {
                for l in 0..n {
                    t[((i * n + j) * n + k) * n + l] = store.get(i, j, k, l);
                }
            }
        }
    }
    t
}

/// Derived shell pairs for derivatives: (a↑ b), (a↓ b) for every ordered pair.
struct DerivPairs {
    up: Vec<ShellPairData>,
    down: Vec<Option<ShellPairData>>,
}

fn deriv_pairs(raws: &[RawShell]) -> DerivPairs {
    let ns = raws.len();
    let idx: Vec<(usize, usize)> = (0..ns).flat_map(|i| (0..ns).map(move |j| (i, j))).collect();
    let up = idx
        .par_iter()
        .map(|&(i, j)| ShellPairData::new(&raws[i].raised(), &raws[j]))
        .collect();
    let down = idx
        .par_iter()
        .map(|&(i, j)| raws[i].lowered().map(|s| ShellPairData::new(&s, &raws[j])))
        .collect();
    DerivPairs { up, down }
}

/// Raw bra-derivative quartet (∂a/∂A_d b|cd) for d = x,y,z into `out[d]`
/// (Cartesian, `[a][b][c][d]`) from the raised/lowered bra pairs.
#[allow(clippy::too_many_arguments)]
fn raw_bra_derivative_quartet(
    la: usize,
    lb: usize,
    up: &ShellPairData,
    down: Option<&ShellPairData>,
    ket: &ShellPairData,
    w: &mut EriWork,
    buf_up: &mut Vec<f64>,
    out: &mut [Vec<f64>; 3],
) {
    use super::cart::component_index;
    raw_quartet(up, ket, w);
    std::mem::swap(buf_up, &mut w.raw);
    let has_down = down.is_some();
    if let Some(dn) = down {
        raw_quartet(dn, ket, w);
    }
    let ca = components_table(la);
    let ncb = components_table(lb).len();
    let ncd = ket.nab;
    for (d, o) in out.iter_mut().enumerate() {
        o.clear();
        o.resize(ca.len() * ncb * ncd, 0.0);
        for (ia, xa) in ca.iter().enumerate() {
            let mut xu = *xa;
            xu[d] += 1;
            let iu = component_index(xu);
            let lower = if xa[d] > 0 && has_down {
                let mut xd = *xa;
                xd[d] -= 1;
                Some((component_index(xd), xa[d] as f64))
            } else {
                None
            };
            for b in 0..ncb {
                for cd in 0..ncd {
                    let mut v = buf_up[(iu * ncb + b) * ncd + cd];
                    if let Some((idn, f)) = lower {
                        v -= f * w.raw[(idn * ncb + b) * ncd + cd];
                    }
                    o[(ia * ncb + b) * ncd + cd] = v;
                }
            }
        }
    }
}

/// (∂a/∂A_d b|cd) for all AO quadruples and d = x, y, z, each row-major
/// `[a][b][c][d]` (derivative with respect to the centre of the first
/// function). n⁴ memory: for small bases (tests, reference).
pub fn eri_bra_derivative_tensor(basis: &BasisSet) -> [Vec<f64>; 3] {
    let raws: Vec<RawShell> = basis.shells.iter().map(RawShell::from_shell).collect();
    let ns = raws.len();
    let n = basis.nbf;
    let dp = deriv_pairs(&raws);
    let kets: Vec<ShellPairData> = (0..ns)
        .flat_map(|k| (0..ns).map(move |l| (k, l)))
        .collect::<Vec<_>>()
        .par_iter()
        .map(|&(k, l)| ShellPairData::new(&raws[k], &raws[l]))
        .collect();
    let mut out = [
        vec![0.0; n * n * n * n],
        vec![0.0; n * n * n * n],
        vec![0.0; n * n * n * n],
    ];
    let mut w = EriWork::new();
    let mut buf = Vec::new();
    let mut raw3 = [Vec::new(), Vec::new(), Vec::new()];
    for i in 0..ns {
        for j in 0..ns {
            for k in 0..ns {
                for l in 0..ns {
                    let ket = &kets[k * ns + l];
                    raw_bra_derivative_quartet(
                        raws[i].l,
                        raws[j].l,
                        &dp.up[i * ns + j],
                        dp.down[i * ns + j].as_ref(),
                        ket,
                        &mut w,
                        &mut buf,
                        &mut raw3,
                    );
                    let info = [
                        (basis.shells[i].l, basis.shells[i].pure, 1),
                        (basis.shells[j].l, basis.shells[j].pure, 1),
                        (basis.shells[k].l, basis.shells[k].pure, 1),
                        (basis.shells[l].l, basis.shells[l].pure, 1),
                    ];
                    let offs = [
                        basis.offsets[i],
                        basis.offsets[j],
                        basis.offsets[k],
                        basis.offsets[l],
                    ];
                    let nf = [
                        basis.shells[i].nfunc(),
                        basis.shells[j].nfunc(),
                        basis.shells[k].nfunc(),
                        basis.shells[l].nfunc(),
                    ];
                    for d in 0..3 {
                        std::mem::swap(&mut w.raw, &mut raw3[d]);
                        transform_quartet(info, &mut w);
                        std::mem::swap(&mut w.raw, &mut raw3[d]);
                        let mut x = 0;
                        for a in 0..nf[0] {
                            for b in 0..nf[1] {
                                for c in 0..nf[2] {
                                    for e in 0..nf[3] {
                                        let (ga, gb, gc, ge) =
                                            (offs[0] + a, offs[1] + b, offs[2] + c, offs[3] + e);
                                        out[d][((ga * n + gb) * n + gc) * n + ge] = w.out[x];
                                        x += 1;
                                    }
                                }
                            }
                        }
                    }
                }
            }
        }
    }
    out
}

/// Nuclear gradient of the two-electron energy
///   E₂ = ½ Σ_abcd (ab|cd) [c_J D_ab D_cd − c_K Σ_m D^m_ac D^m_bd],  D = Σ_m D^m,
/// for fixed symmetric AO densities D^m (restricted: one density, c_J = 1,
/// c_K = ½; unrestricted: D^α and D^β, c_J = 1, c_K = 1; hybrids scale c_K).
/// Returns dE₂/dR per atom (hartree/bohr).
///
/// With Γ symmetrised over the 8 index permutations, every centre derivative
/// is a first-function derivative of some ordering, so
///   dE₂/dR_K = 2 Σ_{a on K} Σ_bcd (∂a/∂A b|cd) Γ_abcd,
/// evaluated from the raised/lowered bra shells (no translational-invariance
/// shortcut). Parallel over the first shell; the per-atom sums are reduced in
/// a fixed order.
pub fn jk_gradient(
    basis: &BasisSet,
    densities: &[DMatrix<f64>],
    c_j: f64,
    c_k: f64,
) -> Result<Vec<[f64; 3]>, TwoElectronError> {
    let n = basis.nbf;
    let dens = check_densities(n, densities)?;
    let mut dt = vec![0.0; n * n];
    for d in &dens {
        for (x, y) in dt.iter_mut().zip(d) {
            *x += y;
        }
    }
    let raws: Vec<RawShell> = basis.shells.iter().map(RawShell::from_shell).collect();
    let ns = raws.len();
    let dp = deriv_pairs(&raws);
    let (kets, schwarz_kl) = single_shell_pairs(basis, &raws);
    // bra Schwarz bound from the undifferentiated pair (screening only)
    let ao: Vec<(usize, usize)> = basis
        .shells
        .iter()
        .zip(&basis.offsets)
        .map(|(s, &o)| (o, s.nfunc()))
        .collect();
    // dE/dA (A = centre of the first function): by the permutational symmetry
    // every centre's derivative is a first-function derivative of some ordering,
    // so dE₂/dR_K = 4 · ½ Σ_{a on K} Σ_bcd (∂_A a b|cd) Γ_abcd with Γ symmetric.
    let atoms: Vec<usize> = basis.shells.iter().map(|s| s.atom).collect();
    let per_i: Vec<[f64; 3]> = (0..ns)
        .into_par_iter()
        .map(|i| {
            let mut g = [0.0; 3];
            let mut w = EriWork::new();
            let mut buf = Vec::new();
            let mut raw3 = [Vec::new(), Vec::new(), Vec::new()];
            for j in 0..ns {
                for k in 0..ns {
                    for l in 0..=k {
                        if schwarz_kl[pair_index(k, l)] * schwarz_kl[pair_index(i, j)] < 1e-14 {
                            continue;
                        }
                        let ket = &kets[pair_index(k, l)];
                        // The stored pair (k,l) has k ≥ l: its data are for (k l).
                        raw_bra_derivative_quartet(
                            raws[i].l,
                            raws[j].l,
                            &dp.up[i * ns + j],
                            dp.down[i * ns + j].as_ref(),
                            ket,
                            &mut w,
                            &mut buf,
                            &mut raw3,
                        );
                        let info = [
                            (basis.shells[i].l, basis.shells[i].pure, 1),
                            (basis.shells[j].l, basis.shells[j].pure, 1),
                            (basis.shells[k].l, basis.shells[k].pure, 1),
                            (basis.shells[l].l, basis.shells[l].pure, 1),
                        ];
                        let (oi, ni) = ao[i];
                        let (oj, nj) = ao[j];
                        let (ok, nk) = ao[k];
                        let (ol, nl) = ao[l];
                        let kl_factor = if k == l { 1.0 } else { 2.0 };
                        for (d, gd) in g.iter_mut().enumerate() {
                            std::mem::swap(&mut w.raw, &mut raw3[d]);
                            transform_quartet(info, &mut w);
                            std::mem::swap(&mut w.raw, &mut raw3[d]);
                            let mut x = 0;
                            let mut s = 0.0;
                            for a in oi..oi + ni {
                                for b in oj..oj + nj {
                                    for c in ok..ok + nk {
                                        for e in ol..ol + nl {
                                            let v = w.out[x];
                                            x += 1;
                                            let mut gam = c_j * dt[a * n + b] * dt[c * n + e];
                                            // exchange part symmetrised over c ↔ e (the kl pair is folded)
                                            let mut kx = 0.0;
                                            for dm in &dens {
                                                kx += 0.5
                                                    * (dm[a * n + c] * dm[b * n + e]
                                                        + dm[a * n + e] * dm[b * n + c]);
                                            }
                                            gam -= c_k * kx;
                                            s += v * gam;
                                        }
                                    }
                                }
                            }
                            *gd += 2.0 * kl_factor * s;
                        }
                    }
                }
            }
            g
        })
        .collect();
    let mut grad = vec![[0.0; 3]; basis.natoms()];
    for (i, g) in per_i.iter().enumerate() {
        for d in 0..3 {
            grad[atoms[i]][d] += g[d];
        }
    }
    Ok(grad)
}
