//! Molecular geometries in atomic units.
//!
//! A [`Molecule`] is an ordered list of [`Atom`]s. Positions are stored in
//! bohr and masses in electron masses, the units the dynamics works in; use
//! [`crate::units`] to convert at the edges. Each atom's mass defaults to the
//! mass of its element's most abundant isotope (see [`crate::chem::elements`])
//! and can be overridden per atom, e.g. for deuteration.

use super::elements::Element;
use crate::units::{amu_to_me, me_to_amu};
use nalgebra::Matrix3;
use thiserror::Error;

/// Why a geometry operation was refused.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum GeometryError {
    /// A mass override was not a finite positive number.
    #[error(
        "atom {index} ({element}): mass must be finite and positive, got {mass_me} electron masses"
    )]
    InvalidMass {
        /// 0-based atom index.
        index: usize,
        /// Element of that atom.
        element: Element,
        /// The rejected mass in electron masses.
        mass_me: f64,
    },
    /// An atom index was out of range.
    #[error("atom index {index} is out of range for a molecule of {len} atoms")]
    IndexOutOfRange {
        /// The requested index.
        index: usize,
        /// Number of atoms.
        len: usize,
    },
    /// A flat coordinate array had the wrong length.
    #[error("expected {expected} coordinates (3 per atom), got {found}")]
    WrongLength {
        /// 3 × number of atoms.
        expected: usize,
        /// Length supplied.
        found: usize,
    },
    /// The molecule has no atoms (no centre of mass etc.).
    #[error("the molecule has no atoms")]
    Empty,
}

/// One atom: element, position in bohr and mass in electron masses.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Atom {
    /// The element.
    pub element: Element,
    /// Cartesian position in bohr.
    pub position_bohr: [f64; 3],
    mass_me: f64,
}

impl Atom {
    /// An atom with the default (most abundant isotope) mass of its element.
    pub fn new(element: Element, position_bohr: [f64; 3]) -> Atom {
        Atom {
            element,
            position_bohr,
            mass_me: element.isotope_mass_me(),
        }
    }

    /// Mass in electron masses.
    pub fn mass_me(&self) -> f64 {
        self.mass_me
    }

    /// Mass in u.
    pub fn mass_amu(&self) -> f64 {
        me_to_amu(self.mass_me)
    }

    /// Whether the mass differs from the element's default isotope mass.
    pub fn has_mass_override(&self) -> bool {
        self.mass_me != self.element.isotope_mass_me()
    }

    /// Override the mass (electron masses). Must be finite and positive.
    /// The `index` only serves the error message.
    fn checked_mass(index: usize, element: Element, mass_me: f64) -> Result<f64, GeometryError> {
        if mass_me.is_finite() && mass_me > 0.0 {
            Ok(mass_me)
        } else {
            Err(GeometryError::InvalidMass {
                index,
                element,
                mass_me,
            })
        }
    }

    /// This atom with its mass replaced (electron masses); fails for
    /// non-finite or non-positive masses.
    pub fn with_mass_me(mut self, mass_me: f64) -> Result<Atom, GeometryError> {
        self.mass_me = Atom::checked_mass(0, self.element, mass_me)?;
        Ok(self)
    }
}

/// An ordered collection of atoms, positions in bohr.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Molecule {
    /// The atoms, in file order.
    pub atoms: Vec<Atom>,
}

impl Molecule {
    /// A molecule from atoms.
    pub fn new(atoms: Vec<Atom>) -> Molecule {
        Molecule { atoms }
    }

    /// A molecule from elements and positions in bohr (default masses).
    pub fn from_elements_positions_bohr(
        elements: &[Element],
        positions_bohr: &[[f64; 3]],
    ) -> Result<Molecule, GeometryError> {
        if elements.len() != positions_bohr.len() {
            return Err(GeometryError::WrongLength {
                expected: 3 * elements.len(),
                found: 3 * positions_bohr.len(),
            });
        }
        Ok(Molecule {
            atoms: elements
                .iter()
                .zip(positions_bohr)
                .map(|(&e, &p)| Atom::new(e, p))
                .collect(),
        })
    }

    /// Number of atoms.
    pub fn len(&self) -> usize {
        self.atoms.len()
    }

    /// Whether there are no atoms.
    pub fn is_empty(&self) -> bool {
        self.atoms.is_empty()
    }

    /// Elements in atom order.
    pub fn elements(&self) -> Vec<Element> {
        self.atoms.iter().map(|a| a.element).collect()
    }

    /// Masses in electron masses, one per atom.
    pub fn masses_me(&self) -> Vec<f64> {
        self.atoms.iter().map(|a| a.mass_me).collect()
    }

    /// Total mass in electron masses.
    pub fn total_mass_me(&self) -> f64 {
        self.atoms.iter().map(|a| a.mass_me).sum()
    }

    /// Override the mass of atom `index` in electron masses.
    pub fn set_mass_me(&mut self, index: usize, mass_me: f64) -> Result<(), GeometryError> {
        let len = self.atoms.len();
        let atom = self
            .atoms
            .get_mut(index)
            .ok_or(GeometryError::IndexOutOfRange { index, len })?;
        atom.mass_me = Atom::checked_mass(index, atom.element, mass_me)?;
        Ok(())
    }

    /// Override the mass of atom `index` in u (e.g. 2.014 101 778 for ²H).
    pub fn set_mass_amu(&mut self, index: usize, mass_amu: f64) -> Result<(), GeometryError> {
        self.set_mass_me(index, amu_to_me(mass_amu))
    }

    /// Positions as a flat vector `[x0, y0, z0, x1, …]` in bohr.
    pub fn positions_flat_bohr(&self) -> Vec<f64> {
        self.atoms.iter().flat_map(|a| a.position_bohr).collect()
    }

    /// Replace all positions from a flat vector of length 3 × atoms, in bohr.
    pub fn set_positions_flat_bohr(&mut self, flat: &[f64]) -> Result<(), GeometryError> {
        if flat.len() != 3 * self.atoms.len() {
            return Err(GeometryError::WrongLength {
                expected: 3 * self.atoms.len(),
                found: flat.len(),
            });
        }
        for (atom, xyz) in self.atoms.iter_mut().zip(flat.chunks_exact(3)) {
            atom.position_bohr = [xyz[0], xyz[1], xyz[2]];
        }
        Ok(())
    }

    /// Distance between atoms `i` and `j` in bohr.
    pub fn distance_bohr(&self, i: usize, j: usize) -> Result<f64, GeometryError> {
        let len = self.atoms.len();
        let a = self
            .atoms
            .get(i)
            .ok_or(GeometryError::IndexOutOfRange { index: i, len })?;
        let b = self
            .atoms
            .get(j)
            .ok_or(GeometryError::IndexOutOfRange { index: j, len })?;
        Ok(distance(&a.position_bohr, &b.position_bohr))
    }

    /// The first pair of atoms `(i, j, distance_bohr)` with `i < j` closer than
    /// `threshold_bohr`, scanning `j` in file order, or `None`.
    pub fn first_close_pair(&self, threshold_bohr: f64) -> Option<(usize, usize, f64)> {
        for j in 1..self.atoms.len() {
            for i in 0..j {
                let d = distance(&self.atoms[i].position_bohr, &self.atoms[j].position_bohr);
                if d < threshold_bohr {
                    return Some((i, j, d));
                }
            }
        }
        None
    }

    /// Centre of mass in bohr.
    pub fn centre_of_mass_bohr(&self) -> Result<[f64; 3], GeometryError> {
        if self.atoms.is_empty() {
            return Err(GeometryError::Empty);
        }
        let mut c = [0.0; 3];
        for a in &self.atoms {
            for (ck, xk) in c.iter_mut().zip(a.position_bohr) {
                *ck += a.mass_me * xk;
            }
        }
        let m = self.total_mass_me();
        Ok(c.map(|x| x / m))
    }

    /// Shift every atom by `delta_bohr`.
    pub fn translate_bohr(&mut self, delta_bohr: [f64; 3]) {
        for a in &mut self.atoms {
            for (xk, dk) in a.position_bohr.iter_mut().zip(delta_bohr) {
                *xk += dk;
            }
        }
    }

    /// Move the molecule so that its centre of mass is at the origin.
    pub fn shift_centre_of_mass_to_origin(&mut self) -> Result<(), GeometryError> {
        let c = self.centre_of_mass_bohr()?;
        self.translate_bohr([-c[0], -c[1], -c[2]]);
        Ok(())
    }

    /// Inertia tensor about the centre of mass, in m_e·bohr².
    pub fn inertia_tensor(&self) -> Result<Matrix3<f64>, GeometryError> {
        let c = self.centre_of_mass_bohr()?;
        let mut t = Matrix3::zeros();
        for a in &self.atoms {
            let r = [
                a.position_bohr[0] - c[0],
                a.position_bohr[1] - c[1],
                a.position_bohr[2] - c[2],
            ];
            let r2 = r[0] * r[0] + r[1] * r[1] + r[2] * r[2];
            for i in 0..3 {
                for j in 0..3 {
                    let delta = if i == j { r2 } else { 0.0 };
                    t[(i, j)] += a.mass_me * (delta - r[i] * r[j]);
                }
            }
        }
        Ok(t)
    }

    /// Empirical formula in Hill order (C, then H, then the rest
    /// alphabetically; without carbon, all alphabetically), e.g. `"C2H6O"`.
    pub fn formula(&self) -> String {
        let mut counts = [0usize; 256];
        for a in &self.atoms {
            counts[usize::from(a.element.atomic_number())] += 1;
        }
        let mut present: Vec<Element> = Element::all()
            .filter(|e| counts[usize::from(e.atomic_number())] > 0)
            .collect();
        let has_carbon = counts[6] > 0;
        present.sort_by_key(|e| {
            let rank = match (has_carbon, e.atomic_number()) {
                (true, 6) => 0,
                (true, 1) => 1,
                _ => 2,
            };
            (rank, e.symbol())
        });
        let mut out = String::new();
        for e in present {
            out.push_str(e.symbol());
            let n = counts[usize::from(e.atomic_number())];
            if n > 1 {
                out.push_str(&n.to_string());
            }
        }
        out
    }
}

fn distance(a: &[f64; 3], b: &[f64; 3]) -> f64 {
    let dx = a[0] - b[0];
    let dy = a[1] - b[1];
    let dz = a[2] - b[2];
    (dx * dx + dy * dy + dz * dz).sqrt()
}
