//! Gaussian integrals over a [`BasisSet`]: one-electron matrices, electron
//! repulsion integrals (ERIs), Coulomb and exchange builds, and first nuclear
//! derivatives.
//!
//! Algorithm: McMurchie–Davidson (J. Comput. Phys. 26, 218 (1978)) — Hermite
//! expansion of Gaussian products ([`hermite`]) and Hermite Coulomb integrals
//! from the Boys function ([`crate::electronic::qc::boys`]). Raw integrals are
//! computed over Cartesian components and mapped to the output functions by a
//! per-shell transformation ([`cart`]). All matrices are `nalgebra::DMatrix<f64>`
//! in the AO order documented in [`crate::electronic::qc::basis`].
//!
//! Sign conventions: multipole matrices are ⟨a|(r−O)…|b⟩ (electron coordinate,
//! no charge); the nuclear-attraction matrix includes the −Z; bra-derivative
//! matrices are ⟨∂a/∂A|…|b⟩, the derivative with respect to the centre A of
//! the bra function (minus the "nabla_r" convention of some libraries).

pub mod cart;
pub mod hermite;
pub mod one_electron;
pub mod two_electron;

pub use two_electron::{
    coulomb_exchange, coulomb_exchange_direct, coulomb_exchange_in_core, eri_bra_derivative_tensor,
    eri_gradient_pairs, eri_tensor, exchange_in_core, jk_gradient, DensityPairs, EriStore, EriWork,
    JkOptions, JkResult, ShellPairData, ShellPairs, TwoElectronError,
};

use crate::electronic::qc::basis::BasisSet;
use cart::transform;
use nalgebra::DMatrix;
use one_electron::{raw_pair, raw_pair_bra_derivative, Op1, RawShell, Work1};

/// Apply the output transformations of two shells to a raw block `[ca][cb]`
/// (row major), writing `[fa][fb]` into `out`. `tmp` is scratch.
pub(crate) fn transform_pair(
    raw: &[f64],
    la: usize,
    pa: bool,
    lb: usize,
    pb: bool,
    tmp: &mut Vec<f64>,
    out: &mut Vec<f64>,
) {
    let (nca, ncb) = (
        cart::components_table(la).len(),
        cart::components_table(lb).len(),
    );
    let ta = transform(la, pa);
    let tb = transform(lb, pb);
    let nfa = ta.len() / nca;
    let nfb = tb.len() / ncb;
    // tmp[ca][fb] = Σ_cb raw[ca][cb] tb[fb][cb]
    tmp.clear();
    tmp.resize(nca * nfb, 0.0);
    for ca in 0..nca {
        for fb in 0..nfb {
            let mut s = 0.0;
            for cb in 0..ncb {
                s += raw[ca * ncb + cb] * tb[fb * ncb + cb];
            }
            tmp[ca * nfb + fb] = s;
        }
    }
    out.clear();
    out.resize(nfa * nfb, 0.0);
    for fa in 0..nfa {
        for ca in 0..nca {
            let t = ta[fa * nca + ca];
            if t == 0.0 {
                continue;
            }
            for fb in 0..nfb {
                out[fa * nfb + fb] += t * tmp[ca * nfb + fb];
            }
        }
    }
}

fn raw_len(l: usize) -> usize {
    cart::components_table(l).len()
}

/// ⟨a|op|b⟩ for all AO pairs of `bra` × `ket` (not assumed symmetric).
fn cross_matrix(bra: &BasisSet, ket: &BasisSet, op: Op1) -> DMatrix<f64> {
    let mut m = DMatrix::zeros(bra.nbf, ket.nbf);
    let mut w = Work1::new();
    let mut raw = vec![0.0; 64 * 64];
    let (mut tmp, mut blk) = (Vec::new(), Vec::new());
    for (si, sa) in bra.shells.iter().enumerate() {
        let ra = RawShell::from_shell(sa);
        for (sj, sb) in ket.shells.iter().enumerate() {
            let rb = RawShell::from_shell(sb);
            raw_pair(&ra, &rb, op, &mut w, &mut raw);
            transform_pair(&raw, sa.l, sa.pure, sb.l, sb.pure, &mut tmp, &mut blk);
            let (oa, ob) = (bra.offsets[si], ket.offsets[sj]);
            let (na, nb) = (sa.nfunc(), sb.nfunc());
            for i in 0..na {
                for j in 0..nb {
                    m[(oa + i, ob + j)] = blk[i * nb + j];
                }
            }
        }
    }
    m
}

/// ⟨a|op|b⟩ for a Hermitian operator: lower shell triangle, mirrored.
fn symmetric_matrix(basis: &BasisSet, op: Op1) -> DMatrix<f64> {
    let n = basis.nbf;
    let mut m = DMatrix::zeros(n, n);
    let mut w = Work1::new();
    let mut raw = vec![0.0; 64 * 64];
    let (mut tmp, mut blk) = (Vec::new(), Vec::new());
    let raws: Vec<RawShell> = basis.shells.iter().map(RawShell::from_shell).collect();
    for (si, sa) in basis.shells.iter().enumerate() {
        for (sj, sb) in basis.shells.iter().enumerate().take(si + 1) {
            raw_pair(&raws[si], &raws[sj], op, &mut w, &mut raw);
            transform_pair(&raw, sa.l, sa.pure, sb.l, sb.pure, &mut tmp, &mut blk);
            let (oa, ob) = (basis.offsets[si], basis.offsets[sj]);
            let (na, nb) = (sa.nfunc(), sb.nfunc());
            for i in 0..na {
                for j in 0..nb {
                    m[(oa + i, ob + j)] = blk[i * nb + j];
                    m[(ob + j, oa + i)] = blk[i * nb + j];
                }
            }
        }
    }
    m
}

/// Overlap matrix S_ab = ⟨a|b⟩.
pub fn overlap(basis: &BasisSet) -> DMatrix<f64> {
    symmetric_matrix(basis, Op1::Overlap)
}

/// Kinetic-energy matrix T_ab = ⟨a|−½∇²|b⟩.
pub fn kinetic(basis: &BasisSet) -> DMatrix<f64> {
    symmetric_matrix(basis, Op1::Kinetic)
}

/// Nuclear attraction V_ab = −Σ_C Z_C ⟨a|1/|r−C||b⟩ over the basis's nuclei.
pub fn nuclear_attraction(basis: &BasisSet) -> DMatrix<f64> {
    symmetric_matrix(
        basis,
        Op1::Nuclear {
            charges: &basis.nuclei,
        },
    )
}

/// Attraction to arbitrary point charges (Z, position in bohr): −Σ Z ⟨a|1/|r−C||b⟩.
pub fn point_charge_attraction(basis: &BasisSet, charges: &[(f64, [f64; 3])]) -> DMatrix<f64> {
    symmetric_matrix(basis, Op1::Nuclear { charges })
}

/// Core Hamiltonian T + V.
pub fn core_hamiltonian(basis: &BasisSet) -> DMatrix<f64> {
    kinetic(basis) + nuclear_attraction(basis)
}

/// Dipole matrices ⟨a|(r−O)_k|b⟩, k = x, y, z (electron position, no charge).
pub fn dipole(basis: &BasisSet, origin: [f64; 3]) -> [DMatrix<f64>; 3] {
    let m = |p: [usize; 3]| symmetric_matrix(basis, Op1::Multipole { powers: p, origin });
    [m([1, 0, 0]), m([0, 1, 0]), m([0, 0, 1])]
}

/// Second-moment matrices ⟨a|(r−O)_k (r−O)_l|b⟩ in the order xx, xy, xz, yy, yz, zz.
pub fn quadrupole(basis: &BasisSet, origin: [f64; 3]) -> [DMatrix<f64>; 6] {
    let m = |p: [usize; 3]| symmetric_matrix(basis, Op1::Multipole { powers: p, origin });
    [
        m([2, 0, 0]),
        m([1, 1, 0]),
        m([1, 0, 1]),
        m([0, 2, 0]),
        m([0, 1, 1]),
        m([0, 0, 2]),
    ]
}

/// Overlap between two bases (e.g. the same molecule at two geometries):
/// S_ab = ⟨a(bra)|b(ket)⟩, shape bra.nbf × ket.nbf.
pub fn overlap_between(bra: &BasisSet, ket: &BasisSet) -> DMatrix<f64> {
    cross_matrix(bra, ket, Op1::Overlap)
}

/// Bra-centre derivatives ⟨∂a/∂A_d|op|b⟩, d = x, y, z, for all AO pairs.
fn bra_derivative(basis: &BasisSet, op: Op1) -> [DMatrix<f64>; 3] {
    let n = basis.nbf;
    let mut out = [
        DMatrix::zeros(n, n),
        DMatrix::zeros(n, n),
        DMatrix::zeros(n, n),
    ];
    let mut w = Work1::new();
    let (mut up, mut down) = (vec![0.0; 64 * 64], vec![0.0; 64 * 64]);
    let mut raw = [vec![0.0; 64 * 64], vec![0.0; 64 * 64], vec![0.0; 64 * 64]];
    let (mut tmp, mut blk) = (Vec::new(), Vec::new());
    let raws: Vec<RawShell> = basis.shells.iter().map(RawShell::from_shell).collect();
    for (si, sa) in basis.shells.iter().enumerate() {
        for (sj, sb) in basis.shells.iter().enumerate() {
            let [r0, r1, r2] = &mut raw;
            raw_pair_bra_derivative(
                &raws[si],
                &raws[sj],
                op,
                &mut w,
                &mut up,
                &mut down,
                [r0, r1, r2],
            );
            let (oa, ob) = (basis.offsets[si], basis.offsets[sj]);
            let (na, nb) = (sa.nfunc(), sb.nfunc());
            for d in 0..3 {
                transform_pair(
                    &raw[d][..raw_len(sa.l) * raw_len(sb.l)],
                    sa.l,
                    sa.pure,
                    sb.l,
                    sb.pure,
                    &mut tmp,
                    &mut blk,
                );
                for i in 0..na {
                    for j in 0..nb {
                        out[d][(oa + i, ob + j)] = blk[i * nb + j];
                    }
                }
            }
        }
    }
    out
}

/// ⟨∂a/∂A_d|b⟩ (derivative with respect to the bra function's centre).
pub fn overlap_bra_derivative(basis: &BasisSet) -> [DMatrix<f64>; 3] {
    bra_derivative(basis, Op1::Overlap)
}

/// ⟨∂a/∂A_d|−½∇²|b⟩.
pub fn kinetic_bra_derivative(basis: &BasisSet) -> [DMatrix<f64>; 3] {
    bra_derivative(basis, Op1::Kinetic)
}

/// ⟨∂a/∂A_d|V|b⟩ with V the attraction to all nuclei (operator fixed).
pub fn nuclear_bra_derivative(basis: &BasisSet) -> [DMatrix<f64>; 3] {
    bra_derivative(
        basis,
        Op1::Nuclear {
            charges: &basis.nuclei,
        },
    )
}

/// Full derivative of a symmetric two-centre matrix from its bra derivative D:
/// dM_ab/dR_{K,d} = δ_{K,atom(a)} D_ab + δ_{K,atom(b)} D_ba.
fn assemble_two_centre(basis: &BasisSet, bra: &[DMatrix<f64>; 3], out: &mut [DMatrix<f64>]) {
    let atoms = basis.ao_atoms();
    let n = basis.nbf;
    for d in 0..3 {
        for a in 0..n {
            for b in 0..n {
                let v = bra[d][(a, b)];
                // dM_xy/dR_K = δ_{K,atom(x)} D_xy + δ_{K,atom(y)} D_yx: D_ab enters
                // M_ab (x = a) and M_ba (y = a), both on the atom of a.
                out[3 * atoms[a] + d][(a, b)] += v;
                out[3 * atoms[a] + d][(b, a)] += v;
            }
        }
    }
}

/// dS/dR for every nuclear coordinate: element `3K + d` is ∂S/∂R_{K,d}.
pub fn overlap_nuclear_derivatives(basis: &BasisSet) -> Vec<DMatrix<f64>> {
    let n = basis.nbf;
    let mut out = vec![DMatrix::zeros(n, n); 3 * basis.natoms()];
    assemble_two_centre(basis, &overlap_bra_derivative(basis), &mut out);
    out
}

/// dh/dR for every nuclear coordinate (h = T + V, including the derivative
/// of the operator V with respect to the nuclear positions): element `3K + d`.
pub fn core_hamiltonian_nuclear_derivatives(basis: &BasisSet) -> Vec<DMatrix<f64>> {
    let n = basis.nbf;
    let mut out = vec![DMatrix::zeros(n, n); 3 * basis.natoms()];
    let t = kinetic_bra_derivative(basis);
    assemble_two_centre(basis, &t, &mut out);
    let atoms = basis.ao_atoms();
    // Per nucleus C: basis-centre part and, by translational invariance of the
    // three-centre integral, the operator part −(D^C_ab + D^C_ba) on C.
    for (c, nuc) in basis.nuclei.iter().enumerate() {
        let dc = bra_derivative(
            basis,
            Op1::Nuclear {
                charges: std::slice::from_ref(nuc),
            },
        );
        for d in 0..3 {
            for a in 0..n {
                for b in 0..n {
                    let v = dc[d][(a, b)];
                    out[3 * atoms[a] + d][(a, b)] += v;
                    out[3 * atoms[a] + d][(b, a)] += v;
                    out[3 * c + d][(a, b)] -= v;
                    out[3 * c + d][(b, a)] -= v;
                }
            }
        }
    }
    out
}

/// Nuclear repulsion energy Σ_{A<B} Z_A Z_B / R_AB of the basis's nuclei.
pub fn nuclear_repulsion(basis: &BasisSet) -> f64 {
    let nu = &basis.nuclei;
    let mut e = 0.0;
    for i in 0..nu.len() {
        for j in 0..i {
            let d = [
                nu[i].1[0] - nu[j].1[0],
                nu[i].1[1] - nu[j].1[1],
                nu[i].1[2] - nu[j].1[2],
            ];
            e += nu[i].0 * nu[j].0 / (d[0] * d[0] + d[1] * d[1] + d[2] * d[2]).sqrt();
        }
    }
    e
}
