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
//! Speed (see `benches/integrals.rs`):
//! * only the structurally non-zero E coefficients are stored and used
//!   ([`EPattern`]); R is evaluated at Q − P so the ket parity sign moves to
//!   the bra side, and by a precomputed in-place recursion program
//!   (`hermite.rs`), written out for total order ≤ 2;
//! * primitive pairs carry a Schwarz-type bound and are sorted by it, so the
//!   primitive loops stop at the first quartet below [`PRIM_THRESHOLD`];
//! * each quartet is evaluated with the pair that makes the cheaper inner
//!   loops as the bra ([`raw_quartet_any`]);
//! * the direct J/K build visits shell pairs in order of their Schwarz factor
//!   and stops the ket loop at the first pair below the threshold (with the
//!   largest density element); the bra pairs are split into a fixed number of
//!   chunks of similar estimated cost (the summation order does not depend on
//!   the number of threads); each shell-quartet block is added to J and K by
//!   dense block loops into half-matrices (`scatter_block`);
//! * the in-core J is a packed symmetric matrix–vector product.
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
    /// Per primitive pair the structurally non-zero E coefficients in the
    /// order of [`EPattern`] (component pair major).
    pub es: Vec<f64>,
    /// Per primitive pair a Schwarz-type bound √max|(ab|ab)| of its
    /// contribution (coefficients included); primitive pairs are sorted by it,
    /// largest first, so the quartet loops can stop early.
    pub qprim: Vec<f64>,
}

/// Primitive quartets whose Schwarz bound (product of the two pairs'
/// `qprim`) is below this are skipped. It is far below the shell-quartet
/// threshold of the J/K builds (default 1e−12); a skipped primitive quartet
/// changes an integral by at most this much (common practice: primitive
/// screening well below the shell-level threshold).
pub const PRIM_THRESHOLD: f64 = 1e-15;

/// Structural non-zero pattern of E^{ab}_{tuv} for a pair class (la, lb):
/// for each component pair ab (row major `[ca][cb]`) the Hermite indices
/// (into [`hermite_table`] of la+lb) with t ≤ a_x+b_x, u ≤ a_y+b_y,
/// v ≤ a_z+b_z; all other E vanish identically.
pub struct EPattern {
    /// `start[ab]..start[ab+1]` is the range of component pair ab.
    pub start: Vec<usize>,
    /// Hermite index of each entry.
    pub herm: Vec<usize>,
    /// Component pair ab of each entry.
    pub comp: Vec<usize>,
}

/// [`EPattern`] of (la, lb), la, lb ≤ MAX_L + 1.
pub fn e_pattern(la: usize, lb: usize) -> &'static EPattern {
    const N: usize = crate::electronic::qc::basis::MAX_L + 2;
    static T: OnceLock<Vec<EPattern>> = OnceLock::new();
    &T.get_or_init(|| {
        (0..N * N)
            .map(|x| {
                let (la, lb) = (x / N, x % N);
                let herm = hermite_table(la + lb);
                let mut start = vec![0];
                let mut hs = Vec::new();
                let mut comp = Vec::new();
                for ca in components_table(la) {
                    for cb in components_table(lb) {
                        for (h, tuv) in herm.iter().enumerate() {
                            if tuv[0] <= ca[0] + cb[0]
                                && tuv[1] <= ca[1] + cb[1]
                                && tuv[2] <= ca[2] + cb[2]
                            {
                                hs.push(h);
                                comp.push(start.len() - 1);
                            }
                        }
                        start.push(hs.len());
                    }
                }
                EPattern {
                    start,
                    herm: hs,
                    comp,
                }
            })
            .collect()
    })[la * N + lb]
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
        let list = significant_primitive_pairs(a, b);
        let mut pd = ShellPairData::unsorted(a, b, &list);
        pd.sort_primitives();
        pd
    }

    /// The pair data for the given primitive pairs (index into the exponents
    /// of a and b), in that order, with `qprim` unset (∞).
    fn unsorted(a: &RawGroup, b: &RawGroup, list: &[(usize, usize)]) -> ShellPairData {
        let ca = components_table(a.l);
        let cb = components_table(b.l);
        let nab = ca.len() * cb.len();
        let lab = a.l + b.l;
        let herm = hermite_table(lab);
        let nherm = herm.len();
        let (ga, gb) = (a.coefs.len(), b.coefs.len());
        let r2 = distance2(a.center, b.center);
        let mut prims = Vec::with_capacity(list.len());
        let mut e = Vec::new();
        let mut kv = Vec::new();
        let (mut ex, mut ey, mut ez) = (E1d::new(), E1d::new(), E1d::new());
        for &(pa, pb) in list {
            let (ea, eb) = (a.exps[pa], b.exps[pb]);
            let p = ea + eb;
            let g = (-ea * eb / p * r2).exp();
            kv.extend(
                (0..ga)
                    .flat_map(|x| (0..gb).map(move |y| (x, y)))
                    .map(|(x, y)| a.coefs[x][pa] * b.coefs[y][pb] * g),
            );
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
            prims.push(PrimPair { p, center: pc });
        }
        let pat = e_pattern(a.l, b.l);
        let nnz = pat.herm.len();
        let mut es = Vec::with_capacity(prims.len() * nnz);
        for ip in 0..prims.len() {
            let blk = &e[ip * nherm * nab..(ip + 1) * nherm * nab];
            for ab in 0..nab {
                for &h in &pat.herm[pat.start[ab]..pat.start[ab + 1]] {
                    es.push(blk[h * nab + ab]);
                }
            }
        }
        ShellPairData {
            la: a.l,
            lb: b.l,
            nctr: (ga, gb),
            nab,
            nherm,
            qprim: vec![f64::INFINITY; prims.len()],
            prims,
            e,
            k: kv,
            es,
        }
    }

    /// Fill `qprim` (√max|(ab|ab)| of each primitive pair with its largest
    /// coefficient product) and sort the primitive pairs by it, largest first.
    fn sort_primitives(&mut self) {
        let q = self.primitive_bounds();
        self.reorder(&q);
    }

    /// √max|(ab|ab)| of each primitive pair with its largest coefficient
    /// product, in the stored order.
    fn primitive_bounds(&self) -> Vec<f64> {
        thread_local! {
            static WORK: std::cell::RefCell<EriWork> = std::cell::RefCell::new(EriWork::new());
        }
        let np = self.prims.len();
        let (nh, nab) = (self.nherm, self.nab);
        let ng = self.nctr.0 * self.nctr.1;
        let nnz = e_pattern(self.la, self.lb).herm.len();
        WORK.with(|w| {
            let mut w = w.borrow_mut();
            (0..np)
                .map(|ip| {
                    let kmax = self.k[ip * ng..(ip + 1) * ng]
                        .iter()
                        .fold(0.0f64, |m, v| m.max(v.abs()));
                    let one = ShellPairData {
                        la: self.la,
                        lb: self.lb,
                        nctr: (1, 1),
                        nab,
                        nherm: nh,
                        prims: vec![self.prims[ip]],
                        e: self.e[ip * nh * nab..(ip + 1) * nh * nab].to_vec(),
                        k: vec![kmax],
                        es: self.es[ip * nnz..(ip + 1) * nnz].to_vec(),
                        qprim: vec![f64::INFINITY],
                    };
                    raw_quartet(&one, &one, &mut w);
                    let mut m: f64 = 0.0;
                    for ab in 0..nab {
                        m = m.max(w.raw[ab * nab + ab].abs());
                    }
                    m.sqrt()
                })
                .collect()
        })
    }

    /// Sort the primitive pairs by the bounds `q` (largest first, ties in
    /// the stored order) and store the bounds as `qprim`.
    fn reorder(&mut self, q: &[f64]) {
        let np = self.prims.len();
        let (nh, nab) = (self.nherm, self.nab);
        let ng = self.nctr.0 * self.nctr.1;
        let nnz = e_pattern(self.la, self.lb).herm.len();
        let mut order: Vec<usize> = (0..np).collect();
        order.sort_by(|&x, &y| q[y].total_cmp(&q[x]).then(x.cmp(&y)));
        let perm = |v: &[f64], blk: usize| -> Vec<f64> {
            order
                .iter()
                .flat_map(|&i| v[i * blk..(i + 1) * blk].iter().copied())
                .collect()
        };
        self.e = perm(&self.e, nh * nab);
        self.k = perm(&self.k, ng);
        self.es = perm(&self.es, nnz);
        self.qprim = order.iter().map(|&i| q[i]).collect();
        self.prims = order.iter().map(|&i| self.prims[i]).collect();
    }

    /// Rows of the raw block: contractions × Cartesian components of a and b.
    pub fn nrows(&self) -> usize {
        self.nctr.0 * self.nctr.1 * self.nab
    }
}

fn distance2(a: [f64; 3], b: [f64; 3]) -> f64 {
    (a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)
}

/// Primitive pairs of (a b) whose overlap-size contribution reaches 1e−17
/// for some contraction pair, in exponent order.
fn significant_primitive_pairs(a: &RawGroup, b: &RawGroup) -> Vec<(usize, usize)> {
    let r2 = distance2(a.center, b.center);
    let mut list = Vec::new();
    for (pa, &ea) in a.exps.iter().enumerate() {
        for (pb, &eb) in b.exps.iter().enumerate() {
            let p = ea + eb;
            let g = (-ea * eb / p * r2).exp();
            let mut kmax = 0.0f64;
            for ca in &a.coefs {
                for cb in &b.coefs {
                    kmax = kmax.max((ca[pa] * cb[pb] * g).abs());
                }
            }
            if kmax * (PI / p).powf(1.5) >= 1e-17 {
                list.push((pa, pb));
            }
        }
    }
    list
}

/// Caller-owned workspace of the ERI kernel.
pub struct EriWork {
    r: RWork,
    w: Vec<f64>,
    v: Vec<f64>,
    raw: Vec<f64>,
    offs_ab: Vec<usize>,
    offs_cd: Vec<usize>,
    sign_ab: Vec<f64>,
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
            sign_ab: Vec::new(),
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
///
/// Per bra primitive pair, the ket primitive pairs are contracted with R
/// into `W[tuv][cd]` (only the structurally non-zero E^{cd}, [`EPattern`]),
/// then the bra E coefficients are applied. R is evaluated at Q − P, which
/// moves the ket parity sign (−1)^{τ+ν+φ} onto the bra Hermite index
/// (R_tuv(−X) = (−1)^{t+u+v} R_tuv(X)). Primitive quartets below
/// [`PRIM_THRESHOLD`] are skipped; both primitive lists are sorted by their
/// bound, so the loops stop at the first one that falls below it.
pub fn raw_quartet(bra: &ShellPairData, ket: &ShellPairData, w: &mut EriWork) {
    let mut raw = std::mem::take(&mut w.raw);
    raw_quartet_into(&[bra], ket, w, std::slice::from_mut(&mut raw));
    w.raw = raw;
}

/// [`raw_quartet`] for several bras that share their primitive pairs (same
/// exponents, centres, order and `qprim`; [`DerivPairSet`]) against one ket:
/// the ket contraction `W[tuv][cd]` is built once per bra primitive, for the
/// Hermite range of `bras[0]` (the largest la + lb; the Hermite tables of
/// smaller ranges are its prefixes), and applied to every bra. `outs[m]`
/// receives the raw block of `bras[m]`.
fn raw_quartet_into(
    bras: &[&ShellPairData],
    ket: &ShellPairData,
    w: &mut EriWork,
    outs: &mut [Vec<f64>],
) {
    debug_assert_eq!(bras.len(), outs.len());
    let bra = bras[0];
    debug_assert!(bras
        .iter()
        .all(|m| m.la + m.lb <= bra.la + bra.lb && m.prims.len() == bra.prims.len()));
    let lt = bra.la + bra.lb + ket.la + ket.lb;
    let d = lt + 1;
    let hab = hermite_table(bra.la + bra.lb);
    let hcd = hermite_table(ket.la + ket.lb);
    let pat_k = e_pattern(ket.la, ket.lb);
    w.offs_ab.clear();
    w.offs_ab
        .extend(hab.iter().map(|t| (t[0] * d + t[1]) * d + t[2]));
    w.sign_ab.clear();
    w.sign_ab.extend(hab.iter().map(|t| {
        if (t[0] + t[1] + t[2]) % 2 == 0 {
            1.0
        } else {
            -1.0
        }
    }));
    w.offs_cd.clear();
    w.offs_cd.extend(pat_k.herm.iter().map(|&h| {
        let t = hcd[h];
        (t[0] * d + t[1]) * d + t[2]
    }));
    let (ncc, ncd) = (
        components_table(ket.la).len(),
        components_table(ket.lb).len(),
    );
    let (gc, gd) = ket.nctr;
    let ncdc = ket.nab;
    let ncol = gc * ncc * gd * ncd; // extent of the combined ket index
    let nhab = bra.nherm;
    let nnz_k = pat_k.herm.len();
    let gcd = gc * gd;
    let ket_single = gcd == 1;
    // Internal layout while accumulating: W[tuv][g][cd] and raw[row][g][cd]
    // with g = (c1, d1) the ket contraction pair; permuted to
    // [row][c1 cc][d1 dd] at the end.
    for (m, out) in bras.iter().zip(outs.iter_mut()) {
        out.clear();
        out.resize(m.nrows() * ncol, 0.0);
    }
    w.w.resize(nhab * ncol, 0.0);
    let two_pi_52 = 2.0 * PI.powf(2.5);
    let qk_max = ket.qprim.first().copied().unwrap_or(0.0);
    let comp_k = &pat_k.comp;
    debug_assert!(
        w.offs_ab.iter().max().unwrap_or(&0) + w.offs_cd.iter().max().unwrap_or(&0) < d * d * d
    );
    if !ket_single {
        w.v.resize(ncdc * nhab, 0.0);
    }
    for (ip, pp) in bra.prims.iter().enumerate() {
        let qb = bra.qprim[ip];
        if qb * qk_max < PRIM_THRESHOLD {
            break;
        }
        w.w.fill(0.0);
        for (iq, qq) in ket.prims.iter().enumerate() {
            if qb * ket.qprim[iq] < PRIM_THRESHOLD {
                break;
            }
            let (p, q) = (pp.p, qq.p);
            let pq = p * q;
            // 1/√(p+q) once: α = pq/(p+q), prefactor 2π^{5/2}/(pq√(p+q))
            let rs = 1.0 / (p + q).sqrt();
            let alpha = pq * rs * rs;
            let qp = [
                qq.center[0] - pp.center[0],
                qq.center[1] - pp.center[1],
                qq.center[2] - pp.center[2],
            ];
            let mut pref = two_pi_52 * rs / pq;
            if ket_single {
                pref *= ket.k[iq];
            }
            if lt == 0 {
                // (ss|ss): one Hermite term, R_000 = pref F_0(α|PQ|²); W[g] += k_g R E.
                let mut f0 = [0.0];
                let x = alpha * (qp[0] * qp[0] + qp[1] * qp[1] + qp[2] * qp[2]);
                crate::electronic::qc::boys::boys(0, x, &mut f0);
                let v = pref * f0[0] * ket.es[iq];
                if ket_single {
                    w.w[0] += v;
                } else {
                    for (o, &k) in w.w[..gcd].iter_mut().zip(&ket.k[iq * gcd..(iq + 1) * gcd]) {
                        *o += k * v;
                    }
                }
                continue;
            }
            w.r.compute(lt, alpha, qp, pref);
            let r = &w.r.r[..d * d * d];
            let esk = &ket.es[iq * nnz_k..(iq + 1) * nnz_k];
            let offs_cd = &w.offs_cd[..nnz_k];
            let offs_ab = &w.offs_ab[..nhab];
            // Σ_τνφ R_{t+τ,u+ν,v+φ}(Q−P) E^{cd}_τνφ (the bra parity sign is
            // applied with the bra coefficients), entry by entry of the ket
            // pattern, running over the bra Hermite index inside.
            // SAFETY (both branches): every o1 + o2 is the cube index of
            // (t+τ, u+ν, v+φ) with t+u+v ≤ la+lb, τ+ν+φ ≤ lc+ld, so it is below
            // d³ = r.len() (checked in debug builds above); cd < ncdc ≤ ncol and
            // h1 < nhab, so h1·ncol + cd < nhab·ncol ≤ w.w.len() and
            // cd·nhab + h1 < ncdc·nhab = vt.len().
            let rp = r.as_ptr();
            if ket_single {
                let wv = &mut w.w[..nhab * ncol];
                let wp = wv.as_mut_ptr();
                for kk in 0..nnz_k {
                    let (o2, e, cd) = (offs_cd[kk], esk[kk], comp_k[kk]);
                    debug_assert!(cd < ncol);
                    for (h1, &o1) in offs_ab.iter().enumerate() {
                        unsafe {
                            *wp.add(h1 * ncol + cd) += e * *rp.add(o1 + o2);
                        }
                    }
                }
            } else {
                let vt = &mut w.v[..ncdc * nhab];
                vt.fill(0.0);
                let vp = vt.as_mut_ptr();
                for kk in 0..nnz_k {
                    let (o2, e, cd) = (offs_cd[kk], esk[kk], comp_k[kk]);
                    debug_assert!(cd < ncdc);
                    for (h1, &o1) in offs_ab.iter().enumerate() {
                        unsafe {
                            *vp.add(cd * nhab + h1) += e * *rp.add(o1 + o2);
                        }
                    }
                }
                let wv = &mut w.w[..nhab * ncol];
                let kq = &ket.k[iq * gcd..(iq + 1) * gcd];
                // W[h1][g][cd] += k_g V[cd][h1]  (ncol = gcd·ncdc)
                // (zero products: a primitive outside one of the group's
                // contractions, e.g. cc-pVDZ's outer s beside 1s/2s)
                for (g, &k) in kq.iter().enumerate() {
                    if k == 0.0 {
                        continue;
                    }
                    let g = g * ncdc;
                    for cd in 0..ncdc {
                        let vrow = &vt[cd * nhab..(cd + 1) * nhab];
                        for (h1, &x) in vrow.iter().enumerate() {
                            wv[h1 * ncol + g + cd] += k * x;
                        }
                    }
                }
            }
        }
        for (m, out) in bras.iter().zip(outs.iter_mut()) {
            let pat_b = e_pattern(m.la, m.lb);
            let nnz_b = pat_b.herm.len();
            let (nca, ncb) = (components_table(m.la).len(), components_table(m.lb).len());
            let (ga, gb) = m.nctr;
            let nrow_b = gb * ncb; // extent of index B
            let esb = &m.es[ip * nnz_b..(ip + 1) * nnz_b];
            let kp = &m.k[ip * ga * gb..(ip + 1) * ga * gb];
            for a1 in 0..ga {
                for b1 in 0..gb {
                    let k = kp[a1 * gb + b1];
                    if k == 0.0 {
                        continue;
                    }
                    for ca in 0..nca {
                        for cb in 0..ncb {
                            let ab = ca * ncb + cb;
                            let row = (a1 * nca + ca) * nrow_b + b1 * ncb + cb;
                            let orow = &mut out[row * ncol..(row + 1) * ncol];
                            for kk in pat_b.start[ab]..pat_b.start[ab + 1] {
                                let h1 = pat_b.herm[kk];
                                let e = esb[kk] * k * w.sign_ab[h1];
                                let wrow = &w.w[h1 * ncol..(h1 + 1) * ncol];
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
    if !ket_single {
        // [row][c1 d1][cc dd] → [row][c1 cc][d1 dd]
        for out in outs.iter_mut() {
            let nrow = out.len() / ncol;
            w.t1.clear();
            w.t1.resize(out.len(), 0.0);
            for row in 0..nrow {
                let src = &out[row * ncol..(row + 1) * ncol];
                let dst = &mut w.t1[row * ncol..(row + 1) * ncol];
                for c1 in 0..gc {
                    for d1 in 0..gd {
                        let g = (c1 * gd + d1) * ncdc;
                        for cc in 0..ncc {
                            for dd in 0..ncd {
                                dst[(c1 * ncc + cc) * (gd * ncd) + d1 * ncd + dd] =
                                    src[g + cc * ncd + dd];
                            }
                        }
                    }
                }
            }
            std::mem::swap(out, &mut w.t1);
        }
    }
}

/// Estimated work of [`raw_quartet`] with `x` as the bra and `y` as the ket
/// (multiply–adds of the ket and bra contraction steps).
fn quartet_cost(x: &ShellPairData, y: &ShellPairData) -> usize {
    let (nx, ny) = (x.prims.len(), y.prims.len());
    let gy = y.nctr.0 * y.nctr.1;
    let gx = x.nctr.0 * x.nctr.1;
    let nnz_x = e_pattern(x.la, x.lb).herm.len();
    let nnz_y = e_pattern(y.la, y.lb).herm.len();
    // per primitive quartet: the ket pattern × bra Hermite loop (+ loop
    // overhead), the contraction-pair distribution, R and the Boys function
    let ket = nnz_y * (x.nherm + 3)
        + if gy > 1 {
            gy * y.nab * (x.nherm + 3)
        } else {
            0
        };
    // per bra primitive: bra pattern × ket columns
    let bra = gx * nnz_x * (gy * y.nab + 3) + x.nherm * gy * y.nab;
    nx * ny * ket + nx * bra
}

/// [`raw_quartet`] in whichever orientation is cheaper; the result is always
/// laid out `[bra rows][ket rows]`.
pub fn raw_quartet_any(bra: &ShellPairData, ket: &ShellPairData, w: &mut EriWork) {
    if quartet_cost(ket, bra) < quartet_cost(bra, ket) {
        raw_quartet(ket, bra, w);
        let (nk, nb) = (ket.nrows(), bra.nrows());
        w.t1.clear();
        w.t1.resize(nk * nb, 0.0);
        for r in 0..nk {
            for c in 0..nb {
                w.t1[c * nk + r] = w.raw[r * nb + c];
            }
        }
        std::mem::swap(&mut w.raw, &mut w.t1);
    } else {
        raw_quartet(bra, ket, w);
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
    if shells.iter().all(|&(l, _, _)| l < 2) {
        // s and p: the transformation is the identity
        w.out.clear();
        w.out.extend_from_slice(&w.raw);
        return;
    }
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
/// angular momentum whose exponents are among those of the first (a general
/// contraction, with the uncontracted functions split from it); its
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

/// The coefficients of a contraction over `exps` (those of its own
/// exponents `own`, zero elsewhere) when every exponent of `own` is one of
/// `exps`; `None` otherwise. With it a general contraction and the
/// uncontracted functions split from it (cc-pVDZ: the outermost s and p
/// primitives) form one group, so their primitive quartets are computed once.
fn coefficients_on(exps: &[f64], own: &[f64], coefs: &[f64]) -> Option<Vec<f64>> {
    let mut c = vec![0.0; exps.len()];
    for (&e, &v) in own.iter().zip(coefs) {
        let k = exps.iter().position(|&x| x == e)?;
        if c[k] != 0.0 {
            return None;
        }
        c[k] = v;
    }
    Some(c)
}

fn group_shells(basis: &BasisSet) -> Vec<(RawGroup, bool, usize, usize)> {
    let mut out: Vec<(RawGroup, bool, usize, usize)> = Vec::new();
    let mut last: Option<(usize, usize, bool)> = None;
    for (s, &off) in basis.shells.iter().zip(&basis.offsets) {
        let key = (s.atom, s.l, s.pure);
        if let (Some(k), Some(g)) = (last, out.last_mut()) {
            if k == key {
                if let Some(c) = coefficients_on(&g.0.exps, &s.exponents, &s.coefficients) {
                    g.0.coefs.push(c);
                    g.3 += s.nfunc();
                    continue;
                }
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
        raw_quartet_any(
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
            .map_init(
                || (EriWork::new(), Vec::<usize>::new()),
                |(w, kets), &(i, j)| {
                    for_each_quartet(sp, i, j, threshold, |k, l| {
                        sp.quartet(i, j, k, l, w);
                        let (oi, ni) = sp.group_ao[i];
                        let (oj, nj) = sp.group_ao[j];
                        let (ok, nk) = sp.group_ao[k];
                        let (ol, nl) = sp.group_ao[l];
                        let mut x = 0;
                        // pair indices of the ket functions, once per quartet
                        kets.clear();
                        for c in 0..nk {
                            for d in 0..nl {
                                kets.push(pair_index(ok + c, ol + d));
                            }
                        }
                        for a in 0..ni {
                            for b in 0..nj {
                                let ab = pair_index(oi + a, oj + b);
                                for (&cd, &v) in kets.iter().zip(&w.out[x..x + nk * nl]) {
                                    // SAFETY: a canonical function quartet lies in exactly one
                                    // canonical group quartet, and each group quartet is handled
                                    // by one task; so no two tasks write the same element. Within
                                    // the block, mirror images write the same value.
                                    unsafe { out.write(pair_index(ab, cd), v) };
                                }
                                x += nk * nl;
                            }
                        }
                        true
                    })
                },
            )
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
    fn jk_flat(&self, dens: &[Vec<f64>], want_j: bool, want_k: bool) -> JkParts {
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
        // J as a packed symmetric matrix–vector product: with the weighted
        // packed density Dw_kl = ½^{[k=l]} (D_kl + D_lk), J_ij += (ij|kl) Dw_kl
        // and J_kl += (ij|kl) Dw_ij for kl < ij, J_ij += (ij|ij) Dw_ij.
        // K from half-matrices as in the direct build (`scatter_block`):
        // K = K' + K''ᵀ, K' built with D and K'' with Dᵀ (K'' = K' if D = Dᵀ).
        let views: Vec<DensityViews> = dens.iter().map(|d| DensityViews::new(n, d)).collect();
        let dw: Vec<Vec<f64>> = views
            .iter()
            .map(|v| {
                pairs_of
                    .iter()
                    .map(|&(k, l)| if k == l { 0.5 } else { 1.0 } * v.ds[k * n + l])
                    .collect()
            })
            .collect();
        let all_sym = views.iter().all(|v| v.symmetric);
        let nk = if want_k {
            if all_sym {
                nd
            } else {
                2 * nd
            }
        } else {
            0
        };
        let parts: Vec<JkParts> = bounds
            .windows(2)
            .collect::<Vec<_>>()
            .par_iter()
            .map(|w| {
                let mut jp = vec![vec![0.0; npair]; nd];
                let mut k = vec![vec![0.0; n * n]; nk];
                for ij in w[0]..w[1] {
                    let (i, jj) = pairs_of[ij];
                    let base = ij * (ij + 1) / 2;
                    let row = &self.values[base..base + ij + 1];
                    for m in 0..if want_j { nd } else { 0 } {
                        let d = &dw[m];
                        let jpm = &mut jp[m];
                        let dij = d[ij];
                        let mut acc = 0.0;
                        for ((&v, &dk), jk) in row[..ij].iter().zip(&d[..ij]).zip(&mut jpm[..ij]) {
                            acc += v * dk;
                            *jk += v * dij;
                        }
                        jpm[ij] += acc + row[ij] * dij;
                    }
                    if !want_k {
                        continue;
                    }
                    let fij = if i == jj { 0.5 } else { 1.0 };
                    for (m, v) in views.iter().enumerate() {
                        let (lo, hi) = k.split_at_mut(nd);
                        let kt = if v.symmetric { None } else { Some(&mut hi[m]) };
                        let km = &mut lo[m];
                        let half = |km: &mut Vec<f64>, d: &[f64]| {
                            for (kl, &v0) in row.iter().enumerate() {
                                if v0 == 0.0 {
                                    continue;
                                }
                                let (kk, l) = pairs_of[kl];
                                let f = v0
                                    * fij
                                    * if kk == l { 0.5 } else { 1.0 }
                                    * if kl == ij { 0.5 } else { 1.0 };
                                km[i * n + kk] += f * d[jj * n + l];
                                km[jj * n + kk] += f * d[i * n + l];
                                km[i * n + l] += f * d[jj * n + kk];
                                km[jj * n + l] += f * d[i * n + kk];
                            }
                        };
                        half(km, &v.d);
                        if let Some(kt) = kt {
                            half(kt, &v.dt);
                        }
                    }
                }
                (jp, k)
            })
            .collect();
        let mut jp = vec![vec![0.0; npair]; nd];
        let mut kh = vec![vec![0.0; n * n]; nk];
        for (pj, pk) in parts {
            for (x, y) in jp.iter_mut().zip(&pj) {
                for (a, b) in x.iter_mut().zip(y) {
                    *a += b;
                }
            }
            for (x, y) in kh.iter_mut().zip(&pk) {
                for (a, b) in x.iter_mut().zip(y) {
                    *a += b;
                }
            }
        }
        let j: Vec<Vec<f64>> = jp
            .iter()
            .take(if want_j { nd } else { 0 })
            .map(|p| {
                let mut full = vec![0.0; n * n];
                for (ij, &(a, b)) in pairs_of.iter().enumerate() {
                    full[a * n + b] = p[ij];
                    full[b * n + a] = p[ij];
                }
                full
            })
            .collect();
        let k: Vec<Vec<f64>> = if want_k {
            (0..nd)
                .map(|m| {
                    let a = &kh[m];
                    let b = if views[m].symmetric {
                        &kh[m]
                    } else {
                        &kh[nd + m]
                    };
                    let mut full = vec![0.0; n * n];
                    for r in 0..n {
                        for c in 0..n {
                            full[r * n + c] = a[r * n + c] + b[c * n + r];
                        }
                    }
                    full
                })
                .collect()
        } else {
            Vec::new()
        };
        (j, k)
    }
}

/// Per-density J and K matrices (row-major flat), one partial sum.
type JkParts = (Vec<Vec<f64>>, Vec<Vec<f64>>);

/// Weight of one unique integral in the 8-fold sum: ½ for each of the
/// coincidences i = j, k = l and (ij) = (kl), which make mirror images of
/// the same integral.
#[inline(always)]
fn degeneracy(same_ij: bool, same_kl: bool, same_pairs: bool) -> f64 {
    let half = |b: bool| if b { 0.5 } else { 1.0 };
    half(same_ij) * half(same_kl) * half(same_pairs)
}

/// Options of the J/K builds.
#[derive(Clone, Debug, PartialEq)]
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
    let (j, k) = store.jk_flat(&dens, true, exchange);
    Ok(JkResult {
        j: j.iter().map(|v| DMatrix::from_row_slice(n, n, v)).collect(),
        k: k.iter().map(|v| DMatrix::from_row_slice(n, n, v)).collect(),
        in_core: true,
        quartets: store.quartets,
    })
}

/// K alone for each density from the packed in-core store (no Coulomb
/// contraction): for the response products, which need only exchange-type
/// builds.
pub fn exchange_in_core(
    store: &EriStore,
    densities: &[DMatrix<f64>],
) -> Result<Vec<DMatrix<f64>>, TwoElectronError> {
    let dens = check_densities(store.nbf, densities)?;
    let n = store.nbf;
    let (_, k) = store.jk_flat(&dens, false, true);
    Ok(k.iter().map(|v| DMatrix::from_row_slice(n, n, v)).collect())
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
    // Per density: D, Dᵀ and D + Dᵀ (row major); K is accumulated as
    // K' (with D) and K'' (with Dᵀ) and assembled as K' + K''ᵀ, J as
    // J' + J'ᵀ (see `scatter_block`). For a symmetric D, K'' = K'.
    let views: Vec<DensityViews> = dens.iter().map(|d| DensityViews::new(n, d)).collect();
    let nk = if want_k_any(opts) {
        if views.iter().all(|v| v.symmetric) {
            nd
        } else {
            2 * nd
        }
    } else {
        0
    };
    let bras = bra_pairs(ns);
    let npairs = bras.len();
    // Pairs sorted by Schwarz factor, ascending; a shell quartet is visited
    // once, from its pair of higher rank (the bra), with the kets taken in
    // decreasing Q so the loop stops at the first ket with
    // Q_ij Q_kl max|D| below the threshold.
    let mut order: Vec<usize> = (0..npairs).collect();
    order.sort_by(|&x, &y| sp.schwarz[x].total_cmp(&sp.schwarz[y]).then(x.cmp(&y)));
    let q_sorted: Vec<f64> = order.iter().map(|&x| sp.schwarz[x]).collect();
    let dglob = dmax.iter().fold(0.0f64, |m, &v| m.max(v));
    // Estimated cost per bra rank (primitive pairs × raw block size of both
    // pairs, over the kets that pass the global bound) for a fixed partition
    // of similar work; the summation order does not depend on the threads.
    let cost_pair: Vec<f64> = order
        .iter()
        .map(|&x| {
            let pd = &sp.pairs[x];
            (pd.prims.len() * pd.nrows() * pd.nherm) as f64 + 1.0
        })
        .collect();
    let mut prefix = vec![0.0; npairs + 1];
    for r in 0..npairs {
        prefix[r + 1] = prefix[r] + cost_pair[r];
    }
    let first_ket = |r: usize| -> usize {
        let qb = q_sorted[r] * dglob;
        // first rank whose Q passes: q_sorted is ascending
        q_sorted[..=r].partition_point(|&q| qb * q < opts.threshold)
    };
    let cost: Vec<f64> = (0..npairs)
        .map(|r| cost_pair[r] * (prefix[r + 1] - prefix[first_ket(r)]))
        .collect();
    let total: f64 = cost.iter().sum();
    let nchunks = 32.min(npairs.max(1));
    let mut bounds = vec![0usize];
    let mut acc = 0.0;
    for (r, c) in cost.iter().enumerate() {
        acc += c;
        if acc * nchunks as f64 >= total * bounds.len() as f64 && bounds.len() < nchunks {
            bounds.push(r + 1);
        }
    }
    if *bounds.last().unwrap_or(&0) != npairs {
        bounds.push(npairs);
    }
    let want_k = opts.exchange;
    let parts: Vec<(JkParts, (usize, usize))> = bounds
        .windows(2)
        .collect::<Vec<_>>()
        .par_iter()
        .map(|win| {
            let mut w = EriWork::new();
            let mut jm = vec![vec![0.0; n * n]; nd];
            let mut km = vec![vec![0.0; n * n]; nk];
            let mut counts = (0, 0);
            for rb in win[0]..win[1] {
                let (i, j) = bras[order[rb]];
                let qij = q_sorted[rb];
                let lo = first_ket(rb);
                counts.1 += lo;
                for rk in (lo..=rb).rev() {
                    let (k, l) = bras[order[rk]];
                    let q = qij * q_sorted[rk];
                    let mut dm = dmax[i * ns + j].max(dmax[k * ns + l]);
                    if want_k {
                        dm = dm
                            .max(dmax[i * ns + k])
                            .max(dmax[i * ns + l])
                            .max(dmax[j * ns + k])
                            .max(dmax[j * ns + l]);
                    }
                    if q * dm < opts.threshold {
                        counts.1 += 1;
                        continue;
                    }
                    counts.0 += 1;
                    sp.quartet(i, j, k, l, &mut w);
                    let blocks = [
                        sp.group_ao[i],
                        sp.group_ao[j],
                        sp.group_ao[k],
                        sp.group_ao[l],
                    ];
                    let f = degeneracy(i == j, k == l, i == k && j == l);
                    for (m, v) in views.iter().enumerate() {
                        let (kp, kt) = if want_k {
                            let (lo, hi) = km.split_at_mut(nd);
                            (
                                Some(&mut lo[m]),
                                if v.symmetric { None } else { Some(&mut hi[m]) },
                            )
                        } else {
                            (None, None)
                        };
                        scatter_block(n, blocks, f, &w.out, v, &mut jm[m], kp, kt);
                    }
                }
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
    let mut jh = vec![vec![0.0; n * n]; nd];
    let mut kh = vec![vec![0.0; n * n]; nk];
    for (pj, pk) in jk_parts {
        for (x, y) in jh.iter_mut().zip(&pj) {
            for (a, b) in x.iter_mut().zip(y) {
                *a += b;
            }
        }
        for (x, y) in kh.iter_mut().zip(&pk) {
            for (a, b) in x.iter_mut().zip(y) {
                *a += b;
            }
        }
    }
    let plus_transpose =
        |a: &[f64], b: &[f64]| DMatrix::from_fn(n, n, |r, c| a[r * n + c] + b[c * n + r]);
    let j = jh.iter().map(|x| plus_transpose(x, x)).collect();
    let k = if want_k {
        (0..nd)
            .map(|m| {
                if views[m].symmetric {
                    plus_transpose(&kh[m], &kh[m])
                } else {
                    plus_transpose(&kh[m], &kh[nd + m])
                }
            })
            .collect()
    } else {
        Vec::new()
    };
    Ok(JkResult {
        j,
        k,
        in_core: false,
        quartets,
    })
}

/// A density in the forms the block scatter reads.
struct DensityViews {
    d: Vec<f64>,
    dt: Vec<f64>,
    ds: Vec<f64>,
    symmetric: bool,
}

impl DensityViews {
    fn new(n: usize, d: &[f64]) -> DensityViews {
        let mut dt = vec![0.0; n * n];
        let mut ds = vec![0.0; n * n];
        let mut symmetric = true;
        for r in 0..n {
            for c in 0..n {
                dt[r * n + c] = d[c * n + r];
                ds[r * n + c] = d[r * n + c] + d[c * n + r];
                symmetric &= d[r * n + c] == d[c * n + r];
            }
        }
        DensityViews {
            d: d.to_vec(),
            dt,
            ds,
            symmetric,
        }
    }
}

fn want_k_any(opts: &JkOptions) -> bool {
    opts.exchange
}

/// Add one canonical shell-quartet block (ab|cd) (layout `[a][b][c][d]`,
/// each index over its group's functions) with weight `f` (the degeneracy
/// of coinciding shells, [`degeneracy`]) to the half-matrices of one density:
/// with v = f (ab|cd) and the 8 index permutations,
///   J'_ab += v (D+Dᵀ)_cd,  J'_cd += v (D+Dᵀ)_ab            (J = J' + J'ᵀ),
///   K'_ac += v D_bd, K'_bc += v D_ad, K'_ad += v D_bc, K'_bd += v D_ac,
///   K''   the same with Dᵀ                                   (K = K' + K''ᵀ).
/// Every function quartet of the block is used, also the mirror images in
/// blocks with coinciding shells; the weight f accounts for them.
#[allow(clippy::too_many_arguments)]
fn scatter_block(
    n: usize,
    blocks: [(usize, usize); 4],
    f: f64,
    blk: &[f64],
    dv: &DensityViews,
    jm: &mut [f64],
    km: Option<&mut Vec<f64>>,
    kt: Option<&mut Vec<f64>>,
) {
    let [(oa, na), (ob, nb), (oc, nc), (od, nd)] = blocks;
    let ds = &dv.ds;
    // J
    for a in 0..na {
        for b in 0..nb {
            let (ga, gb) = (oa + a, ob + b);
            let dsab = f * ds[ga * n + gb];
            let mut jab = 0.0;
            for c in 0..nc {
                let gc = oc + c;
                let row = &blk[((a * nb + b) * nc + c) * nd..][..nd];
                let dsr = &ds[gc * n + od..][..nd];
                let jcd = &mut jm[gc * n + od..][..nd];
                for x in 0..nd {
                    jab += row[x] * dsr[x];
                    jcd[x] += row[x] * dsab;
                }
            }
            jm[ga * n + gb] += f * jab;
        }
    }
    let k_one = |km: &mut [f64], d: &[f64]| {
        for a in 0..na {
            for b in 0..nb {
                let (ga, gb) = (oa + a, ob + b);
                for c in 0..nc {
                    let gc = oc + c;
                    let row = &blk[((a * nb + b) * nc + c) * nd..][..nd];
                    let dbd = &d[gb * n + od..][..nd];
                    let dad = &d[ga * n + od..][..nd];
                    let (mut kac, mut kbc) = (0.0, 0.0);
                    for x in 0..nd {
                        kac += row[x] * dbd[x];
                        kbc += row[x] * dad[x];
                    }
                    km[ga * n + gc] += f * kac;
                    km[gb * n + gc] += f * kbc;
                    let dbc = f * d[gb * n + gc];
                    let kad = &mut km[ga * n + od..][..nd];
                    for x in 0..nd {
                        kad[x] += row[x] * dbc;
                    }
                    let dac = f * d[ga * n + gc];
                    let kbd = &mut km[gb * n + od..][..nd];
                    for x in 0..nd {
                        kbd[x] += row[x] * dac;
                    }
                }
            }
        }
    };
    if let Some(km) = km {
        k_one(km, &dv.d);
    }
    if let Some(kt) = kt {
        k_one(kt, &dv.dt);
    }
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

/// The centre-derivative shell pairs of (a b) with one common primitive
/// order, for [`raw_quartet_into`]: members `[a↑ b, a b↑, a↓ b, a b↓]`,
/// the lowered ones only for l > 0. "↑" is the shell l + 1 with coefficients
/// 2α c and "↓" the shell l − 1 (∂/∂A_x of a Cartesian Gaussian is
/// 2α x^{l+1} − l_x x^{l−1}). The primitive pairs kept are those significant
/// for any member; every member carries the largest of the members' bounds
/// as `qprim`, so the screening in the kernel is safe for all of them.
struct DerivPairSet {
    members: Vec<ShellPairData>,
    lowered_a: Option<usize>,
    lowered_b: Option<usize>,
}

impl DerivPairSet {
    fn new(a: &RawShell, b: &RawShell) -> DerivPairSet {
        let (ga, gb) = (RawGroup::single(a), RawGroup::single(b));
        let mut groups = vec![
            (RawGroup::single(&a.raised()), gb.clone()),
            (ga.clone(), RawGroup::single(&b.raised())),
        ];
        let mut lowered_a = None;
        let mut lowered_b = None;
        if let Some(s) = a.lowered() {
            lowered_a = Some(groups.len());
            groups.push((RawGroup::single(&s), gb.clone()));
        }
        if let Some(s) = b.lowered() {
            lowered_b = Some(groups.len());
            groups.push((ga.clone(), RawGroup::single(&s)));
        }
        let nb = b.exps.len();
        let mut keep = vec![false; a.exps.len() * nb];
        for (x, y) in &groups {
            for (pa, pb) in significant_primitive_pairs(x, y) {
                keep[pa * nb + pb] = true;
            }
        }
        let list: Vec<(usize, usize)> = (0..keep.len())
            .filter(|&x| keep[x])
            .map(|x| (x / nb, x % nb))
            .collect();
        let mut members: Vec<ShellPairData> = groups
            .iter()
            .map(|(x, y)| ShellPairData::unsorted(x, y, &list))
            .collect();
        let mut q = vec![0.0f64; list.len()];
        for m in &members {
            for (qi, v) in q.iter_mut().zip(m.primitive_bounds()) {
                *qi = qi.max(v);
            }
        }
        for m in &mut members {
            m.reorder(&q);
        }
        DerivPairSet {
            members,
            lowered_a,
            lowered_b,
        }
    }
}

/// Caller-owned buffers of [`raw_pair_derivative_quartet`].
#[derive(Default)]
struct DerivWork {
    parts: Vec<Vec<f64>>,
    /// (∂a/∂A_d b|cd) in `out[d]`, (a ∂b/∂B_d|cd) in `out[3 + d]`.
    out: [Vec<f64>; 6],
}

/// Raw Cartesian (∂a/∂A_d b|cd) and (a ∂b/∂B_d|cd), d = x, y, z, layout
/// `[a][b][c][d]`, into `dw.out` from one kernel call for all members of the
/// bra's [`DerivPairSet`].
fn raw_pair_derivative_quartet(
    la: usize,
    lb: usize,
    set: &DerivPairSet,
    ket: &ShellPairData,
    w: &mut EriWork,
    dw: &mut DerivWork,
) {
    use super::cart::component_index;
    let nm = set.members.len();
    let mut refs: [&ShellPairData; 4] = [&set.members[0]; 4];
    for (r, m) in refs.iter_mut().zip(&set.members) {
        *r = m;
    }
    dw.parts.resize_with(4, Vec::new);
    raw_quartet_into(&refs[..nm], ket, w, &mut dw.parts[..nm]);
    let ca = components_table(la);
    let cb = components_table(lb);
    let (nca, ncb) = (ca.len(), cb.len());
    let ncbu = components_table(lb + 1).len();
    let ncd = ket.nrows();
    for o in dw.out.iter_mut() {
        o.clear();
        o.resize(nca * ncb * ncd, 0.0);
    }
    let parts = &dw.parts;
    let (up_a, up_b) = (&parts[0], &parts[1]);
    let dn_a = set.lowered_a.map(|m| &parts[m]);
    let dn_b = set.lowered_b.map(|m| &parts[m]);
    let ncbd = if lb > 0 {
        components_table(lb - 1).len()
    } else {
        0
    };
    for d in 0..3 {
        let (lo, hi) = dw.out.split_at_mut(3);
        let (oa, ob) = (&mut lo[d], &mut hi[d]);
        for (ia, xa) in ca.iter().enumerate() {
            let mut xu = *xa;
            xu[d] += 1;
            let iu = component_index(xu);
            let lower_a = match dn_a {
                Some(dn) if xa[d] > 0 => {
                    let mut xd = *xa;
                    xd[d] -= 1;
                    Some((dn, component_index(xd), xa[d] as f64))
                }
                _ => None,
            };
            for (ib, xb) in cb.iter().enumerate() {
                let dst = (ia * ncb + ib) * ncd;
                // A: (a+1_d b| − n_d(a) (a−1_d b|
                let src = (iu * ncb + ib) * ncd;
                oa[dst..dst + ncd].copy_from_slice(&up_a[src..src + ncd]);
                if let Some((dn, idn, f)) = lower_a {
                    let src = (idn * ncb + ib) * ncd;
                    for (o, v) in oa[dst..dst + ncd].iter_mut().zip(&dn[src..src + ncd]) {
                        *o -= f * v;
                    }
                }
                // B: (a b+1_d| − n_d(b) (a b−1_d|
                let mut xu = *xb;
                xu[d] += 1;
                let src = (ia * ncbu + component_index(xu)) * ncd;
                ob[dst..dst + ncd].copy_from_slice(&up_b[src..src + ncd]);
                if let (Some(dn), true) = (dn_b, xb[d] > 0) {
                    let mut xd = *xb;
                    xd[d] -= 1;
                    let src = (ia * ncbd + component_index(xd)) * ncd;
                    let f = xb[d] as f64;
                    for (o, v) in ob[dst..dst + ncd].iter_mut().zip(&dn[src..src + ncd]) {
                        *o -= f * v;
                    }
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
    let ordered: Vec<(usize, usize)> = (0..ns).flat_map(|k| (0..ns).map(move |l| (k, l))).collect();
    let sets: Vec<DerivPairSet> = ordered
        .par_iter()
        .map(|&(i, j)| DerivPairSet::new(&raws[i], &raws[j]))
        .collect();
    let kets: Vec<ShellPairData> = ordered
        .par_iter()
        .map(|&(k, l)| ShellPairData::new(&raws[k], &raws[l]))
        .collect();
    let mut out = [
        vec![0.0; n * n * n * n],
        vec![0.0; n * n * n * n],
        vec![0.0; n * n * n * n],
    ];
    let mut w = EriWork::new();
    let mut dw = DerivWork::default();
    for i in 0..ns {
        for j in 0..ns {
            for k in 0..ns {
                for l in 0..ns {
                    raw_pair_derivative_quartet(
                        raws[i].l,
                        raws[j].l,
                        &sets[i * ns + j],
                        &kets[k * ns + l],
                        &mut w,
                        &mut dw,
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
                    for (d, od) in out.iter_mut().enumerate() {
                        std::mem::swap(&mut w.raw, &mut dw.out[d]);
                        transform_quartet(info, &mut w);
                        std::mem::swap(&mut w.raw, &mut dw.out[d]);
                        let mut x = 0;
                        for a in 0..nf[0] {
                            for b in 0..nf[1] {
                                for c in 0..nf[2] {
                                    for e in 0..nf[3] {
                                        let (ga, gb, gc, ge) =
                                            (offs[0] + a, offs[1] + b, offs[2] + c, offs[3] + e);
                                        od[((ga * n + gb) * n + gc) * n + ge] = w.out[x];
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
/// Returns dE₂/dR per atom (hartree/bohr). One Coulomb pair (½c_J, D, D) and
/// one exchange pair (−½c_K, D^m, D^m) per density for [`eri_gradient_pairs`].
pub fn jk_gradient(
    basis: &BasisSet,
    densities: &[DMatrix<f64>],
    c_j: f64,
    c_k: f64,
) -> Result<Vec<[f64; 3]>, TwoElectronError> {
    let n = basis.nbf;
    check_densities(n, densities)?;
    let mut dt = DMatrix::zeros(n, n);
    for d in densities {
        dt += d;
    }
    let pairs = DensityPairs {
        coulomb: vec![(0.5 * c_j, dt.clone(), dt)],
        exchange: densities
            .iter()
            .map(|d| (-0.5 * c_k, d.clone(), d.clone()))
            .collect(),
    };
    Ok(eri_gradient_pairs(basis, &[pairs])?.remove(0))
}

/// Densities of one energy expression for [`eri_gradient_pairs`]:
///   E = Σ_{(c,P,Q) ∈ coulomb} c Σ_abcd (ab|cd) P_ab Q_cd
///     + Σ_{(c,P,Q) ∈ exchange} c Σ_abcd (ab|cd) P_ac Q_bd,
/// for any (not necessarily symmetric) AO matrices P, Q.
#[derive(Clone, Debug, Default)]
pub struct DensityPairs {
    /// Coulomb-type pairs (coefficient, P, Q).
    pub coulomb: Vec<(f64, DMatrix<f64>, DMatrix<f64>)>,
    /// Exchange-type pairs (coefficient, P, Q).
    pub exchange: Vec<(f64, DMatrix<f64>, DMatrix<f64>)>,
}

/// Nuclear gradient (fixed AO matrices) of several energy expressions of the
/// [`DensityPairs`] form from one pass over the bra-derivative integrals; one
/// per-atom gradient per group.
///
/// The integrals are invariant under the 8 index permutations, so only the
/// symmetrised Γ_abcd counts: for a Coulomb pair ½(P̄_ab Q̄_cd + Q̄_ab P̄_cd)
/// with P̄ the symmetric part; for an exchange pair the contraction splits
/// into (P_s, Q_s) and (P_a, Q_a) (symmetric/antisymmetric parts; the mixed
/// terms cancel under the (ab)↔(cd) exchange), each with
/// Γ = ¼(P_ac Q_bd + P_bc Q_ad + P_ad Q_bc + P_bd Q_ac). Γ is then invariant
/// under the 8 permutations as well, so E = Σ_abcd (ab|cd) Γ_abcd is a sum
/// over the unique shell quartets (ij|kl), i ≥ j, k ≥ l, ij ≥ kl, each with
/// its degeneracy, and dE/dR_K collects from every unique quartet the four
/// centre derivatives (∂a b|cd), (a ∂b|cd), (ab|∂c d), (ab|c ∂d) of the
/// functions on K: two `raw_pair_derivative_quartet` calls per quartet
/// (bra pair raised against the ket, ket pair raised against the bra), Γ
/// built once; by translational invariance (the four derivatives sum to
/// zero) one call suffices when either pair sits on one atom, and quartets
/// on a single atom are skipped. Parallel over the first
/// shell; the per-atom sums are reduced in a fixed order.
pub fn eri_gradient_pairs(
    basis: &BasisSet,
    groups: &[DensityPairs],
) -> Result<Vec<Vec<[f64; 3]>>, TwoElectronError> {
    let n = basis.nbf;
    // Flattened, split pairs per group: coulomb (c, Ps, Qs); exchange (c, P, Q)
    // with P, Q both symmetric or both antisymmetric.
    type Flat = (f64, Vec<f64>, Vec<f64>);
    let mut flat: Vec<(Vec<Flat>, Vec<Flat>)> = Vec::with_capacity(groups.len());
    let mut index = 0;
    for g in groups {
        let mut coul = Vec::new();
        let mut exch = Vec::new();
        for (c, p, q) in &g.coulomb {
            let d = check_densities(n, &[p.clone(), q.clone()]).map_err(|e| match e {
                TwoElectronError::DensityShape {
                    rows, cols, nbf, ..
                } => TwoElectronError::DensityShape {
                    index,
                    rows,
                    cols,
                    nbf,
                },
            })?;
            index += 1;
            let sym = |m: &Vec<f64>| -> Vec<f64> {
                (0..n * n)
                    .map(|x| 0.5 * (m[x] + m[(x % n) * n + x / n]))
                    .collect()
            };
            coul.push((*c, sym(&d[0]), sym(&d[1])));
        }
        for (c, p, q) in &g.exchange {
            let d = check_densities(n, &[p.clone(), q.clone()]).map_err(|e| match e {
                TwoElectronError::DensityShape {
                    rows, cols, nbf, ..
                } => TwoElectronError::DensityShape {
                    index,
                    rows,
                    cols,
                    nbf,
                },
            })?;
            index += 1;
            let part = |m: &Vec<f64>, s: f64| -> Vec<f64> {
                (0..n * n)
                    .map(|x| 0.5 * (m[x] + s * m[(x % n) * n + x / n]))
                    .collect()
            };
            let (ps, qs) = (part(&d[0], 1.0), part(&d[1], 1.0));
            exch.push((*c, ps, qs));
            let (pa, qa) = (part(&d[0], -1.0), part(&d[1], -1.0));
            if pa.iter().any(|v| *v != 0.0) && qa.iter().any(|v| *v != 0.0) {
                exch.push((*c, pa, qa));
            }
        }
        flat.push((coul, exch));
    }
    let ng = groups.len();
    let raws: Vec<RawShell> = basis.shells.iter().map(RawShell::from_shell).collect();
    let ns = raws.len();
    let (pairs, schwarz) = single_shell_pairs(basis, &raws);
    let tri: Vec<(usize, usize)> = (0..ns).flat_map(|i| (0..=i).map(move |j| (i, j))).collect();
    let sets: Vec<DerivPairSet> = tri
        .par_iter()
        .map(|&(i, j)| DerivPairSet::new(&raws[i], &raws[j]))
        .collect();
    let ao: Vec<(usize, usize)> = basis
        .shells
        .iter()
        .zip(&basis.offsets)
        .map(|(s, &o)| (o, s.nfunc()))
        .collect();
    let atoms: Vec<usize> = basis.shells.iter().map(|s| s.atom).collect();
    let natoms = basis.natoms();
    let info_of = |s: usize| (basis.shells[s].l, basis.shells[s].pure, 1);
    let per_i: Vec<Vec<[f64; 3]>> = (0..ns)
        .into_par_iter()
        .map(|i| {
            // per group and atom
            let mut g = vec![[0.0; 3]; ng * natoms];
            let mut w = EriWork::new();
            let mut dw = DerivWork::default();
            let mut gam = Vec::new();
            for j in 0..=i {
                let pij = pair_index(i, j);
                for pkl in 0..=pij {
                    if schwarz[pkl] * schwarz[pij] < 1e-14 {
                        continue;
                    }
                    let (k, l) = tri[pkl];
                    // Translational invariance: the four centre derivatives
                    // sum to zero, so a quartet on one atom contributes
                    // nothing, and when one pair sits on a single atom the
                    // other pair's call gives everything.
                    let (one_bra, one_ket) = (atoms[i] == atoms[j], atoms[k] == atoms[l]);
                    if one_bra && one_ket && atoms[i] == atoms[k] {
                        continue;
                    }
                    let deg = (if i == j { 1.0 } else { 2.0 })
                        * (if k == l { 1.0 } else { 2.0 })
                        * (if pij == pkl { 1.0 } else { 2.0 });
                    let (oi, ni) = ao[i];
                    let (oj, nj) = ao[j];
                    let (ok, nk) = ao[k];
                    let (ol, nl) = ao[l];
                    let (nab, ncd) = (ni * nj, nk * nl);
                    let nblk = nab * ncd;
                    // Γ of every group for this block, layout [a][b][c][d].
                    gam.clear();
                    gam.resize(ng * nblk, 0.0);
                    for (gi, (coul, exch)) in flat.iter().enumerate() {
                        let gg = &mut gam[gi * nblk..(gi + 1) * nblk];
                        let mut x = 0;
                        for a in oi..oi + ni {
                            for b in oj..oj + nj {
                                for c in ok..ok + nk {
                                    for e in ol..ol + nl {
                                        let mut s = 0.0;
                                        for (cf, p, q) in coul {
                                            s += cf
                                                * 0.5
                                                * (p[a * n + b] * q[c * n + e]
                                                    + q[a * n + b] * p[c * n + e]);
                                        }
                                        for (cf, p, q) in exch {
                                            s += cf
                                                * 0.25
                                                * (p[a * n + c] * q[b * n + e]
                                                    + p[b * n + c] * q[a * n + e]
                                                    + p[a * n + e] * q[b * n + c]
                                                    + p[b * n + e] * q[a * n + c]);
                                        }
                                        gg[x] = deg * s;
                                        x += 1;
                                    }
                                }
                            }
                        }
                    }
                    let info = [info_of(i), info_of(j), info_of(k), info_of(l)];
                    // Σ Γ·(derivative block) per group and part (A, B or C, D
                    // × x, y, z) of one call.
                    let mut sums = vec![[0.0f64; 6]; ng];
                    if !one_bra {
                        // Bra centres A (out 0..3) and B (out 3..6): layout [a][b][c][d].
                        raw_pair_derivative_quartet(
                            raws[i].l,
                            raws[j].l,
                            &sets[pij],
                            &pairs[pkl],
                            &mut w,
                            &mut dw,
                        );
                        for (part, o) in dw.out.iter_mut().enumerate() {
                            std::mem::swap(&mut w.raw, o);
                            transform_quartet(info, &mut w);
                            std::mem::swap(&mut w.raw, o);
                            for (gi, sg) in sums.iter_mut().enumerate() {
                                let gg = &gam[gi * nblk..(gi + 1) * nblk];
                                sg[part] = w.out[..nblk].iter().zip(gg).map(|(v, y)| v * y).sum();
                            }
                        }
                        for (gi, sg) in sums.iter().enumerate() {
                            for d in 0..3 {
                                g[gi * natoms + atoms[i]][d] += sg[d];
                                g[gi * natoms + atoms[j]][d] += sg[3 + d];
                                if one_ket {
                                    g[gi * natoms + atoms[k]][d] -= sg[d] + sg[3 + d];
                                }
                            }
                        }
                        if one_ket {
                            continue;
                        }
                    }
                    // Ket centres C and D: the ket pair raised against the
                    // bra, layout [c][d][a][b].
                    raw_pair_derivative_quartet(
                        raws[k].l,
                        raws[l].l,
                        &sets[pkl],
                        &pairs[pij],
                        &mut w,
                        &mut dw,
                    );
                    let info = [info_of(k), info_of(l), info_of(i), info_of(j)];
                    for (part, o) in dw.out.iter_mut().enumerate() {
                        std::mem::swap(&mut w.raw, o);
                        transform_quartet(info, &mut w);
                        std::mem::swap(&mut w.raw, o);
                        for (gi, sg) in sums.iter_mut().enumerate() {
                            let gg = &gam[gi * nblk..(gi + 1) * nblk];
                            let mut s = 0.0;
                            for cd in 0..ncd {
                                let row = &w.out[cd * nab..(cd + 1) * nab];
                                for (ab, v) in row.iter().enumerate() {
                                    s += v * gg[ab * ncd + cd];
                                }
                            }
                            sg[part] = s;
                        }
                    }
                    for (gi, sg) in sums.iter().enumerate() {
                        for d in 0..3 {
                            g[gi * natoms + atoms[k]][d] += sg[d];
                            g[gi * natoms + atoms[l]][d] += sg[3 + d];
                            if one_bra {
                                g[gi * natoms + atoms[i]][d] -= sg[d] + sg[3 + d];
                            }
                        }
                    }
                }
            }
            g
        })
        .collect();
    let mut grad = vec![vec![[0.0; 3]; natoms]; ng];
    for g in &per_i {
        for (gi, gv) in grad.iter_mut().enumerate() {
            for (a, ga) in gv.iter_mut().enumerate() {
                for d in 0..3 {
                    ga[d] += g[gi * natoms + a][d];
                }
            }
        }
    }
    Ok(grad)
}
