//! The files of the initial-condition chain: the normal-modes file (TOML)
//! that `flipswarm modes` writes and `flipswarm sample` reads, and the
//! initial-conditions file (HDF5) that `sample` writes, `spectrum` reads and
//! `run` consumes (`start.sampling = "file"`).
//!
//! # Normal-modes file (TOML, layout of our own)
//! ```toml
//! format = "flipswarm-normal-modes"
//! version = 1
//! coordinates = "model"        # or "cartesian" (3 per atom, bohr)
//! source = "ensembles/x.toml"  # what the modes were computed from
//! masses_me = [1.0, 1.0]       # one per coordinate, electron masses
//! reference_bohr = [0.0, 0.0]  # the geometry the Hessian belongs to
//! gradient_norm_hartree_bohr = 0.0
//! elements = ["O", "H", "H"]   # cartesian only
//! [[mode]]
//! wavenumber_cm1 = 645.3        # negative: imaginary
//! omega_hartree = 0.00294
//! vector = [0.7, 0.7]           # mass-weighted, orthonormal (dimensionless)
//! ```
//!
//! # Initial-conditions file (HDF5, layout of our own)
//! Root attributes: `format` = "flipswarm-initial-conditions", `version` = 1,
//! `coordinates`, `temperature_k`, `seed`, `created`, `modes_toml` (the
//! modes file text), `selection` (how initial states were chosen, or
//! "none"). Datasets (every one with `units` and `description`):
//! `positions` (N × dof, bohr), `velocities` (N × dof, bohr per atomic time
//! unit), `masses` (dof, electron masses); when excitation was computed,
//! `excitation_energies` (N × n_states, hartree above the lowest state; the
//! first column is 0), `oscillator_strengths` (N × n_states, dimensionless;
//! first column 0) and `initial_state` (N, 0-based, −1 = not selected).

use std::path::{Path, PathBuf};
use std::str::FromStr;

use hdf5::types::VarLenUnicode;
use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

/// Format tag of the modes file.
pub const MODES_FORMAT: &str = "flipswarm-normal-modes";
/// Format tag of the initial-conditions file.
pub const IC_FORMAT: &str = "flipswarm-initial-conditions";

/// Problems with these files.
#[derive(Debug, thiserror::Error)]
pub enum FileError {
    /// Cannot read or write.
    #[error("{path}: {message}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What went wrong.
        message: String,
    },
    /// The content is not what it should be.
    #[error("{path}: {message}")]
    Content {
        /// The file.
        path: PathBuf,
        /// What is wrong (key or dataset named).
        message: String,
    },
}

/// Read a Cartesian Hessian (hartree/bohr²) for `n` = 3N coordinates from a
/// text file: whitespace-separated numbers, one row per line, `#` starts a
/// comment, blank lines are skipped.
pub fn read_hessian(path: &Path, n: usize) -> Result<DMatrix<f64>, FileError> {
    let text = std::fs::read_to_string(path).map_err(|e| FileError::Io {
        path: path.to_path_buf(),
        message: e.to_string(),
    })?;
    parse_hessian(&text, n).map_err(|message| FileError::Content {
        path: path.to_path_buf(),
        message,
    })
}

/// The text form of [`read_hessian`]; the error names the line.
pub fn parse_hessian(text: &str, n: usize) -> Result<DMatrix<f64>, String> {
    let mut rows: Vec<Vec<f64>> = Vec::new();
    for (k, line) in text.lines().enumerate() {
        let line = line.split('#').next().unwrap_or("").trim();
        if line.is_empty() {
            continue;
        }
        // More rows than the geometry needs: stop collecting (the shape
        // message below still counts them) instead of holding them all.
        if rows.len() > n {
            rows.push(Vec::new());
            continue;
        }
        let mut row = Vec::with_capacity(n.min(4096));
        for t in line.split_whitespace() {
            let x = t
                .parse::<f64>()
                .map_err(|_| format!("line {}: {t:?} is not a number", k + 1))?;
            if !x.is_finite() {
                return Err(format!("line {}: non-finite entry {x}", k + 1));
            }
            row.push(x);
        }
        rows.push(row);
    }
    let cols = rows.first().map_or(0, |r| r.len());
    if rows.len() != n || rows.iter().any(|r| r.len() != cols) || cols != n {
        let shape = if rows.len() > n {
            format!("more than {n} rows")
        } else if rows.iter().all(|r| r.len() == cols) {
            format!("{}×{cols}", rows.len())
        } else {
            format!("{} ragged rows", rows.len())
        };
        return Err(format!(
            "the Hessian is {shape} but the geometry's {} atoms need {n}×{n}",
            n / 3
        ));
    }
    Ok(DMatrix::from_fn(n, n, |i, j| rows[i][j]))
}

/// One normal mode.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModeEntry {
    /// Wavenumber (cm⁻¹), negative for an imaginary frequency.
    pub wavenumber_cm1: f64,
    /// ω (hartree/ħ), negative for an imaginary frequency.
    pub omega_hartree: f64,
    /// Mass-weighted orthonormal eigenvector, one entry per coordinate.
    pub vector: Vec<f64>,
}

/// The normal-modes file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModesFile {
    /// [`MODES_FORMAT`].
    pub format: String,
    /// 1.
    pub version: u32,
    /// "model" or "cartesian".
    pub coordinates: String,
    /// What the modes were computed from (ensemble file or geometry).
    pub source: String,
    /// Masses (electron masses), one per coordinate.
    pub masses_me: Vec<f64>,
    /// Reference geometry (bohr or model units), flat.
    pub reference_bohr: Vec<f64>,
    /// |∇E| at the reference (hartree/bohr); large values mean the geometry
    /// is not a minimum and the harmonic sampling is questionable.
    pub gradient_norm_hartree_bohr: f64,
    /// Element symbols (Cartesian coordinates only).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub elements: Vec<String>,
    /// The modes, ascending in frequency.
    pub mode: Vec<ModeEntry>,
}

impl ModesFile {
    /// Read and check a modes file.
    pub fn read(path: &Path) -> Result<ModesFile, FileError> {
        let text = std::fs::read_to_string(path).map_err(|e| FileError::Io {
            path: path.into(),
            message: e.to_string(),
        })?;
        let m: ModesFile = toml::from_str(&text).map_err(|e| FileError::Content {
            path: path.into(),
            message: e.to_string().trim_end().to_string(),
        })?;
        let bad = |message: String| FileError::Content {
            path: path.into(),
            message,
        };
        if m.format != MODES_FORMAT {
            return Err(bad(format!(
                "key `format` = {:?}; expected {MODES_FORMAT:?}",
                m.format
            )));
        }
        if m.version != 1 {
            return Err(bad(format!(
                "key `version` = {}; this program reads version 1",
                m.version
            )));
        }
        if m.coordinates != "model" && m.coordinates != "cartesian" {
            return Err(bad(format!(
                "key `coordinates` = {:?}; expected \"model\" or \"cartesian\"",
                m.coordinates
            )));
        }
        let n = m.masses_me.len();
        if n == 0 || m.reference_bohr.len() != n {
            return Err(bad(format!("keys `masses_me` ({n}) and `reference_bohr` ({}) must have one entry per coordinate", m.reference_bohr.len())));
        }
        if let Some((i, x)) = m
            .masses_me
            .iter()
            .enumerate()
            .find(|(_, x)| !(**x > 0.0 && x.is_finite()))
        {
            return Err(bad(format!(
                "key `masses_me`: entry {i} = {x}; masses must be positive"
            )));
        }
        for (k, mode) in m.mode.iter().enumerate() {
            if mode.vector.len() != n {
                return Err(bad(format!(
                    "[[mode]] entry {k}: `vector` has {} entries for {n} coordinates",
                    mode.vector.len()
                )));
            }
            if !mode.omega_hartree.is_finite() || mode.vector.iter().any(|x| !x.is_finite()) {
                return Err(bad(format!("[[mode]] entry {k}: non-finite values")));
            }
        }
        if m.mode.is_empty() {
            return Err(bad("no [[mode]] entries".into()));
        }
        Ok(m)
    }

    /// Write as TOML.
    pub fn write(&self, path: &Path) -> Result<(), FileError> {
        let text = toml::to_string(self).map_err(|e| FileError::Content {
            path: path.into(),
            message: e.to_string(),
        })?;
        let header =
            "# flipswarm normal modes: ω in hartree/ħ, vectors mass-weighted and orthonormal\n";
        std::fs::write(path, format!("{header}{text}")).map_err(|e| FileError::Io {
            path: path.into(),
            message: e.to_string(),
        })
    }
}

/// Excitation data of an initial-condition set.
#[derive(Clone, Debug, PartialEq, Default)]
pub struct Excitation {
    /// E_n − E_0 per trajectory and state (hartree).
    pub energies: Vec<Vec<f64>>,
    /// f_0n per trajectory and state.
    pub oscillator_strengths: Vec<Vec<f64>>,
    /// Selected initial state per trajectory (None = not selected).
    pub initial_state: Vec<Option<usize>>,
    /// How the states were selected.
    pub selection: String,
}

/// A set of initial conditions.
#[derive(Clone, Debug, PartialEq)]
pub struct InitialConditions {
    /// "model" or "cartesian".
    pub coordinates: String,
    /// Positions per trajectory.
    pub positions: Vec<Vec<f64>>,
    /// Velocities per trajectory.
    pub velocities: Vec<Vec<f64>>,
    /// Masses per coordinate.
    pub masses: Vec<f64>,
    /// Temperature of the Wigner distribution (K).
    pub temperature_k: f64,
    /// Sampling seed.
    pub seed: u64,
    /// The modes file text the set was drawn from.
    pub modes_toml: String,
    /// Excitation data, when computed.
    pub excitation: Option<Excitation>,
}

fn h5err(path: &Path, what: &str) -> impl Fn(hdf5::Error) -> FileError {
    let what = what.to_string();
    let path = path.to_path_buf();
    move |e| FileError::Io {
        path: path.clone(),
        message: format!("{what}: {e}"),
    }
}

fn flat(rows: &[Vec<f64>]) -> Vec<f64> {
    rows.iter().flat_map(|r| r.iter().copied()).collect()
}

impl InitialConditions {
    /// Number of initial conditions.
    pub fn len(&self) -> usize {
        self.positions.len()
    }

    /// True if there are none.
    pub fn is_empty(&self) -> bool {
        self.positions.is_empty()
    }

    /// Write to a new HDF5 file (refuses to overwrite).
    pub fn write(&self, path: &Path) -> Result<(), FileError> {
        if path.exists() {
            return Err(FileError::Io {
                path: path.into(),
                message: "exists already; choose another name or remove it".into(),
            });
        }
        let tmp = path.with_extension("h5.partial");
        let _ = std::fs::remove_file(&tmp);
        {
            let f = hdf5::File::create(&tmp).map_err(h5err(path, "cannot create"))?;
            crate::ensemble::h5::close_on_exec(&tmp);
            let s = |v: &str| {
                VarLenUnicode::from_str(v).map_err(|e| FileError::Content {
                    path: path.into(),
                    message: e.to_string(),
                })
            };
            let root_str = |name: &str, v: &str| -> Result<(), FileError> {
                f.new_attr::<VarLenUnicode>()
                    .create(name)
                    .map_err(h5err(path, name))?
                    .write_scalar(&s(v)?)
                    .map_err(h5err(path, name))
            };
            root_str("format", IC_FORMAT)?;
            root_str("coordinates", &self.coordinates)?;
            root_str("modes_toml", &self.modes_toml)?;
            root_str("created", &crate::ensemble::h5::now_rfc3339())?;
            root_str("program", concat!("flipswarm ", env!("CARGO_PKG_VERSION")))?;
            root_str(
                "selection",
                self.excitation
                    .as_ref()
                    .map_or("none", |e| e.selection.as_str()),
            )?;
            f.new_attr::<u32>()
                .create("version")
                .map_err(h5err(path, "version"))?
                .write_scalar(&1u32)
                .map_err(h5err(path, "version"))?;
            f.new_attr::<f64>()
                .create("temperature_k")
                .map_err(h5err(path, "temperature"))?
                .write_scalar(&self.temperature_k)
                .map_err(h5err(path, "temperature"))?;
            f.new_attr::<u64>()
                .create("seed")
                .map_err(h5err(path, "seed"))?
                .write_scalar(&self.seed)
                .map_err(h5err(path, "seed"))?;
            let n = self.positions.len();
            let dof = self.masses.len();
            let matrix = |name: &str,
                          rows: &[Vec<f64>],
                          cols: usize,
                          units: &str,
                          description: &str|
             -> Result<(), FileError> {
                let ds = f
                    .new_dataset::<f64>()
                    .shape((rows.len(), cols))
                    .create(name)
                    .map_err(h5err(path, name))?;
                ds.write_raw(&flat(rows)).map_err(h5err(path, name))?;
                ds.new_attr::<VarLenUnicode>()
                    .create("units")
                    .map_err(h5err(path, name))?
                    .write_scalar(&s(units)?)
                    .map_err(h5err(path, name))?;
                ds.new_attr::<VarLenUnicode>()
                    .create("description")
                    .map_err(h5err(path, name))?
                    .write_scalar(&s(description)?)
                    .map_err(h5err(path, name))?;
                Ok(())
            };
            matrix(
                "positions",
                &self.positions,
                dof,
                "bohr",
                "one row per initial condition",
            )?;
            matrix(
                "velocities",
                &self.velocities,
                dof,
                "bohr / atomic time unit",
                "one row per initial condition",
            )?;
            matrix(
                "masses",
                std::slice::from_ref(&self.masses),
                dof,
                "electron mass",
                "mass of each coordinate",
            )?;
            if let Some(x) = &self.excitation {
                let ns = x.energies.first().map_or(0, |r| r.len());
                matrix(
                    "excitation_energies",
                    &x.energies,
                    ns,
                    "hartree",
                    "E_n - E_0 at each initial geometry (column 0 is the lowest state)",
                )?;
                matrix(
                    "oscillator_strengths",
                    &x.oscillator_strengths,
                    ns,
                    "1",
                    "f_0n = (2/3)(E_n - E_0)|<0|mu|n>|^2 at each initial geometry",
                )?;
                let states: Vec<i64> = x
                    .initial_state
                    .iter()
                    .map(|s| s.map_or(-1, |v| v as i64))
                    .collect();
                let ds = f
                    .new_dataset::<i64>()
                    .shape(n)
                    .create("initial_state")
                    .map_err(h5err(path, "initial_state"))?;
                ds.write_raw(&states)
                    .map_err(h5err(path, "initial_state"))?;
                ds.new_attr::<VarLenUnicode>()
                    .create("description")
                    .map_err(h5err(path, "initial_state"))?
                    .write_scalar(&s(
                        "selected initial adiabatic state, 0-based; -1 = not selected",
                    )?)
                    .map_err(h5err(path, "initial_state"))?;
            }
            f.flush().map_err(h5err(path, "flush"))?;
        }
        std::fs::rename(&tmp, path).map_err(|e| FileError::Io {
            path: path.into(),
            message: e.to_string(),
        })
    }

    /// Read an initial-conditions file.
    pub fn read(path: &Path) -> Result<InitialConditions, FileError> {
        let content = |message: String| FileError::Content {
            path: path.into(),
            message,
        };
        let f = hdf5::File::open(path).map_err(|e| FileError::Io {
            path: path.into(),
            message: format!("cannot open as HDF5: {e}"),
        })?;
        let get_str = |name: &str| -> Result<String, FileError> {
            let a = f
                .attr(name)
                .map_err(|_| content(format!("root attribute `{name}` is missing")))?;
            Ok(a.read_scalar::<VarLenUnicode>()
                .map_err(|e| content(format!("root attribute `{name}`: {e}")))?
                .as_str()
                .to_string())
        };
        let format = get_str("format").map_err(|_| {
            content(format!(
                "not an initial-conditions file (root attribute `format` = {IC_FORMAT:?} missing)"
            ))
        })?;
        if format != IC_FORMAT {
            return Err(content(format!(
                "root attribute `format` = {format:?}; expected {IC_FORMAT:?}"
            )));
        }
        let scalar_f64 = |name: &str| -> Result<f64, FileError> {
            f.attr(name)
                .and_then(|a| a.read_scalar::<f64>())
                .map_err(|e| content(format!("root attribute `{name}`: {e}")))
        };
        let matrix = |name: &str| -> Result<(Vec<Vec<f64>>, usize), FileError> {
            let ds = f
                .dataset(name)
                .map_err(|_| content(format!("dataset `{name}` is missing")))?;
            let shape = ds.shape();
            if shape.len() != 2 {
                return Err(content(format!(
                    "dataset `{name}` has {} dimensions, expected 2",
                    shape.len()
                )));
            }
            let data = ds
                .read_raw::<f64>()
                .map_err(|e| content(format!("dataset `{name}`: {e}")))?;
            if data.iter().any(|x| !x.is_finite()) {
                return Err(content(format!(
                    "dataset `{name}` contains non-finite values"
                )));
            }
            let cols = shape[1];
            Ok((data.chunks(cols.max(1)).map(|c| c.to_vec()).collect(), cols))
        };
        let (positions, dof) = matrix("positions")?;
        let (velocities, dof_v) = matrix("velocities")?;
        let (masses, dof_m) = matrix("masses")?;
        if dof_v != dof || dof_m != dof || velocities.len() != positions.len() || masses.len() != 1
        {
            return Err(content(format!(
                "datasets disagree: positions {}×{dof}, velocities {}×{dof_v}, masses {}×{dof_m}",
                positions.len(),
                velocities.len(),
                masses.len()
            )));
        }
        let excitation = if f.link_exists("excitation_energies") {
            let (energies, ns) = matrix("excitation_energies")?;
            let (osc, ns2) = matrix("oscillator_strengths")?;
            if ns2 != ns || energies.len() != positions.len() || osc.len() != positions.len() {
                return Err(content("datasets `excitation_energies` and `oscillator_strengths` do not match `positions`".into()));
            }
            let st = f
                .dataset("initial_state")
                .and_then(|d| d.read_raw::<i64>())
                .map_err(|e| content(format!("dataset `initial_state`: {e}")))?;
            if st.len() != positions.len() {
                return Err(content(
                    "dataset `initial_state` does not match `positions`".into(),
                ));
            }
            if let Some(bad) = st.iter().find(|&&s| s < -1 || s >= ns as i64) {
                return Err(content(format!(
                    "dataset `initial_state` holds {bad}, outside -1..{}",
                    ns as i64 - 1
                )));
            }
            Some(Excitation {
                energies,
                oscillator_strengths: osc,
                initial_state: st
                    .iter()
                    .map(|&s| if s < 0 { None } else { Some(s as usize) })
                    .collect(),
                selection: get_str("selection")?,
            })
        } else {
            None
        };
        Ok(InitialConditions {
            coordinates: get_str("coordinates")?,
            positions,
            velocities,
            masses: masses.into_iter().next().unwrap_or_default(),
            temperature_k: scalar_f64("temperature_k")?,
            seed: f
                .attr("seed")
                .and_then(|a| a.read_scalar::<u64>())
                .map_err(|e| content(format!("root attribute `seed`: {e}")))?,
            modes_toml: get_str("modes_toml")?,
            excitation,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::parse_hessian;

    /// The text Hessian reader: comments and blank lines are skipped, and
    /// every kind of bad text is refused with the line or the two shapes.
    #[test]
    fn hessian_text_is_read_and_bad_text_is_named() {
        let h = parse_hessian("# water-free test\n1 0.5 0\n\n0.5 2 0 # row 2\n0 0 3\n", 3).unwrap();
        assert_eq!(h.shape(), (3, 3));
        assert_eq!((h[(0, 1)], h[(1, 1)], h[(2, 2)]), (0.5, 2.0, 3.0));
        for (text, n, says) in [
            ("1 0 0\n0 x 0\n0 0 1\n", 3, "line 2: \"x\" is not a number"),
            ("1 0 0\n0 1 0\n0 0 nan\n", 3, "line 3: non-finite entry NaN"),
            ("1 0 0\n0 1\n0 0 1\n", 3, "3 ragged rows"),
            ("1 0\n0 1\n", 3, "2×2 but the geometry's 1 atoms need 3×3"),
            ("1 0 0\n0 1 0\n0 0 1\n1 1 1\n1 1 1\n", 3, "more than 3 rows"),
            ("", 3, "0×0"),
        ] {
            let err = parse_hessian(text, n).unwrap_err();
            assert!(err.contains(says), "{text:?}: {err}");
        }
    }
}
