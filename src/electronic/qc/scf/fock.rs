//! The two-electron part of the Fock matrices: the replaceable step of the
//! SCF driver. Hartree–Fock builds G^σ = J[D^α + D^β] − c_x K[D^σ]; a
//! Kohn–Sham builder adds the exchange–correlation potential V^σ_xc and
//! replaces the exchange energy by c_x times it plus E_xc.
//!
//! Energies: E_2 = ½ Σ_σ tr(D^σ (J − c_x K^σ)) (+ E_xc), so that
//! E = tr((D^α + D^β) h) + E_2 + E_nuc.
//!
//! The Coulomb/exchange builds can be incremental (design note: the
//! incremental build is an explicit argument): in integral-direct mode,
//! J/K\[D\] = J/K\[D_prev\] + J/K\[D − D_prev\], which lets the density screening
//! skip most quartets near convergence. Every `rebuild_every` builds, and
//! whenever the driver asks, the build starts afresh to stop round-off from
//! accumulating.

use crate::electronic::qc::basis::BasisSet;
use crate::electronic::qc::integrals::{
    coulomb_exchange_direct, coulomb_exchange_in_core, exchange_in_core, EriStore, JkOptions,
    ShellPairs, TwoElectronError,
};
use nalgebra::DMatrix;

/// Two-electron Fock contributions and energy for one pair of spin densities.
#[derive(Clone, Debug)]
pub struct TwoElectronTerms {
    /// G^α (AO).
    pub g_alpha: DMatrix<f64>,
    /// G^β (AO).
    pub g_beta: DMatrix<f64>,
    /// Coulomb energy ½ tr(D J).
    pub coulomb: f64,
    /// Exact-exchange energy −½ c_x Σ_σ tr(D^σ K^σ).
    pub exchange: f64,
    /// Exchange–correlation energy (0 for Hartree–Fock).
    pub xc: f64,
    /// Electrons counted by the integration grid (None without a grid).
    pub grid_electrons: Option<f64>,
}

impl TwoElectronTerms {
    /// E_2 = Coulomb + exchange + XC.
    pub fn energy(&self) -> f64 {
        self.coulomb + self.exchange + self.xc
    }
}

/// The potential step of the SCF driver.
pub trait FockBuilder {
    /// G^α, G^β and the two-electron energy for the spin densities.
    /// `restricted` promises D^α = D^β (closed shell), which saves one exchange
    /// build and selects the spin-unpolarised functional. `fresh` asks for a
    /// non-incremental build.
    fn build(
        &mut self,
        d_alpha: &DMatrix<f64>,
        d_beta: &DMatrix<f64>,
        restricted: bool,
        fresh: bool,
    ) -> Result<TwoElectronTerms, super::ScfError>;

    /// Whether integrals are held in memory (for reports).
    fn in_core(&self) -> bool;
}

/// Where the electron-repulsion integrals come from.
enum Store {
    InCore(EriStore),
    Direct(ShellPairs),
}

/// J and K matrices, one per density.
pub type JkMatrices = (Vec<DMatrix<f64>>, Vec<DMatrix<f64>>);

/// Densities of the last build with their J and K (incremental mode).
type LastBuild = (Vec<DMatrix<f64>>, Vec<DMatrix<f64>>, Vec<DMatrix<f64>>);

/// Coulomb and exchange builds over one geometry, in-core or direct.
pub struct JkEngine {
    store: Store,
    opts: JkOptions,
    /// Densities and J/K of the last build (incremental direct mode).
    last: Option<LastBuild>,
    builds_since_fresh: usize,
    /// A fresh build at least this often (direct mode).
    pub rebuild_every: usize,
}

impl JkEngine {
    /// Prepare shell pairs (and the packed store if it fits in
    /// `opts.max_in_core_bytes`).
    pub fn new(basis: &BasisSet, opts: JkOptions) -> JkEngine {
        let sp = ShellPairs::new(basis);
        let store = if EriStore::bytes_needed(basis.nbf) <= opts.max_in_core_bytes {
            Store::InCore(EriStore::new(&sp, opts.threshold))
        } else {
            Store::Direct(sp)
        };
        JkEngine {
            store,
            opts,
            last: None,
            builds_since_fresh: 0,
            rebuild_every: 8,
        }
    }

    /// True if the packed store is used.
    pub fn in_core(&self) -> bool {
        matches!(self.store, Store::InCore(_))
    }

    /// K alone for each density (exchange-type builds of the response):
    /// in core without the Coulomb contraction; integral-direct through
    /// [`JkEngine::jk`] (there J costs little beside the integrals).
    pub fn k_only(
        &mut self,
        densities: &[DMatrix<f64>],
    ) -> Result<Vec<DMatrix<f64>>, TwoElectronError> {
        match &self.store {
            Store::InCore(store) => exchange_in_core(store, densities),
            Store::Direct(_) => Ok(self.jk(densities, true, true)?.1),
        }
    }

    /// J and K for each density (K only if `exchange`).
    pub fn jk(
        &mut self,
        densities: &[DMatrix<f64>],
        exchange: bool,
        fresh: bool,
    ) -> Result<JkMatrices, TwoElectronError> {
        match &self.store {
            Store::InCore(store) => {
                let r = coulomb_exchange_in_core(store, densities, exchange)?;
                Ok((r.j, r.k))
            }
            Store::Direct(sp) => {
                let opts = JkOptions {
                    exchange,
                    ..self.opts.clone()
                };
                let usable = !fresh
                    && self.builds_since_fresh < self.rebuild_every
                    && self.last.as_ref().is_some_and(|(d, _, k)| {
                        d.len() == densities.len() && (k.len() == d.len()) == exchange
                    });
                if usable {
                    let (dprev, jprev, kprev) = self.last.as_ref().expect("checked above");
                    let deltas: Vec<DMatrix<f64>> =
                        densities.iter().zip(dprev).map(|(d, p)| d - p).collect();
                    let r = coulomb_exchange_direct(sp, &deltas, &opts)?;
                    let j: Vec<DMatrix<f64>> = r.j.iter().zip(jprev).map(|(a, b)| a + b).collect();
                    let k: Vec<DMatrix<f64>> = r.k.iter().zip(kprev).map(|(a, b)| a + b).collect();
                    self.builds_since_fresh += 1;
                    self.last = Some((densities.to_vec(), j.clone(), k.clone()));
                    Ok((j, k))
                } else {
                    let r = coulomb_exchange_direct(sp, densities, &opts)?;
                    self.builds_since_fresh = 0;
                    self.last = Some((densities.to_vec(), r.j.clone(), r.k.clone()));
                    Ok((r.j, r.k))
                }
            }
        }
    }
}

/// Hartree–Fock (or the exact-exchange part of a hybrid with fraction
/// `exchange_fraction`) potential.
pub struct HartreeFock {
    /// The integral engine.
    pub engine: JkEngine,
    /// c_x: 1 for Hartree–Fock.
    pub exchange_fraction: f64,
}

/// G^σ = J − c_x K^σ and the Coulomb/exchange energies (shared by HF and KS).
pub(crate) fn coulomb_exchange_terms(
    engine: &mut JkEngine,
    cx: f64,
    d_alpha: &DMatrix<f64>,
    d_beta: &DMatrix<f64>,
    restricted: bool,
    fresh: bool,
) -> Result<TwoElectronTerms, TwoElectronError> {
    let want_k = cx != 0.0;
    let (g_alpha, g_beta, coulomb, exchange) = if restricted {
        let (j, k) = engine.jk(std::slice::from_ref(d_alpha), want_k, fresh)?;
        let j = &j[0] * 2.0;
        let coulomb = 0.5 * 2.0 * d_alpha.dot(&j);
        let (g, ex) = if want_k {
            (&j - &k[0] * cx, -cx * d_alpha.dot(&k[0]))
        } else {
            (j.clone(), 0.0)
        };
        (g.clone(), g, coulomb, ex)
    } else {
        let (j, k) = engine.jk(&[d_alpha.clone(), d_beta.clone()], want_k, fresh)?;
        let jt = &j[0] + &j[1];
        let dt = d_alpha + d_beta;
        let coulomb = 0.5 * dt.dot(&jt);
        if want_k {
            let ex = -0.5 * cx * (d_alpha.dot(&k[0]) + d_beta.dot(&k[1]));
            (&jt - &k[0] * cx, &jt - &k[1] * cx, coulomb, ex)
        } else {
            (jt.clone(), jt, coulomb, 0.0)
        }
    };
    Ok(TwoElectronTerms {
        g_alpha,
        g_beta,
        coulomb,
        exchange,
        xc: 0.0,
        grid_electrons: None,
    })
}

impl FockBuilder for HartreeFock {
    fn build(
        &mut self,
        d_alpha: &DMatrix<f64>,
        d_beta: &DMatrix<f64>,
        restricted: bool,
        fresh: bool,
    ) -> Result<TwoElectronTerms, super::ScfError> {
        Ok(coulomb_exchange_terms(
            &mut self.engine,
            self.exchange_fraction,
            d_alpha,
            d_beta,
            restricted,
            fresh,
        )?)
    }

    fn in_core(&self) -> bool {
        self.engine.in_core()
    }
}
