//! Internal coordinates from Cartesian coordinates laid out as x, y, z per
//! atom (bohr in, Å and degrees out). The dihedral i–j–k–l is the signed
//! angle between the planes (i, j, k) and (j, k, l), in (−180°, 180°],
//! positive for a clockwise rotation of the i–j bond onto k–l when looking
//! along j → k (the usual convention of chemistry textbooks).

use serde::Serialize;

use super::{input, AnalysisError};
use crate::units;

/// A geometric parameter.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
#[serde(tag = "kind", content = "atoms", rename_all = "snake_case")]
pub enum Param {
    /// Distance between two atoms (Å).
    Bond([usize; 2]),
    /// Angle i–j–k at j (degrees).
    Angle([usize; 3]),
    /// Dihedral i–j–k–l (degrees).
    Dihedral([usize; 4]),
}

fn atoms_of(s: &str, n: usize, opt: &str) -> Result<Vec<usize>, String> {
    let v: Result<Vec<usize>, _> = s.split(',').map(|x| x.trim().parse::<usize>()).collect();
    match v {
        Ok(v) if v.len() == n => Ok(v),
        _ => Err(format!(
            "{opt} `{s}`: expected {n} atom indices (0-based) separated by commas"
        )),
    }
}

impl Param {
    /// Parse the value of `--bond`, `--angle` or `--dihedral`.
    pub fn parse(kind: &str, s: &str) -> Result<Param, String> {
        let p = match kind {
            "bond" => {
                let a = atoms_of(s, 2, "--bond")?;
                Param::Bond([a[0], a[1]])
            }
            "angle" => {
                let a = atoms_of(s, 3, "--angle")?;
                Param::Angle([a[0], a[1], a[2]])
            }
            _ => {
                let a = atoms_of(s, 4, "--dihedral")?;
                Param::Dihedral([a[0], a[1], a[2], a[3]])
            }
        };
        let at = p.atoms();
        for (x, a) in at.iter().enumerate() {
            if at[..x].contains(a) {
                return Err(format!("{} `{s}`: atom {a} appears twice", p.option()));
            }
        }
        Ok(p)
    }

    /// The option that names this kind.
    pub fn option(&self) -> &'static str {
        match self {
            Param::Bond(_) => "--bond",
            Param::Angle(_) => "--angle",
            Param::Dihedral(_) => "--dihedral",
        }
    }

    /// Atom indices.
    pub fn atoms(&self) -> &[usize] {
        match self {
            Param::Bond(a) => a,
            Param::Angle(a) => a,
            Param::Dihedral(a) => a,
        }
    }

    /// Column name, e.g. `bond_0_1_angstrom`.
    pub fn label(&self) -> String {
        let idx: Vec<String> = self.atoms().iter().map(|a| a.to_string()).collect();
        let (kind, unit) = match self {
            Param::Bond(_) => ("bond", "angstrom"),
            Param::Angle(_) => ("angle", "deg"),
            Param::Dihedral(_) => ("dihedral", "deg"),
        };
        format!("{kind}_{}_{unit}", idx.join("_"))
    }

    /// Check the indices against `n_dof` coordinates.
    pub fn check(&self, n_dof: usize) -> Result<(), AnalysisError> {
        let idx: Vec<String> = self.atoms().iter().map(|a| a.to_string()).collect();
        let given = format!("{} {}", self.option(), idx.join(","));
        if n_dof % 3 != 0 {
            return input(format!("{given}: the ensemble has {n_dof} coordinates, not a multiple of 3, so there are no atoms to measure"));
        }
        let n_atoms = n_dof / 3;
        for &a in self.atoms() {
            if a >= n_atoms {
                return input(format!("{given}: atom index {a} is out of range: the ensemble has {n_atoms} atoms (indices 0 to {})", n_atoms.saturating_sub(1)));
            }
        }
        Ok(())
    }

    /// Value at coordinates `q` (bohr, 3 per atom): Å or degrees.
    pub fn value(&self, q: &[f64]) -> f64 {
        let r = |a: usize| [q[3 * a], q[3 * a + 1], q[3 * a + 2]];
        match *self {
            Param::Bond([i, j]) => units::bohr_to_angstrom(norm(sub(r(i), r(j)))),
            Param::Angle([i, j, k]) => {
                let (a, b) = (sub(r(i), r(j)), sub(r(k), r(j)));
                let c = (dot(a, b) / (norm(a) * norm(b))).clamp(-1.0, 1.0);
                c.acos().to_degrees()
            }
            Param::Dihedral([i, j, k, l]) => {
                let b1 = sub(r(j), r(i));
                let b2 = sub(r(k), r(j));
                let b3 = sub(r(l), r(k));
                // φ = atan2(|b2| b1·(b2×b3), (b1×b2)·(b2×b3)).
                let n1 = cross(b1, b2);
                let n2 = cross(b2, b3);
                let d = (norm(b2) * dot(b1, n2)).atan2(dot(n1, n2)).to_degrees();
                if d <= -180.0 {
                    d + 360.0
                } else {
                    d
                }
            }
        }
    }
}

fn sub(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}
fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}
fn norm(a: [f64; 3]) -> f64 {
    dot(a, a).sqrt()
}
fn cross(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}
