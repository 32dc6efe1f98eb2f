//! Excited states and their properties: energies, <S²>, dominant
//! configurations, one-particle (transition) densities, transition dipoles
//! and oscillator strengths. Conventions in the module docs of
//! [`super`](crate::electronic::qc::response).

use super::davidson::SolverInfo;
use super::kernel::Partition;
use super::ResponseError;
use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

/// Which response method made the states.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Method {
    /// Collinear SF-TDA from the Ms = +1 reference.
    SpinFlip,
    /// MRSF-TDDFT (both references, spin-adapted).
    Mrsf,
}

/// Spin of a state.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum StateSpin {
    /// From the MRSF singlet block.
    Singlet,
    /// From the MRSF triplet block.
    Triplet,
    /// Not spin-adapted (SF-TDA): see the state's <S²>.
    Unadapted,
}

impl std::fmt::Display for StateSpin {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            StateSpin::Singlet => "singlet",
            StateSpin::Triplet => "triplet",
            StateSpin::Unadapted => "spin-flip",
        })
    }
}

/// One response state.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ExcitedState {
    /// Singlet / triplet (MRSF) or unadapted (SF).
    pub spin: StateSpin,
    /// Root number within its block (0-based, ascending energy).
    pub root: usize,
    /// Total energy (Eh).
    pub energy: f64,
    /// Energy relative to the ROKS reference triplet (Eh; negative below it).
    pub omega: f64,
    /// Energy relative to S0, the lowest singlet (Eh); None if no singlet was
    /// computed (SF: relative to the lowest state).
    pub excitation: Option<f64>,
    /// <S²> of the determinant expansion.
    pub s_squared: f64,
    /// Eigenvector in the solved space (spin-adapted for MRSF, SF for SF).
    pub amplitudes: Vec<f64>,
    /// Amplitudes x⁺_ia of Φ+(i→a) (n_occ × n_vir, rows C∪O, columns O∪V).
    pub x_plus: DMatrix<f64>,
    /// Amplitudes x⁻_ia of Φ−(i→a) = R Φ+(i→a) (zero for SF and on OO).
    pub x_minus: DMatrix<f64>,
    /// Configurations with weight ≥ 5 %, largest first: (label, weight 0–1).
    pub dominant: Vec<(String, f64)>,
    /// Weight of the CV configurations.
    pub cv_weight: f64,
}

impl ExcitedState {
    /// "O1→O2 72%, C5→O1 20%".
    pub fn dominant_text(&self) -> String {
        self.dominant
            .iter()
            .map(|(l, w)| format!("{l} {:.0}%", 100.0 * w))
            .collect::<Vec<_>>()
            .join(", ")
    }
}

/// A transition between two states of the same spin.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct Transition {
    /// Lower state (index into [`ExcitedStates::states`]).
    pub from: usize,
    /// Upper state.
    pub to: usize,
    /// E_to − E_from (Eh).
    pub delta_energy: f64,
    /// Transition dipole <from|μ|to> (a.u.).
    pub dipole: [f64; 3],
    /// Oscillator strength (2/3) ΔE |μ|².
    pub oscillator_strength: f64,
}

/// The states of one response calculation, in ascending energy.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ExcitedStates {
    /// SF or MRSF.
    pub method: Method,
    /// E_ROKS of the reference triplet (Eh).
    pub reference_energy: f64,
    /// c_x used in A.
    pub exact_exchange: f64,
    /// κ of the cross-reference couplings (MRSF; 0 for SF).
    pub cross_coupling_scale: f64,
    /// Orbital partition.
    pub partition: Partition,
    /// The states, ascending in energy.
    pub states: Vec<ExcitedState>,
    /// Index of S0 (lowest singlet; SF: lowest state).
    pub ground: Option<usize>,
    /// Eigensolver statistics per block (SF: one; MRSF: singlet, triplet).
    pub solver: Vec<SolverInfo>,
    /// Orbitals (nbf × nmo).
    pub orbitals: DMatrix<f64>,
    /// Dipole matrices in the MO basis.
    pub dipole_mo: [DMatrix<f64>; 3],
}

/// Spin-summed SF-frame one-particle density <x|E|y> (MO, n_mo × n_mo).
fn sf_tdm(p: &Partition, x: &DMatrix<f64>, y: &DMatrix<f64>) -> DMatrix<f64> {
    let nmo = p.n_mo;
    let nocc = p.n_occ();
    let nc = p.n_core;
    let ov = x.dot(y);
    let mut g = DMatrix::zeros(nmo, nmo);
    // α: <x|y> δ_ij − (y xᵀ)_ij on C∪O.
    let yx = y * x.transpose();
    for i in 0..nocc {
        for j in 0..nocc {
            g[(i, j)] -= yx[(i, j)];
        }
        g[(i, i)] += ov;
    }
    // β: <x|y> δ on C, (xᵀ y) on O∪V.
    for c in 0..nc {
        g[(c, c)] += ov;
    }
    let xy = x.transpose() * y;
    for a in 0..p.n_vir() {
        for b in 0..p.n_vir() {
            g[(nc + a, nc + b)] += xy[(a, b)];
        }
    }
    g
}

/// R applied to the OO part of an SF matrix (zero elsewhere):
/// R Φ+(O1→O1) = −Φ+(O2→O2), R Φ+(O2→O2) = −Φ+(O1→O1), O1→O2 and O2→O1 fixed.
pub(crate) fn rotate_oo(p: &Partition, x: &DMatrix<f64>) -> DMatrix<f64> {
    let nc = p.n_core;
    let mut r = DMatrix::zeros(x.nrows(), x.ncols());
    r[(nc, 0)] = -x[(nc + 1, 1)];
    r[(nc + 1, 1)] = -x[(nc, 0)];
    r[(nc, 1)] = x[(nc, 1)];
    r[(nc + 1, 0)] = x[(nc + 1, 0)];
    r
}

impl ExcitedStates {
    fn state(&self, i: usize) -> Result<&ExcitedState, ResponseError> {
        self.states.get(i).ok_or(ResponseError::StateIndex {
            index: i,
            count: self.states.len(),
        })
    }

    /// Spin-summed one-particle transition density γ^{IJ}_pq =
    /// <ψ_I|Σ_σ a†_pσ a_qσ|ψ_J> in the MO basis (n_mo × n_mo).
    pub fn transition_density_mo(&self, i: usize, j: usize) -> Result<DMatrix<f64>, ResponseError> {
        let a = self.state(i)?;
        let b = self.state(j)?;
        let p = &self.partition;
        let mut g = sf_tdm(p, &a.x_plus, &b.x_plus);
        if self.method == Method::Mrsf {
            g += sf_tdm(p, &a.x_minus, &b.x_minus);
            g += sf_tdm(p, &rotate_oo(p, &a.x_plus), &b.x_minus);
            g += sf_tdm(p, &a.x_minus, &rotate_oo(p, &b.x_plus));
        }
        Ok(g)
    }

    /// Spin-summed transition density in the AO basis, D = C γ Cᵀ, such that
    /// <ψ_I|Ô|ψ_J> = Σ_μν D_μν O_μν (I = J: the state density).
    pub fn transition_density(&self, i: usize, j: usize) -> Result<DMatrix<f64>, ResponseError> {
        let g = self.transition_density_mo(i, j)?;
        Ok(&self.orbitals * g * self.orbitals.transpose())
    }

    /// The state's total density minus that of the reference determinant
    /// (AO); the difference of two of these is the S0-relative one.
    pub fn difference_density(&self, i: usize) -> Result<DMatrix<f64>, ResponseError> {
        let mut g = self.transition_density_mo(i, i)?;
        let p = &self.partition;
        for c in 0..p.n_core {
            g[(c, c)] -= 2.0;
        }
        for k in 0..2 {
            g[(p.n_core + k, p.n_core + k)] -= 1.0;
        }
        Ok(&self.orbitals * g * self.orbitals.transpose())
    }

    /// Transition dipole <ψ_I|μ|ψ_J> = −Σ γ_pq <p|r|q> (a.u.); for I = J the
    /// electronic dipole relative to the centre of nuclear charge.
    pub fn transition_dipole(&self, i: usize, j: usize) -> Result<[f64; 3], ResponseError> {
        let g = self.transition_density_mo(i, j)?;
        Ok([
            -g.dot(&self.dipole_mo[0]),
            -g.dot(&self.dipole_mo[1]),
            -g.dot(&self.dipole_mo[2]),
        ])
    }

    /// f = (2/3) (E_J − E_I) |μ_IJ|².
    pub fn oscillator_strength(&self, i: usize, j: usize) -> Result<f64, ResponseError> {
        let mu = self.transition_dipole(i, j)?;
        let de = self.state(j)?.energy - self.state(i)?.energy;
        Ok(2.0 / 3.0 * de * (mu[0] * mu[0] + mu[1] * mu[1] + mu[2] * mu[2]))
    }

    /// All transitions between states of the same spin (MRSF: singlet–singlet
    /// including S0→Sn, and triplet–triplet; SF: all pairs), lower → upper.
    pub fn transitions(&self) -> Vec<Transition> {
        let mut out = Vec::new();
        for i in 0..self.states.len() {
            for j in i + 1..self.states.len() {
                if self.states[i].spin != self.states[j].spin {
                    continue;
                }
                // Indices are in range by construction.
                if let (Ok(mu), Ok(f)) =
                    (self.transition_dipole(i, j), self.oscillator_strength(i, j))
                {
                    out.push(Transition {
                        from: i,
                        to: j,
                        delta_energy: self.states[j].energy - self.states[i].energy,
                        dipole: mu,
                        oscillator_strength: f,
                    });
                }
            }
        }
        out
    }

    /// Short name of state `i`: MRSF "S0", "S1", … and "T1", "T2", … by
    /// block root; SF "SF0", "SF1", … (ascending energy).
    pub fn label(&self, i: usize) -> Result<String, ResponseError> {
        let s = self.state(i)?;
        Ok(match s.spin {
            StateSpin::Singlet => format!("S{}", s.root),
            StateSpin::Triplet => format!("T{}", s.root + 1),
            StateSpin::Unadapted => format!("SF{}", s.root),
        })
    }

    /// Oscillator strength from S0 to state `i` if it has S0's spin (None
    /// for S0 itself, other spins, or no S0).
    pub fn oscillator_from_ground(&self, i: usize) -> Result<Option<f64>, ResponseError> {
        let s = self.state(i)?;
        match self.ground {
            Some(g) if g != i && self.states[g].spin == s.spin => {
                Ok(Some(self.oscillator_strength(g, i)?))
            }
            _ => Ok(None),
        }
    }

    /// Sort by energy, find S0 and fill the excitation energies.
    pub(crate) fn finish(&mut self) {
        self.states.sort_by(|a, b| a.energy.total_cmp(&b.energy));
        self.ground = match self.method {
            Method::Mrsf => self
                .states
                .iter()
                .position(|s| s.spin == StateSpin::Singlet),
            Method::SpinFlip => (!self.states.is_empty()).then_some(0),
        };
        let e0 = self.ground.map(|g| self.states[g].energy);
        for s in &mut self.states {
            s.excitation = e0.map(|e| s.energy - e);
        }
    }
}

/// Sign convention: the largest-magnitude amplitude is positive.
pub(crate) fn fix_phase(v: &mut nalgebra::DVector<f64>) {
    let mut best = 0;
    for k in 0..v.len() {
        if v[k].abs() > v[best].abs() + 1e-12 {
            best = k;
        }
    }
    if !v.is_empty() && v[best] < 0.0 {
        *v *= -1.0;
    }
}

/// Configurations of weight ≥ 5 %, largest first (at most 6).
pub(crate) fn dominant(labels: &[String], v: &nalgebra::DVector<f64>) -> Vec<(String, f64)> {
    let mut w: Vec<(String, f64)> = labels
        .iter()
        .zip(v.iter())
        .map(|(l, x)| (l.clone(), x * x))
        .filter(|(_, w)| *w >= 0.05)
        .collect();
    w.sort_by(|a, b| b.1.total_cmp(&a.1));
    w.truncate(6);
    w
}
