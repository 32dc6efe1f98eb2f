//! The shared SF-TDA kernel: orbital partition, MO Fock blocks, the A·X
//! product with batched exchange builds, its diagonal, and the open-shell
//! exchange matrices K^{lm} used by the MRSF couplings.

use super::ResponseError;
use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::integrals;
use crate::electronic::qc::scf::fock::JkEngine;
use crate::electronic::qc::scf::{Reference, ScfResult};
use nalgebra::{DMatrix, DVector};

/// Largest number of densities sent to one Coulomb/exchange build (bounds
/// the scratch memory of the build: about 64 × n² × 8 bytes per density).
const MAX_BATCH: usize = 32;

/// The orbital partition C | O1 O2 | V and the SF index layout.
///
/// SF vectors are n_occ × n_vir matrices (rows: the α-occupied C∪O, MO
/// 0..n_C+2; columns: the β-empty O∪V, MO n_C..n_mo), flattened column-major
/// for the eigensolver.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct Partition {
    /// Core (doubly occupied) orbitals.
    pub n_core: usize,
    /// Molecular orbitals.
    pub n_mo: usize,
}

/// Type of an SF configuration (i→a).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Kind {
    /// Core → open.
    CO,
    /// Core → virtual.
    CV,
    /// Open → open.
    OO,
    /// Open → virtual.
    OV,
}

impl Partition {
    /// Rows: C ∪ O.
    pub fn n_occ(&self) -> usize {
        self.n_core + 2
    }
    /// Columns: O ∪ V.
    pub fn n_vir(&self) -> usize {
        self.n_mo - self.n_core
    }
    /// Virtual orbitals.
    pub fn n_virtual(&self) -> usize {
        self.n_mo - self.n_core - 2
    }
    /// N_SF.
    pub fn sf_dimension(&self) -> usize {
        self.n_occ() * self.n_vir()
    }
    pub(crate) fn flat(&self, row: usize, col: usize) -> usize {
        col * self.n_occ() + row
    }
    pub(crate) fn kind(&self, row: usize, col: usize) -> Kind {
        match (row < self.n_core, col < 2) {
            (true, true) => Kind::CO,
            (true, false) => Kind::CV,
            (false, true) => Kind::OO,
            (false, false) => Kind::OV,
        }
    }
    /// MO index of a row / column.
    pub(crate) fn mo_row(&self, row: usize) -> usize {
        row
    }
    pub(crate) fn mo_col(&self, col: usize) -> usize {
        self.n_core + col
    }
    /// Human label of an orbital by MO index.
    pub(crate) fn orbital_label(&self, mo: usize) -> String {
        if mo < self.n_core {
            format!("C{}", mo + 1)
        } else if mo < self.n_core + 2 {
            format!("O{}", mo - self.n_core + 1)
        } else {
            format!("V{}", mo + 1)
        }
    }
    /// "i→a" label of an SF configuration.
    pub(crate) fn label(&self, row: usize, col: usize) -> String {
        format!(
            "{}→{}",
            self.orbital_label(self.mo_row(row)),
            self.orbital_label(self.mo_col(col))
        )
    }
}

/// Reshape a flat SF vector.
pub(crate) fn to_matrix(p: &Partition, v: &DVector<f64>) -> DMatrix<f64> {
    DMatrix::from_column_slice(p.n_occ(), p.n_vir(), v.as_slice())
}

/// Flatten an SF matrix.
pub(crate) fn to_vector(m: &DMatrix<f64>) -> DVector<f64> {
    DVector::from_column_slice(m.as_slice())
}

/// Everything the SF-TDA product needs, built once per reference.
pub(crate) struct Kernel {
    pub part: Partition,
    /// All orbitals (nbf × nmo).
    pub c: DMatrix<f64>,
    c_occ: DMatrix<f64>,
    c_vir: DMatrix<f64>,
    /// F^α over C∪O (MO).
    pub fa_oo: DMatrix<f64>,
    /// F^β over O∪V (MO).
    pub fb_vv: DMatrix<f64>,
    /// Exact-exchange fraction.
    pub cx: f64,
    /// K^{lm}_pr = (p l|r m) in the MO basis, l, m ∈ {O1, O2}.
    pub kop: [[DMatrix<f64>; 2]; 2],
    /// J^{k}_pq = (pq|kk) in the MO basis, k ∈ {O1, O2}.
    pub jop: [DMatrix<f64>; 2],
    /// E_ROKS.
    pub reference_energy: f64,
    /// Dipole matrices in the MO basis (origin: centre of nuclear charge).
    pub dipole_mo: [DMatrix<f64>; 3],
    /// Operator products done (trial vectors).
    pub products: usize,
}

impl Kernel {
    pub fn new(
        basis: &BasisSet,
        scf: &ScfResult,
        exact_exchange: f64,
        engine: &mut JkEngine,
    ) -> Result<Kernel, ResponseError> {
        if scf.reference != Reference::RestrictedOpen {
            return Err(ResponseError::NotRestrictedOpen(scf.reference));
        }
        let (na, nb) = (scf.electrons.alpha, scf.electrons.beta);
        if (na + nb) % 2 == 1 {
            return Err(ResponseError::OddElectrons { electrons: na + nb });
        }
        if na.abs_diff(nb) != 2 {
            return Err(ResponseError::NotTriplet {
                alpha: na,
                beta: nb,
            });
        }
        if !exact_exchange.is_finite() || !(0.0..=1.0).contains(&exact_exchange) {
            return Err(ResponseError::InvalidOption(format!(
                "exact-exchange fraction {exact_exchange} is not in [0, 1]"
            )));
        }
        // Ms = −1 references: exchange the spin labels.
        let (f_up, f_down) = if na > nb {
            (&scf.fock_alpha, &scf.fock_beta)
        } else {
            (&scf.fock_beta, &scf.fock_alpha)
        };
        let n_core = na.min(nb);
        let c = scf.orbitals_alpha.clone();
        let nbf = basis.nbf;
        let nmo = c.ncols();
        if c.nrows() != nbf || f_up.shape() != (nbf, nbf) || f_down.shape() != (nbf, nbf) {
            return Err(ResponseError::Inconsistent(format!(
                "orbitals {:?} and Fock matrices {:?}, {:?} do not fit {nbf} basis functions",
                c.shape(),
                f_up.shape(),
                f_down.shape()
            )));
        }
        if n_core + 2 > nmo {
            return Err(ResponseError::Inconsistent(format!(
                "{} occupied orbitals but only {nmo} molecular orbitals",
                n_core + 2
            )));
        }
        if !scf.energy.is_finite() {
            return Err(ResponseError::NonFinite("reference energy"));
        }
        let part = Partition { n_core, n_mo: nmo };
        let fa = c.transpose() * f_up * &c;
        let fb = c.transpose() * f_down * &c;
        let nocc = part.n_occ();
        let c_occ = c.columns(0, nocc).into_owned();
        let c_vir = c.columns(n_core, part.n_vir()).into_owned();
        let fa_oo = fa.view((0, 0), (nocc, nocc)).into_owned();
        let fb_vv = fb
            .view((n_core, n_core), (part.n_vir(), part.n_vir()))
            .into_owned();
        // Open-shell exchange and Coulomb matrices (one build of 4 densities).
        let o = |k: usize| c.column(n_core + k).into_owned();
        let mut dens = Vec::with_capacity(4);
        for l in 0..2 {
            for m in 0..2 {
                dens.push(o(l) * o(m).transpose());
            }
        }
        let (j, k) = engine.jk(&dens, true, true)?;
        let mo = |x: &DMatrix<f64>| c.transpose() * x * &c;
        let kop = [[mo(&k[0]), mo(&k[1])], [mo(&k[2]), mo(&k[3])]];
        let jop = [mo(&j[0]), mo(&j[3])];
        let charge: f64 = basis.nuclei.iter().map(|(z, _)| z).sum();
        let mut origin = [0.0; 3];
        if charge > 0.0 {
            for (z, r) in &basis.nuclei {
                for d in 0..3 {
                    origin[d] += z * r[d] / charge;
                }
            }
        }
        let dip = integrals::dipole(basis, origin);
        let dipole_mo = [mo(&dip[0]), mo(&dip[1]), mo(&dip[2])];
        let all_finite = fa_oo.iter().chain(fb_vv.iter()).all(|v| v.is_finite());
        if !all_finite {
            return Err(ResponseError::NonFinite("Fock matrices"));
        }
        Ok(Kernel {
            part,
            c,
            c_occ,
            c_vir,
            fa_oo,
            fb_vv,
            cx: exact_exchange,
            kop,
            jop,
            reference_energy: scf.energy,
            dipole_mo,
            products: 0,
        })
    }

    /// σ = A X for a batch of SF matrices (one exchange build for all).
    pub fn apply_a(
        &mut self,
        engine: &mut JkEngine,
        xs: &[DMatrix<f64>],
    ) -> Result<Vec<DMatrix<f64>>, ResponseError> {
        let mut out: Vec<DMatrix<f64>> = xs
            .iter()
            .map(|x| x * &self.fb_vv - &self.fa_oo * x)
            .collect();
        self.products += xs.len();
        if self.cx != 0.0 {
            for (chunk_x, chunk_o) in xs.chunks(MAX_BATCH).zip(out.chunks_mut(MAX_BATCH)) {
                let dens: Vec<DMatrix<f64>> = chunk_x
                    .iter()
                    .map(|x| &self.c_occ * x * self.c_vir.transpose())
                    .collect();
                let k = engine.k_only(&dens)?;
                for (o, kk) in chunk_o.iter_mut().zip(&k) {
                    *o -= (self.c_occ.transpose() * kk * &self.c_vir) * self.cx;
                }
            }
        }
        for o in &out {
            if o.iter().any(|v| !v.is_finite()) {
                return Err(ResponseError::NonFinite("A·x product"));
            }
        }
        Ok(out)
    }

    /// (ii|aa) where it is available from the open-shell Coulomb matrices
    /// (CO, OO, OV); None for CV.
    fn coulomb_ia(&self, row: usize, col: usize) -> Option<f64> {
        let p = &self.part;
        let i = p.mo_row(row);
        let a = p.mo_col(col);
        if row >= p.n_core {
            Some(self.jop[row - p.n_core][(a, a)])
        } else if col < 2 {
            Some(self.jop[col][(i, i)])
        } else {
            None
        }
    }

    /// Diagonal of A: exact for CO, OO, OV; F^β_aa − F^α_ii for CV (which
    /// omits −c_x (ii|aa); used only for guesses and preconditioning).
    pub fn diagonal(&self) -> DMatrix<f64> {
        let p = &self.part;
        DMatrix::from_fn(p.n_occ(), p.n_vir(), |r, c| {
            self.fb_vv[(c, c)] - self.fa_oo[(r, r)] - self.cx * self.coulomb_ia(r, c).unwrap_or(0.0)
        })
    }

    /// A restricted to the four OO configurations, in the order
    /// (O1→O1), (O1→O2), (O2→O1), (O2→O2) (flat column-major order of the
    /// 2×2 OO block is (O1→O1), (O2→O1), (O1→O2), (O2→O2); see [`oo_flat`]).
    pub fn a_oo(&self) -> DMatrix<f64> {
        let nc = self.part.n_core;
        DMatrix::from_fn(4, 4, |x, y| {
            let (k, l) = OO_ORDER[x];
            let (kp, lp) = OO_ORDER[y];
            let mut v = 0.0;
            if k == kp {
                v += self.fb_vv[(l, lp)];
            }
            if l == lp {
                v -= self.fa_oo[(nc + kp, nc + k)];
            }
            // (k k'|l l') = K^{k' l'}_{k l}
            v - self.cx * self.kop[kp][lp][(nc + k, nc + l)]
        })
    }
}

/// The OO configurations (k→l) with local open-shell indices, in the order
/// used by [`Kernel::a_oo`] and the spin-adapted bases.
pub(crate) const OO_ORDER: [(usize, usize); 4] = [(0, 0), (0, 1), (1, 0), (1, 1)];

/// Flat SF index of the OO configuration number `x` of [`OO_ORDER`].
pub(crate) fn oo_flat(p: &Partition, x: usize) -> usize {
    let (k, l) = OO_ORDER[x];
    p.flat(p.n_core + k, l)
}

/// Explicit A from the n⁴ integral tensor (tests and small checks only).
pub(crate) fn explicit_a(kernel: &Kernel, basis: &BasisSet) -> DMatrix<f64> {
    let p = &kernel.part;
    let n = basis.nbf;
    let eri = integrals::eri_tensor(basis);
    let nocc = p.n_occ();
    let nvir = p.n_vir();
    let co = kernel.c.columns(0, nocc);
    let cv = kernel.c.columns(p.n_core, nvir);
    // (i j|a b): transform index by index.
    // t1[i][ν λ σ] = Σ_μ C_μi (μν|λσ)
    let n3 = n * n * n;
    let mut t1 = vec![0.0; nocc * n3];
    for i in 0..nocc {
        for mu in 0..n {
            let cmi = co[(mu, i)];
            if cmi == 0.0 {
                continue;
            }
            let src = &eri[mu * n3..(mu + 1) * n3];
            let dst = &mut t1[i * n3..(i + 1) * n3];
            for (d, s) in dst.iter_mut().zip(src) {
                *d += cmi * s;
            }
        }
    }
    // t2[i j][λσ]
    let n2 = n * n;
    let mut t2 = vec![0.0; nocc * nocc * n2];
    for i in 0..nocc {
        for j in 0..nocc {
            for nu in 0..n {
                let c = co[(nu, j)];
                let src = &t1[i * n3 + nu * n2..i * n3 + (nu + 1) * n2];
                let dst = &mut t2[(i * nocc + j) * n2..(i * nocc + j + 1) * n2];
                for (d, s) in dst.iter_mut().zip(src) {
                    *d += c * s;
                }
            }
        }
    }
    let mut a = DMatrix::zeros(p.sf_dimension(), p.sf_dimension());
    for i in 0..nocc {
        for j in 0..nocc {
            let m =
                DMatrix::from_row_slice(n, n, &t2[(i * nocc + j) * n2..(i * nocc + j + 1) * n2]);
            let ab = cv.transpose() * m * cv;
            for ca in 0..nvir {
                for cb in 0..nvir {
                    let x = p.flat(i, ca);
                    let y = p.flat(j, cb);
                    let mut v = -kernel.cx * ab[(ca, cb)];
                    if i == j {
                        v += kernel.fb_vv[(ca, cb)];
                    }
                    if ca == cb {
                        v -= kernel.fa_oo[(j, i)];
                    }
                    a[(x, y)] = v;
                }
            }
        }
    }
    a
}
