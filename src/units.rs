//! Physical constants and unit conversions.
//!
//! Everything inside flipswarm is in Hartree atomic units: energies in hartree
//! (E_h), lengths in bohr (a_0), times in atomic units of time (ħ/E_h), masses in
//! electron masses (m_e), charges in elementary charges (e). This module holds
//! the conversion factors to the units people read and write (eV, Å, fs, u, K,
//! cm⁻¹, debye) and small helpers that apply them.
//!
//! # Source
//!
//! All values are the CODATA 2018 recommended values: E. Tiesinga, P. J. Mohr,
//! D. B. Newell and B. N. Taylor, "CODATA recommended values of the fundamental
//! physical constants: 2018", Rev. Mod. Phys. 93, 025010 (2021). Constants that
//! are exact in the 2019 SI (c, e, h, k_B, N_A) are given exactly; the others
//! are the CODATA 2018 central values as printed (uncertainties are not carried).
//! `tests/units.rs` checks them against the CODATA 2018 table shipped in the
//! PyPI package `scipy` (fixture `tests/data/chem/codata2018.json`, made by
//! `scripts/reference/codata2018.py`).
//!
//! Factors that CODATA does not list directly are derived here from listed
//! ones, and the derivation is written beside each (e.g. [`DEBYE_IN_E_BOHR`]).
//!
//! # Type-safe lengths
//!
//! [`Bohr`] and [`Angstrom`] are newtypes that convert into each other with
//! [`From`], but cannot be mixed in arithmetic by accident:
//!
//! ```compile_fail
//! use flipswarm::units::{Angstrom, Bohr};
//! let sum = Bohr(1.0) + Angstrom(1.0); // error: no `Add<Angstrom>` for `Bohr`
//! ```
//!
//! ```
//! use flipswarm::units::{Angstrom, Bohr};
//! let sum = Bohr(1.0) + Bohr::from(Angstrom(1.0));
//! assert!((sum.0 - 2.889_726_124_626).abs() < 1e-9);
//! ```

use serde::{Deserialize, Serialize};
use std::fmt;
use std::ops::{Add, Div, Mul, Neg, Sub};

// ---------------------------------------------------------------------------
// Exact SI constants (2019 redefinition of the SI, adopted by CODATA 2018)
// ---------------------------------------------------------------------------

/// Speed of light in vacuum, m s⁻¹ (exact).
pub const SPEED_OF_LIGHT_SI: f64 = 299_792_458.0;
/// Elementary charge, C (exact).
pub const ELEMENTARY_CHARGE_C: f64 = 1.602_176_634e-19;
/// Planck constant, J s (exact).
pub const PLANCK_J_S: f64 = 6.626_070_15e-34;
/// Boltzmann constant, J K⁻¹ (exact).
pub const BOLTZMANN_J_PER_K: f64 = 1.380_649e-23;
/// Avogadro constant, mol⁻¹ (exact).
pub const AVOGADRO_PER_MOL: f64 = 6.022_140_76e23;

// ---------------------------------------------------------------------------
// Atomic-unit conversion factors (CODATA 2018)
// ---------------------------------------------------------------------------

/// One hartree in electronvolts (CODATA 2018 "Hartree energy in eV").
pub const HARTREE_IN_EV: f64 = 27.211_386_245_988;
/// One bohr in ångström (CODATA 2018 "Bohr radius" 0.529 177 210 903 × 10⁻¹⁰ m).
pub const BOHR_IN_ANGSTROM: f64 = 0.529_177_210_903;
/// One bohr in metres (CODATA 2018 "Bohr radius").
pub const BOHR_IN_M: f64 = BOHR_IN_ANGSTROM * 1.0e-10;
/// The atomic unit of time (ħ/E_h) in femtoseconds (CODATA 2018
/// "atomic unit of time" 2.418 884 326 5857 × 10⁻¹⁷ s).
pub const AU_TIME_IN_FS: f64 = 0.024_188_843_265_857;
/// The atomic mass constant m_u = 1 u = 1 Da in electron masses.
///
/// CODATA 2018 lists m_e = 5.485 799 090 65 × 10⁻⁴ u ("electron mass in u");
/// m_u/m_e is its inverse, 1822.888 486 209 to the printed precision.
pub const AMU_IN_ME: f64 = 1_822.888_486_209;
/// Boltzmann constant in hartree per kelvin (CODATA 2018
/// "kelvin-hartree relationship").
pub const BOLTZMANN_IN_HARTREE_PER_K: f64 = 3.166_811_563_455_6e-6;
/// Boltzmann constant in electronvolts per kelvin, k_B/e (exact in the 2019 SI).
pub const BOLTZMANN_IN_EV_PER_K: f64 = BOLTZMANN_J_PER_K / ELEMENTARY_CHARGE_C;
/// One hartree in wavenumbers, cm⁻¹ (CODATA 2018
/// "hartree-inverse meter relationship" 2.194 746 313 632 × 10⁷ m⁻¹).
pub const HARTREE_IN_CM1: f64 = 219_474.631_363_2;
/// h·c in hartree·cm: the energy of a photon of wavenumber 1 cm⁻¹ is
/// `HC_IN_HARTREE_CM` hartree. Derived as `1 / HARTREE_IN_CM1`.
pub const HC_IN_HARTREE_CM: f64 = 1.0 / HARTREE_IN_CM1;
/// Speed of light in atomic units (bohr per atomic unit of time), equal to the
/// inverse fine-structure constant 1/α (CODATA 2018 "inverse fine-structure
/// constant").
pub const SPEED_OF_LIGHT_AU: f64 = 137.035_999_084;
/// One debye in atomic units of electric dipole moment (e·bohr).
///
/// The debye is defined as 10⁻¹⁸ statC·cm = 10⁻²¹/c C·m (c in m s⁻¹), so
/// 1 D = 10⁻²¹ / (c · e · a_0) e·a_0 with the exact c and e and the CODATA 2018
/// Bohr radius: 0.393 430 269 52.
pub const DEBYE_IN_E_BOHR: f64 = 1.0e-21 / (SPEED_OF_LIGHT_SI * ELEMENTARY_CHARGE_C * BOHR_IN_M);

// ---------------------------------------------------------------------------
// Conversion helpers
// ---------------------------------------------------------------------------

/// Electronvolts → hartree.
#[inline]
pub fn ev_to_hartree(ev: f64) -> f64 {
    ev / HARTREE_IN_EV
}

/// Hartree → electronvolts.
#[inline]
pub fn hartree_to_ev(hartree: f64) -> f64 {
    hartree * HARTREE_IN_EV
}

/// Ångström → bohr.
#[inline]
pub fn angstrom_to_bohr(angstrom: f64) -> f64 {
    angstrom / BOHR_IN_ANGSTROM
}

/// Bohr → ångström.
#[inline]
pub fn bohr_to_angstrom(bohr: f64) -> f64 {
    bohr * BOHR_IN_ANGSTROM
}

/// Femtoseconds → atomic units of time.
#[inline]
pub fn fs_to_au(fs: f64) -> f64 {
    fs / AU_TIME_IN_FS
}

/// Atomic units of time → femtoseconds.
#[inline]
pub fn au_to_fs(au: f64) -> f64 {
    au * AU_TIME_IN_FS
}

/// Unified atomic mass units (u, Da) → electron masses.
#[inline]
pub fn amu_to_me(amu: f64) -> f64 {
    amu * AMU_IN_ME
}

/// Electron masses → unified atomic mass units (u, Da).
#[inline]
pub fn me_to_amu(me: f64) -> f64 {
    me / AMU_IN_ME
}

/// Temperature in kelvin → thermal energy k_B·T in hartree.
#[inline]
pub fn kelvin_to_hartree(kelvin: f64) -> f64 {
    kelvin * BOLTZMANN_IN_HARTREE_PER_K
}

/// Energy in hartree → temperature T = E/k_B in kelvin.
#[inline]
pub fn hartree_to_kelvin(hartree: f64) -> f64 {
    hartree / BOLTZMANN_IN_HARTREE_PER_K
}

/// Wavenumber in cm⁻¹ → energy in hartree.
#[inline]
pub fn cm1_to_hartree(cm1: f64) -> f64 {
    cm1 / HARTREE_IN_CM1
}

/// Energy in hartree → wavenumber in cm⁻¹.
#[inline]
pub fn hartree_to_cm1(hartree: f64) -> f64 {
    hartree * HARTREE_IN_CM1
}

/// Dipole moment in debye → atomic units (e·bohr).
#[inline]
pub fn debye_to_au(debye: f64) -> f64 {
    debye * DEBYE_IN_E_BOHR
}

/// Dipole moment in atomic units (e·bohr) → debye.
#[inline]
pub fn au_to_debye(au: f64) -> f64 {
    au / DEBYE_IN_E_BOHR
}

// ---------------------------------------------------------------------------
// Length newtypes
// ---------------------------------------------------------------------------

/// A length in bohr (atomic units). Converts to and from [`Angstrom`] with
/// [`From`]; arithmetic only combines `Bohr` with `Bohr` (and scales by `f64`).
#[derive(Debug, Clone, Copy, PartialEq, PartialOrd, Default, Serialize, Deserialize)]
#[serde(transparent)]
pub struct Bohr(pub f64);

/// A length in ångström. Converts to and from [`Bohr`] with [`From`];
/// arithmetic only combines `Angstrom` with `Angstrom` (and scales by `f64`).
#[derive(Debug, Clone, Copy, PartialEq, PartialOrd, Default, Serialize, Deserialize)]
#[serde(transparent)]
pub struct Angstrom(pub f64);

impl From<Angstrom> for Bohr {
    #[inline]
    fn from(a: Angstrom) -> Self {
        Bohr(angstrom_to_bohr(a.0))
    }
}

impl From<Bohr> for Angstrom {
    #[inline]
    fn from(b: Bohr) -> Self {
        Angstrom(bohr_to_angstrom(b.0))
    }
}

macro_rules! length_ops {
    ($t:ident, $suffix:literal) => {
        impl Add for $t {
            type Output = $t;
            #[inline]
            fn add(self, rhs: $t) -> $t {
                $t(self.0 + rhs.0)
            }
        }
        impl Sub for $t {
            type Output = $t;
            #[inline]
            fn sub(self, rhs: $t) -> $t {
                $t(self.0 - rhs.0)
            }
        }
        impl Neg for $t {
            type Output = $t;
            #[inline]
            fn neg(self) -> $t {
                $t(-self.0)
            }
        }
        impl Mul<f64> for $t {
            type Output = $t;
            #[inline]
            fn mul(self, rhs: f64) -> $t {
                $t(self.0 * rhs)
            }
        }
        impl Div<f64> for $t {
            type Output = $t;
            #[inline]
            fn div(self, rhs: f64) -> $t {
                $t(self.0 / rhs)
            }
        }
        impl fmt::Display for $t {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                fmt::Display::fmt(&self.0, f)?;
                f.write_str($suffix)
            }
        }
    };
}

length_ops!(Bohr, " bohr");
length_ops!(Angstrom, " Å");
