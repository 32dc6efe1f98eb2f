//! The chemical elements hydrogen (Z = 1) to krypton (Z = 36).
//!
//! Each element carries its symbol, IUPAC English name, atomic number and the
//! mass number and atomic mass of its most abundant naturally occurring
//! isotope. Dynamics uses isotope masses (not standard atomic weights), because
//! a trajectory is run for one molecule made of definite nuclides.
//!
//! # Sources
//!
//! * Isotope masses: the atomic mass evaluation AME2020, M. Wang, W. J. Huang,
//!   F. G. Kondev, G. Audi and S. Naimi, Chinese Physics C 45, 030003 (2021),
//!   in unified atomic mass units u (¹²C ≡ 12 u exactly), rounded to the
//!   precision the evaluation supports.
//! * Choice of the most abundant isotope: IUPAC/CIAAW isotopic compositions of
//!   the elements (Ar: atmospheric composition, ⁴⁰Ar).
//! * Names: IUPAC spellings ("aluminium", "sulfur").
//!
//! `tests/chem.rs` compares every entry, isotope choice and mass to 1e-9 u,
//! against `tests/data/chem/isotope_masses.json`, generated from the PyPI
//! package `periodictable` by `scripts/reference/element_masses.py`.

use crate::units::AMU_IN_ME;
use serde::{Deserialize, Deserializer, Serialize, Serializer};
use std::fmt;
use std::str::FromStr;
use thiserror::Error;

/// Static data of one element.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ElementData {
    /// Atomic number Z.
    pub atomic_number: u8,
    /// Chemical symbol with standard capitalisation, e.g. `"Cl"`.
    pub symbol: &'static str,
    /// IUPAC English name in lower case, e.g. `"chlorine"`.
    pub name: &'static str,
    /// Mass number A of the most abundant isotope.
    pub mass_number: u16,
    /// Atomic mass of that isotope in u (AME2020).
    pub isotope_mass_amu: f64,
}

const fn e(
    atomic_number: u8,
    symbol: &'static str,
    name: &'static str,
    mass_number: u16,
    isotope_mass_amu: f64,
) -> ElementData {
    ElementData {
        atomic_number,
        symbol,
        name,
        mass_number,
        isotope_mass_amu,
    }
}

/// Highest atomic number known to this table (krypton).
pub const MAX_ATOMIC_NUMBER: u8 = 36;

/// The table, indexed by `Z - 1`. Masses: AME2020 (see module docs).
static TABLE: [ElementData; MAX_ATOMIC_NUMBER as usize] = [
    e(1, "H", "hydrogen", 1, 1.007_825_031_9),
    e(2, "He", "helium", 4, 4.002_603_254_13),
    e(3, "Li", "lithium", 7, 7.016_003_434),
    e(4, "Be", "beryllium", 9, 9.012_183_06),
    e(5, "B", "boron", 11, 11.009_305_167),
    e(6, "C", "carbon", 12, 12.0),
    e(7, "N", "nitrogen", 14, 14.003_074_004_25),
    e(8, "O", "oxygen", 16, 15.994_914_619_3),
    e(9, "F", "fluorine", 19, 18.998_403_162_1),
    e(10, "Ne", "neon", 20, 19.992_440_175_3),
    e(11, "Na", "sodium", 23, 22.989_769_282),
    e(12, "Mg", "magnesium", 24, 23.985_041_689),
    e(13, "Al", "aluminium", 27, 26.981_538_41),
    e(14, "Si", "silicon", 28, 27.976_926_534_4),
    e(15, "P", "phosphorus", 31, 30.973_761_997_7),
    e(16, "S", "sulfur", 32, 31.972_071_173_5),
    e(17, "Cl", "chlorine", 35, 34.968_852_69),
    e(18, "Ar", "argon", 40, 39.962_383_122),
    e(19, "K", "potassium", 39, 38.963_706_485),
    e(20, "Ca", "calcium", 40, 39.962_590_851),
    e(21, "Sc", "scandium", 45, 44.955_907_1),
    e(22, "Ti", "titanium", 48, 47.947_940_68),
    e(23, "V", "vanadium", 51, 50.943_957_66),
    e(24, "Cr", "chromium", 52, 51.940_504_71),
    e(25, "Mn", "manganese", 55, 54.938_043_04),
    e(26, "Fe", "iron", 56, 55.934_935_54),
    e(27, "Co", "cobalt", 59, 58.933_193_5),
    e(28, "Ni", "nickel", 58, 57.935_341_7),
    e(29, "Cu", "copper", 63, 62.929_597_1),
    e(30, "Zn", "zinc", 64, 63.929_141_8),
    e(31, "Ga", "gallium", 69, 68.925_573_5),
    e(32, "Ge", "germanium", 74, 73.921_177_761),
    e(33, "As", "arsenic", 75, 74.921_594_6),
    e(34, "Se", "selenium", 80, 79.916_521_8),
    e(35, "Br", "bromine", 79, 78.918_337_6),
    e(36, "Kr", "krypton", 84, 83.911_497_727),
];

/// Why an element could not be identified.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum ElementError {
    /// The text was empty (or only whitespace).
    #[error("empty element symbol")]
    Empty,
    /// No element H–Kr has this symbol.
    #[error("unknown element symbol `{0}` (known: H to Kr, Z = 1 to 36)")]
    UnknownSymbol(String),
    /// The atomic number is outside 1–36.
    #[error("atomic number {0} is outside the supported range 1 to 36 (H to Kr)")]
    UnknownAtomicNumber(u64),
}

/// A chemical element from H to Kr. A small `Copy` handle (its atomic number);
/// every value is valid by construction.
///
/// ```
/// use flipswarm::chem::Element;
/// let cl = Element::from_symbol("CL").unwrap();
/// assert_eq!(cl.symbol(), "Cl");
/// assert_eq!(cl.atomic_number(), 17);
/// assert_eq!(Element::from_atomic_number(17).unwrap(), cl);
/// assert!(Element::from_symbol("Xx").is_err());
/// ```
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Element(u8);

impl Element {
    /// Look an element up by its symbol, ignoring case and surrounding
    /// whitespace (`"c"`, `"Cl"`, `"CL"` and `"cl"` all work).
    pub fn from_symbol(symbol: &str) -> Result<Element, ElementError> {
        let s = symbol.trim();
        if s.is_empty() {
            return Err(ElementError::Empty);
        }
        TABLE
            .iter()
            .find(|d| d.symbol.eq_ignore_ascii_case(s))
            .map(|d| Element(d.atomic_number))
            .ok_or_else(|| ElementError::UnknownSymbol(s.to_string()))
    }

    /// Look an element up by atomic number (1 to 36).
    pub fn from_atomic_number(z: u64) -> Result<Element, ElementError> {
        if (1..=u64::from(MAX_ATOMIC_NUMBER)).contains(&z) {
            Ok(Element(z as u8))
        } else {
            Err(ElementError::UnknownAtomicNumber(z))
        }
    }

    /// Parse either a symbol (`"O"`, `"o"`) or an atomic number written in
    /// decimal digits (`"8"`), as found in XYZ files. Also available as
    /// [`str::parse`] through [`FromStr`].
    pub fn parse_symbol_or_number(text: &str) -> Result<Element, ElementError> {
        let s = text.trim();
        if !s.is_empty() && s.bytes().all(|b| b.is_ascii_digit()) {
            // Too many digits to fit in u64 is still just an unknown number.
            let z = s.parse::<u64>().unwrap_or(u64::MAX);
            Element::from_atomic_number(z)
        } else {
            Element::from_symbol(s)
        }
    }

    /// All elements in order of atomic number.
    pub fn all() -> impl Iterator<Item = Element> {
        (1..=MAX_ATOMIC_NUMBER).map(Element)
    }

    /// The element's static data.
    pub fn data(self) -> &'static ElementData {
        &TABLE[usize::from(self.0) - 1]
    }

    /// Atomic number Z.
    pub fn atomic_number(self) -> u8 {
        self.0
    }

    /// Symbol with standard capitalisation.
    pub fn symbol(self) -> &'static str {
        self.data().symbol
    }

    /// IUPAC English name, lower case.
    pub fn name(self) -> &'static str {
        self.data().name
    }

    /// Mass number of the most abundant isotope.
    pub fn mass_number(self) -> u16 {
        self.data().mass_number
    }

    /// Mass of the most abundant isotope in u (AME2020).
    pub fn isotope_mass_amu(self) -> f64 {
        self.data().isotope_mass_amu
    }

    /// Mass of the most abundant isotope in electron masses (atomic units).
    pub fn isotope_mass_me(self) -> f64 {
        self.data().isotope_mass_amu * AMU_IN_ME
    }
}

impl fmt::Debug for Element {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Element({})", self.symbol())
    }
}

impl fmt::Display for Element {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.symbol())
    }
}

impl FromStr for Element {
    type Err = ElementError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Element::parse_symbol_or_number(s)
    }
}

impl TryFrom<u8> for Element {
    type Error = ElementError;
    fn try_from(z: u8) -> Result<Self, Self::Error> {
        Element::from_atomic_number(u64::from(z))
    }
}

/// Serialised as its symbol (`"Cl"`); deserialised from a symbol (any case)
/// or an atomic number written as a string.
impl Serialize for Element {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(self.symbol())
    }
}

impl<'de> Deserialize<'de> for Element {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        let s = String::deserialize(deserializer)?;
        Element::parse_symbol_or_number(&s).map_err(serde::de::Error::custom)
    }
}
