//! Contracted Gaussian basis sets: data files, normalisation, and the shells
//! of a basis placed on a molecule.
//!
//! # Data
//!
//! The built-in basis sets (STO-3G, 3-21G, 6-31G, 6-31G*, 6-31G**, 6-31+G*,
//! cc-pVDZ, def2-SVP; H–Kr where the set defines them, 6-31+G* H–Ar) are the
//! JSON files in `data/basis/`, written by `scripts/reference/basis_sets.py`
//! from the basis-set-exchange package (J. Chem. Inf. Model. 59, 4814 (2019);
//! licence notice and data versions beside the files). They are embedded in the
//! library with `include_str!`, so a user needs no data directory. A user can
//! supply another basis in the same JSON schema ([`BasisSetData::from_json_str`],
//! [`BasisSetData::from_file`]).
//!
//! # Cartesian or spherical
//!
//! By common practice the Pople sets (STO-3G, 3-21G, 6-31G family) use
//! Cartesian d shells (6d) and the correlation-consistent and def2 sets use
//! spherical (pure) d and f shells; [`BasisSetData::default_harmonics`] records
//! the choice and [`BasisSet::new`] accepts an override.
//!
//! # Normalisation and order
//!
//! Contraction coefficients in the files refer to normalised primitives. A
//! [`Shell`] stores coefficients that already contain the primitive
//! normalisation of x^l e^{−αr²}, N_l(α)² = (2α/π)^{3/2} (4α)^l / (2l−1)!!, and
//! are scaled so that the contracted x^l component has unit self-overlap.
//! The integral code then normalises every Cartesian component to one (in
//! Cartesian mode) or forms unit-normalised real solid harmonics (spherical mode).
//!
//! AO order: atoms in molecule order; within an atom, shells sorted by angular
//! momentum (stable in file order); Cartesian components xx, xy, xz, yy, yz, zz
//! (x power descending, then y); spherical components m = −l…l, except p shells,
//! which are always x, y, z.

use crate::chem::{Element, Molecule};
use serde::Deserialize;
use std::collections::BTreeMap;
use std::path::Path;
use thiserror::Error;

/// Highest angular momentum the integral code handles.
pub const MAX_L: usize = 4;

/// Cartesian (6d, 10f) or spherical (5d, 7f) shells for l ≥ 2.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Harmonics {
    /// All (l+1)(l+2)/2 Cartesian components.
    Cartesian,
    /// The 2l+1 real solid harmonics.
    Spherical,
}

/// Errors from reading basis data or placing a basis on a molecule.
#[derive(Debug, Error)]
pub enum BasisError {
    /// The name is not one of the built-in basis sets.
    #[error("unknown basis set `{name}`; available: {available}")]
    UnknownBasis {
        /// The name asked for.
        name: String,
        /// The built-in names, comma separated.
        available: String,
    },
    /// The basis set does not define the element.
    #[error("basis set `{basis}` has no functions for element {element} (Z = {z})")]
    MissingElement {
        /// The element symbol.
        element: String,
        /// Its atomic number.
        z: u8,
        /// The basis-set name.
        basis: String,
    },
    /// The data could not be parsed.
    #[error("basis data `{source_name}`: {message}")]
    Parse {
        /// File name or basis name.
        source_name: String,
        /// What was wrong.
        message: String,
    },
    /// The file could not be read.
    #[error("cannot read basis file {path}: {source}")]
    Io {
        /// The path.
        path: String,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
    /// A shell with angular momentum above [`MAX_L`].
    #[error("basis set `{basis}`, element {element}: angular momentum {l} exceeds the supported maximum {max}")]
    AngularMomentumTooHigh {
        /// The basis-set name.
        basis: String,
        /// The element symbol.
        element: String,
        /// The angular momentum.
        l: usize,
        /// [`MAX_L`].
        max: usize,
    },
    /// The data contain an effective core potential (not supported).
    #[error("basis set `{basis}`, element {element}: effective core potentials are not supported")]
    EcpNotSupported {
        /// The basis-set name.
        basis: String,
        /// The element symbol.
        element: String,
    },
}

/// One contraction as read from the data: angular momentum, exponents and the
/// coefficients of normalised primitives.
#[derive(Clone, Debug, PartialEq)]
pub struct ShellData {
    /// Angular momentum.
    pub l: usize,
    /// Primitive exponents (bohr⁻²).
    pub exponents: Vec<f64>,
    /// Contraction coefficients of normalised primitives.
    pub coefficients: Vec<f64>,
}

/// A basis set as data: contractions per element.
#[derive(Clone, Debug, PartialEq)]
pub struct BasisSetData {
    /// The name (as given in the file).
    pub name: String,
    /// Contractions per atomic number, in file order (general contractions
    /// and fused sp shells already split into single contractions).
    pub elements: BTreeMap<u8, Vec<ShellData>>,
    /// Cartesian or spherical by the family's common practice.
    pub default_harmonics: Harmonics,
}

/// Built-in basis sets: (canonical name, file stem, harmonics, JSON text).
const BUILTIN: &[(&str, Harmonics, &str)] = &[
    (
        "STO-3G",
        Harmonics::Cartesian,
        include_str!("../../../data/basis/sto-3g.json"),
    ),
    (
        "3-21G",
        Harmonics::Cartesian,
        include_str!("../../../data/basis/3-21g.json"),
    ),
    (
        "6-31G",
        Harmonics::Cartesian,
        include_str!("../../../data/basis/6-31g.json"),
    ),
    (
        "6-31G*",
        Harmonics::Cartesian,
        include_str!("../../../data/basis/6-31g_st.json"),
    ),
    (
        "6-31G**",
        Harmonics::Cartesian,
        include_str!("../../../data/basis/6-31g_st_st.json"),
    ),
    (
        "6-31+G*",
        Harmonics::Cartesian,
        include_str!("../../../data/basis/6-31+g_st.json"),
    ),
    (
        "cc-pVDZ",
        Harmonics::Spherical,
        include_str!("../../../data/basis/cc-pvdz.json"),
    ),
    (
        "def2-SVP",
        Harmonics::Spherical,
        include_str!("../../../data/basis/def2-svp.json"),
    ),
];

/// Names of the built-in basis sets.
pub fn builtin_basis_names() -> Vec<&'static str> {
    BUILTIN.iter().map(|b| b.0).collect()
}

fn canonical_key(name: &str) -> String {
    let k = name.trim().to_ascii_lowercase().replace(' ', "");
    match k.as_str() {
        "6-31g(d)" => "6-31g*".into(),
        "6-31g(d,p)" => "6-31g**".into(),
        "6-31+g(d)" => "6-31+g*".into(),
        _ => k,
    }
}

// --- the JSON schema of the basis-set-exchange package (the parts we read) ---

#[derive(Deserialize)]
struct JsonFile {
    name: Option<String>,
    elements: BTreeMap<String, JsonElement>,
}
#[derive(Deserialize)]
struct JsonElement {
    #[serde(default)]
    electron_shells: Vec<JsonShell>,
    #[serde(default)]
    ecp_potentials: Option<serde_json::Value>,
}
#[derive(Deserialize)]
struct JsonShell {
    angular_momentum: Vec<usize>,
    exponents: Vec<String>,
    coefficients: Vec<Vec<String>>,
}

fn parse_num(text: &str, src: &str) -> Result<f64, BasisError> {
    text.trim()
        .replace(['D', 'd'], "E")
        .parse::<f64>()
        .ok()
        .filter(|v| v.is_finite())
        .ok_or_else(|| BasisError::Parse {
            source_name: src.to_string(),
            message: format!("`{text}` is not a number"),
        })
}

impl BasisSetData {
    /// A built-in basis set by name (case-insensitive; `6-31G(d)` and
    /// `6-31G(d,p)` are accepted for 6-31G* and 6-31G**).
    pub fn builtin(name: &str) -> Result<BasisSetData, BasisError> {
        let key = canonical_key(name);
        let (canon, harm, text) = BUILTIN
            .iter()
            .find(|b| b.0.to_ascii_lowercase() == key)
            .ok_or_else(|| BasisError::UnknownBasis {
                name: name.to_string(),
                available: builtin_basis_names().join(", "),
            })?;
        let mut data = BasisSetData::from_json_str(text, canon, *harm)?;
        data.name = canon.to_string();
        Ok(data)
    }

    /// Parse basis data in the basis-set-exchange JSON schema. `source_name`
    /// names the data in errors (and is the name if the file has none).
    pub fn from_json_str(
        text: &str,
        source_name: &str,
        default_harmonics: Harmonics,
    ) -> Result<BasisSetData, BasisError> {
        let file: JsonFile = serde_json::from_str(text).map_err(|e| BasisError::Parse {
            source_name: source_name.to_string(),
            message: e.to_string(),
        })?;
        let name = file.name.clone().unwrap_or_else(|| source_name.to_string());
        let mut elements = BTreeMap::new();
        for (zs, el) in &file.elements {
            let z: u8 = zs.parse().map_err(|_| BasisError::Parse {
                source_name: source_name.to_string(),
                message: format!("element key `{zs}` is not an atomic number"),
            })?;
            let symbol = Element::from_atomic_number(z as u64)
                .map(|e| e.symbol().to_string())
                .unwrap_or_else(|_| format!("Z={z}"));
            if el.ecp_potentials.is_some() {
                return Err(BasisError::EcpNotSupported {
                    basis: name.clone(),
                    element: symbol,
                });
            }
            let mut shells = Vec::new();
            for sh in &el.electron_shells {
                let exps = sh
                    .exponents
                    .iter()
                    .map(|t| parse_num(t, source_name))
                    .collect::<Result<Vec<_>, _>>()?;
                if exps.iter().any(|&a| a <= 0.0) {
                    return Err(BasisError::Parse {
                        source_name: source_name.to_string(),
                        message: format!("element {symbol}: non-positive exponent"),
                    });
                }
                if sh.angular_momentum.is_empty() {
                    return Err(BasisError::Parse {
                        source_name: source_name.to_string(),
                        message: format!("element {symbol}: shell without angular momentum"),
                    });
                }
                let fused = sh.angular_momentum.len() > 1;
                if fused && sh.angular_momentum.len() != sh.coefficients.len() {
                    return Err(BasisError::Parse {
                        source_name: source_name.to_string(),
                        message: format!(
                            "element {symbol}: fused shell with {} angular momenta but {} coefficient rows",
                            sh.angular_momentum.len(),
                            sh.coefficients.len()
                        ),
                    });
                }
                for (r, row) in sh.coefficients.iter().enumerate() {
                    let l = if fused {
                        sh.angular_momentum[r]
                    } else {
                        sh.angular_momentum[0]
                    };
                    if l > MAX_L {
                        return Err(BasisError::AngularMomentumTooHigh {
                            basis: name.clone(),
                            element: symbol.clone(),
                            l,
                            max: MAX_L,
                        });
                    }
                    if row.len() != exps.len() {
                        return Err(BasisError::Parse {
                            source_name: source_name.to_string(),
                            message: format!(
                                "element {symbol}: {} exponents but {} coefficients",
                                exps.len(),
                                row.len()
                            ),
                        });
                    }
                    let coefs = row
                        .iter()
                        .map(|t| parse_num(t, source_name))
                        .collect::<Result<Vec<_>, _>>()?;
                    // Drop primitives with zero coefficient (general contractions).
                    let (e, c): (Vec<f64>, Vec<f64>) = exps
                        .iter()
                        .zip(&coefs)
                        .filter(|(_, &c)| c != 0.0)
                        .map(|(&e, &c)| (e, c))
                        .unzip();
                    if e.is_empty() {
                        continue;
                    }
                    shells.push(ShellData {
                        l,
                        exponents: e,
                        coefficients: c,
                    });
                }
            }
            // Sort by angular momentum, stable (the documented AO order).
            shells.sort_by_key(|s| s.l);
            elements.insert(z, shells);
        }
        Ok(BasisSetData {
            name,
            elements,
            default_harmonics,
        })
    }

    /// Read a basis file in the basis-set-exchange JSON schema.
    pub fn from_file(
        path: &Path,
        default_harmonics: Harmonics,
    ) -> Result<BasisSetData, BasisError> {
        let text = std::fs::read_to_string(path).map_err(|source| BasisError::Io {
            path: path.display().to_string(),
            source,
        })?;
        BasisSetData::from_json_str(&text, &path.display().to_string(), default_harmonics)
    }

    /// The contractions of one element, or a [`BasisError::MissingElement`].
    pub fn shells_for(&self, element: Element) -> Result<&[ShellData], BasisError> {
        self.elements
            .get(&element.atomic_number())
            .map(|v| v.as_slice())
            .ok_or_else(|| BasisError::MissingElement {
                element: element.symbol().to_string(),
                z: element.atomic_number(),
                basis: self.name.clone(),
            })
    }
}

/// (2n−1)!! with (−1)!! = 1.
pub fn double_factorial_odd(n: i64) -> f64 {
    let mut r = 1.0;
    let mut k = 2 * n - 1;
    while k > 1 {
        r *= k as f64;
        k -= 2;
    }
    r
}

/// Primitive normalisation of x^l exp(−α r²):
/// N² = (2α/π)^{3/2} (4α)^l / (2l−1)!!.
pub fn primitive_norm(l: usize, alpha: f64) -> f64 {
    let v = (2.0 * alpha / std::f64::consts::PI).powf(1.5) * (4.0 * alpha).powi(l as i32)
        / double_factorial_odd(l as i64);
    v.sqrt()
}

/// One contracted shell placed on an atom.
#[derive(Clone, Debug, PartialEq)]
pub struct Shell {
    /// Angular momentum.
    pub l: usize,
    /// Centre (bohr).
    pub center: [f64; 3],
    /// Index of the atom in the molecule.
    pub atom: usize,
    /// Exponents (bohr⁻²).
    pub exponents: Vec<f64>,
    /// Coefficients including primitive normalisation, scaled so that the
    /// contracted x^l component has unit norm.
    pub coefficients: Vec<f64>,
    /// Spherical (true) or Cartesian (false) output functions.
    pub pure: bool,
}

/// Number of Cartesian components of angular momentum l.
pub const fn ncart(l: usize) -> usize {
    (l + 1) * (l + 2) / 2
}

impl Shell {
    /// A normalised shell from contraction data.
    pub fn new(data: &ShellData, center: [f64; 3], atom: usize, pure: bool) -> Shell {
        let l = data.l;
        let mut coefs: Vec<f64> = data
            .exponents
            .iter()
            .zip(&data.coefficients)
            .map(|(&a, &c)| c * primitive_norm(l, a))
            .collect();
        // Self-overlap of the contracted x^l component.
        let mut s = 0.0;
        for (i, &ai) in data.exponents.iter().enumerate() {
            for (j, &aj) in data.exponents.iter().enumerate() {
                let p = ai + aj;
                s += coefs[i]
                    * coefs[j]
                    * (std::f64::consts::PI / p).powf(1.5)
                    * double_factorial_odd(l as i64)
                    / (2.0 * p).powi(l as i32);
            }
        }
        let scale = 1.0 / s.sqrt();
        for c in &mut coefs {
            *c *= scale;
        }
        Shell {
            l,
            center,
            atom,
            exponents: data.exponents.clone(),
            coefficients: coefs,
            pure,
        }
    }
    /// Number of Cartesian components.
    pub fn ncart(&self) -> usize {
        ncart(self.l)
    }
    /// Number of basis functions (2l+1 if pure, else Cartesian count).
    pub fn nfunc(&self) -> usize {
        if self.pure && self.l >= 2 {
            2 * self.l + 1
        } else {
            ncart(self.l)
        }
    }
    /// Number of primitives.
    pub fn nprim(&self) -> usize {
        self.exponents.len()
    }
}

/// A basis set placed on a molecule.
#[derive(Clone, Debug)]
pub struct BasisSet {
    /// Basis-set name.
    pub name: String,
    /// The shells in AO order.
    pub shells: Vec<Shell>,
    /// First AO index of each shell.
    pub offsets: Vec<usize>,
    /// Number of basis functions.
    pub nbf: usize,
    /// Cartesian or spherical.
    pub harmonics: Harmonics,
    /// Nuclear charges and positions (bohr) of the molecule.
    pub nuclei: Vec<(f64, [f64; 3])>,
}

impl BasisSet {
    /// Place `data` on `molecule`, with the family's default harmonics unless
    /// `harmonics` overrides it.
    pub fn new(
        molecule: &Molecule,
        data: &BasisSetData,
        harmonics: Option<Harmonics>,
    ) -> Result<BasisSet, BasisError> {
        let harmonics = harmonics.unwrap_or(data.default_harmonics);
        let pure = harmonics == Harmonics::Spherical;
        let mut shells = Vec::new();
        for (ia, atom) in molecule.atoms.iter().enumerate() {
            for sd in data.shells_for(atom.element)? {
                shells.push(Shell::new(sd, atom.position_bohr, ia, pure));
            }
        }
        let nuclei = molecule
            .atoms
            .iter()
            .map(|a| (a.element.atomic_number() as f64, a.position_bohr))
            .collect();
        Ok(BasisSet::from_shells(&data.name, shells, harmonics, nuclei))
    }

    /// A built-in basis set by name on a molecule (default harmonics).
    pub fn builtin(molecule: &Molecule, name: &str) -> Result<BasisSet, BasisError> {
        BasisSet::new(molecule, &BasisSetData::builtin(name)?, None)
    }

    /// Assemble from shells (offsets computed here).
    pub fn from_shells(
        name: &str,
        shells: Vec<Shell>,
        harmonics: Harmonics,
        nuclei: Vec<(f64, [f64; 3])>,
    ) -> BasisSet {
        let mut offsets = Vec::with_capacity(shells.len());
        let mut n = 0;
        for s in &shells {
            offsets.push(n);
            n += s.nfunc();
        }
        BasisSet {
            name: name.to_string(),
            shells,
            offsets,
            nbf: n,
            harmonics,
            nuclei,
        }
    }

    /// Number of atoms the basis was placed on.
    pub fn natoms(&self) -> usize {
        self.nuclei.len()
    }

    /// Index of the atom that carries each AO.
    pub fn ao_atoms(&self) -> Vec<usize> {
        let mut v = Vec::with_capacity(self.nbf);
        for s in &self.shells {
            v.extend(std::iter::repeat_n(s.atom, s.nfunc()));
        }
        v
    }
}
