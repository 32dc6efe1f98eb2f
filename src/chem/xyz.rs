//! Reading and writing XYZ files (single geometries and trajectories).
//!
//! # Format read
//!
//! The plain XYZ format: each frame is
//!
//! ```text
//! 3                          <- atom count (a non-negative integer, alone on its line)
//! water, any comment         <- comment line (free text, may be empty)
//! O   0.000000  0.000000  0.117300   <- `symbol x y z`, coordinates in ångström
//! H   0.000000  0.757200 -0.469200
//! 8   0.000000 -0.757200 -0.469200   <- an atomic number works as a symbol too
//! ```
//!
//! Frames follow each other directly; blank lines are allowed only after the
//! last frame. Symbols are case-insensitive. Coordinates accept Rust float
//! syntax and Fortran `D` exponents (`1.0D-03`). Reading is strict and every
//! problem is a [`XyzError`] naming the source (file path or label), the
//! 1-based line number and what is wrong: a bad or mismatching atom count,
//! a missing comment or atom line, a non-numeric or non-finite coordinate
//! (naming the column), an unknown element, extra columns, or two atoms
//! closer than [`DUPLICATE_THRESHOLD_ANGSTROM`] (naming both lines).
//!
//! # Format written
//!
//! [`write_xyz_frame`] writes the plain format with ten decimals in Å.
//! [`write_extxyz_frame`] writes the same atom lines with an extended-XYZ
//! comment line: `Properties=species:S:1:pos:R:3` followed by per-frame
//! `key=value` pairs ([`FrameProperties`]), e.g.
//! `Properties=species:S:1:pos:R:3 time_fs=12.5 state=2 label="after hop"`.
//! [`parse_extxyz_str`] reads such files back, returning the properties too.
//! Extended XYZ is an open convention; per-atom columns other than species
//! and position are not supported.

use super::elements::{Element, ElementError};
use super::geometry::{Atom, Molecule};
use crate::units::{angstrom_to_bohr, bohr_to_angstrom};
use std::fmt;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use thiserror::Error;

/// Two atoms of one frame closer than this (in Å) are rejected as duplicates.
pub const DUPLICATE_THRESHOLD_ANGSTROM: f64 = 0.1;

/// The per-atom column layout this module reads and writes in extended XYZ.
pub const EXTXYZ_PROPERTIES: &str = "species:S:1:pos:R:3";

/// One frame of an XYZ file.
#[derive(Debug, Clone, PartialEq)]
pub struct XyzFrame {
    /// The geometry (positions converted to bohr, default isotope masses).
    pub molecule: Molecule,
    /// The comment line, without its line terminator.
    pub comment: String,
    /// 1-based line number of this frame's atom-count line in the source.
    pub first_line: usize,
}

/// What is wrong at a given line of an XYZ source.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum XyzErrorKind {
    /// The source has no non-blank content.
    #[error("the file is empty (expected an atom count on line 1)")]
    Empty,
    /// The atom-count line is not a non-negative integer.
    #[error("expected the atom count of frame {frame} (a non-negative integer alone on its line), found `{found}`{hint}")]
    BadCount {
        /// 1-based frame number.
        frame: usize,
        /// The offending line, trimmed.
        found: String,
        /// Extra explanation when this probably follows a too-small count.
        hint: String,
    },
    /// A frame declares zero atoms.
    #[error("frame {frame} declares 0 atoms; a frame needs at least one atom")]
    ZeroAtoms {
        /// 1-based frame number.
        frame: usize,
    },
    /// The source ends before the comment line.
    #[error(
        "the file ends before the comment line of frame {frame} (atom count on line {count_line})"
    )]
    MissingComment {
        /// 1-based frame number.
        frame: usize,
        /// Line of the atom count.
        count_line: usize,
    },
    /// The source ends before all declared atom lines.
    #[error("the file ends after {found} of the {expected} atom lines declared on line {count_line} for frame {frame}")]
    MissingAtoms {
        /// 1-based frame number.
        frame: usize,
        /// Atom count declared.
        expected: usize,
        /// Atom lines present.
        found: usize,
        /// Line of the atom count.
        count_line: usize,
    },
    /// An atom line has fewer than four columns.
    #[error("atom {atom} of {expected} (count on line {count_line}): expected `symbol x y z`, found {columns} column(s): `{text}`")]
    TooFewColumns {
        /// 1-based atom number within the frame.
        atom: usize,
        /// Atom count declared for the frame.
        expected: usize,
        /// Line of the atom count.
        count_line: usize,
        /// Number of whitespace-separated columns found.
        columns: usize,
        /// The line, trimmed.
        text: String,
    },
    /// An atom line has more than four columns.
    #[error("unexpected extra text `{text}` in column {column} (an atom line is `symbol x y z`)")]
    ExtraColumns {
        /// 1-based column of the first extra field.
        column: usize,
        /// That field.
        text: String,
    },
    /// A coordinate column is not a number.
    #[error("column {column} ({axis} coordinate) is not a number: `{text}`")]
    NonNumeric {
        /// 1-based column (2, 3 or 4).
        column: usize,
        /// `'x'`, `'y'` or `'z'`.
        axis: char,
        /// The field.
        text: String,
    },
    /// A coordinate column is NaN or infinite.
    #[error("column {column} ({axis} coordinate) is not finite: `{text}`")]
    NonFinite {
        /// 1-based column (2, 3 or 4).
        column: usize,
        /// `'x'`, `'y'` or `'z'`.
        axis: char,
        /// The field.
        text: String,
    },
    /// The first column names no known element.
    #[error("column 1: {0}")]
    UnknownElement(ElementError),
    /// Two atoms (nearly) coincide.
    #[error("atom {second_atom} ({second_symbol}) is {distance_angstrom:.4} Å from atom {first_atom} ({first_symbol}) on line {first_line}; atoms closer than {threshold} Å are treated as duplicates")]
    DuplicateAtom {
        /// 1-based number of the earlier atom.
        first_atom: usize,
        /// Its symbol.
        first_symbol: &'static str,
        /// Line of the earlier atom.
        first_line: usize,
        /// 1-based number of the later atom (whose line the error carries).
        second_atom: usize,
        /// Its symbol.
        second_symbol: &'static str,
        /// Their distance in Å.
        distance_angstrom: f64,
        /// The threshold in Å.
        threshold: f64,
    },
    /// The extended-XYZ comment line could not be parsed.
    #[error("comment line: {0}")]
    BadProperties(PropertyError),
}

/// An error while reading XYZ data.
#[derive(Debug, Error)]
pub enum XyzError {
    /// The file could not be read.
    #[error("{}: cannot read file: {err}", path.display())]
    Io {
        /// The path.
        path: PathBuf,
        /// The underlying error.
        #[source]
        err: io::Error,
    },
    /// The content is malformed.
    #[error("{source_name}: line {line}: {kind}")]
    Parse {
        /// File path or label of the source.
        source_name: String,
        /// 1-based line number.
        line: usize,
        /// What is wrong.
        kind: XyzErrorKind,
    },
}

impl XyzError {
    /// 1-based line number of a parse error (`None` for I/O errors).
    pub fn line(&self) -> Option<usize> {
        match self {
            XyzError::Parse { line, .. } => Some(*line),
            XyzError::Io { .. } => None,
        }
    }

    /// The kind of a parse error (`None` for I/O errors).
    pub fn kind(&self) -> Option<&XyzErrorKind> {
        match self {
            XyzError::Parse { kind, .. } => Some(kind),
            XyzError::Io { .. } => None,
        }
    }
}

/// An error while writing XYZ data.
#[derive(Debug, Error)]
pub enum XyzWriteError {
    /// The sink failed.
    #[error("cannot write XYZ data: {0}")]
    Io(#[from] io::Error),
    /// A file could not be created or written.
    #[error("{}: cannot write file: {err}", path.display())]
    File {
        /// The path.
        path: PathBuf,
        /// The underlying error.
        #[source]
        err: io::Error,
    },
    /// An atom has a NaN or infinite coordinate.
    #[error("atom {atom} ({symbol}) has a non-finite coordinate {position_bohr:?} bohr")]
    NonFinitePosition {
        /// 1-based atom number.
        atom: usize,
        /// Its symbol.
        symbol: &'static str,
        /// The position.
        position_bohr: [f64; 3],
    },
    /// The comment would break the line structure.
    #[error("the comment must be a single line, but contains a line break")]
    MultilineComment,
    /// A property cannot be written.
    #[error("frame property: {0}")]
    Property(PropertyError),
}

// ---------------------------------------------------------------------------
// Reading
// ---------------------------------------------------------------------------

/// Parse every frame of XYZ text. `source_name` (a path or a label such as
/// `"<stdin>"`) is used in error messages.
pub fn parse_xyz_str(text: &str, source_name: &str) -> Result<Vec<XyzFrame>, XyzError> {
    let lines: Vec<&str> = text.lines().collect();
    let err = |line: usize, kind: XyzErrorKind| XyzError::Parse {
        source_name: source_name.to_string(),
        line,
        kind,
    };

    // Trailing blank lines are allowed; find the last meaningful line.
    let end = lines
        .iter()
        .rposition(|l| !l.trim().is_empty())
        .map_or(0, |i| i + 1);
    if end == 0 {
        return Err(err(1, XyzErrorKind::Empty));
    }

    let threshold_bohr = angstrom_to_bohr(DUPLICATE_THRESHOLD_ANGSTROM);
    let mut frames = Vec::new();
    let mut i = 0; // 0-based index of the next line
    let mut previous_count: Option<(usize, usize)> = None; // (count, line)
    while i < end {
        let frame = frames.len() + 1;
        let count_line = i + 1;
        let count_text = lines[i].trim();
        let count = match count_text.parse::<usize>() {
            Ok(n) => n,
            Err(_) => {
                let hint = match previous_count {
                    Some((n, line)) => format!(
                        "; if this is an atom line, frame {} has more atom lines than the {n} declared on line {line}",
                        frame - 1
                    ),
                    None => String::new(),
                };
                return Err(err(
                    count_line,
                    XyzErrorKind::BadCount {
                        frame,
                        found: count_text.to_string(),
                        hint,
                    },
                ));
            }
        };
        if count == 0 {
            return Err(err(count_line, XyzErrorKind::ZeroAtoms { frame }));
        }
        i += 1;
        if i >= lines.len() {
            return Err(err(
                i + 1,
                XyzErrorKind::MissingComment { frame, count_line },
            ));
        }
        let comment = lines[i].to_string();
        i += 1;

        let mut atoms: Vec<Atom> = Vec::with_capacity(count.min(end.saturating_sub(i)));
        for k in 0..count {
            let line_no = i + 1;
            if i >= end {
                return Err(err(
                    line_no,
                    XyzErrorKind::MissingAtoms {
                        frame,
                        expected: count,
                        found: k,
                        count_line,
                    },
                ));
            }
            let atom = parse_atom_line(lines[i], k + 1, count, count_line)
                .map_err(|kind| err(line_no, kind))?;
            atoms.push(atom);
            i += 1;
        }
        let molecule = Molecule::new(atoms);
        let atom_line = |idx: usize| count_line + 2 + idx;
        if let Some((a, b, d)) = molecule.first_close_pair(threshold_bohr) {
            return Err(err(
                atom_line(b),
                XyzErrorKind::DuplicateAtom {
                    first_atom: a + 1,
                    first_symbol: molecule.atoms[a].element.symbol(),
                    first_line: atom_line(a),
                    second_atom: b + 1,
                    second_symbol: molecule.atoms[b].element.symbol(),
                    distance_angstrom: bohr_to_angstrom(d),
                    threshold: DUPLICATE_THRESHOLD_ANGSTROM,
                },
            ));
        }
        previous_count = Some((count, count_line));
        frames.push(XyzFrame {
            molecule,
            comment,
            first_line: count_line,
        });
    }
    Ok(frames)
}

fn parse_atom_line(
    line: &str,
    atom: usize,
    expected: usize,
    count_line: usize,
) -> Result<Atom, XyzErrorKind> {
    let fields: Vec<&str> = line.split_whitespace().collect();
    if fields.len() < 4 {
        return Err(XyzErrorKind::TooFewColumns {
            atom,
            expected,
            count_line,
            columns: fields.len(),
            text: line.trim().to_string(),
        });
    }
    if fields.len() > 4 {
        return Err(XyzErrorKind::ExtraColumns {
            column: 5,
            text: fields[4].to_string(),
        });
    }
    let element =
        Element::parse_symbol_or_number(fields[0]).map_err(XyzErrorKind::UnknownElement)?;
    let mut pos = [0.0; 3];
    for (k, axis) in ['x', 'y', 'z'].into_iter().enumerate() {
        let text = fields[k + 1];
        let column = k + 2;
        let value = parse_coordinate(text).ok_or_else(|| XyzErrorKind::NonNumeric {
            column,
            axis,
            text: text.to_string(),
        })?;
        if !value.is_finite() {
            return Err(XyzErrorKind::NonFinite {
                column,
                axis,
                text: text.to_string(),
            });
        }
        pos[k] = angstrom_to_bohr(value);
    }
    Ok(Atom::new(element, pos))
}

/// A float in Rust syntax, or with a Fortran `D`/`d` exponent.
fn parse_coordinate(text: &str) -> Option<f64> {
    text.parse::<f64>().ok().or_else(|| {
        if text.contains(['d', 'D']) && !text.contains(['e', 'E']) {
            text.replace(['d', 'D'], "e")
                .parse::<f64>()
                .ok()
                .filter(|_| {
                    // Only accept a single exponent marker after a digit or dot.
                    text.chars().filter(|c| matches!(c, 'd' | 'D')).count() == 1
                })
        } else {
            None
        }
    })
}

/// Read every frame of an XYZ file; the path names the source in errors.
pub fn read_xyz_file(path: impl AsRef<Path>) -> Result<Vec<XyzFrame>, XyzError> {
    let path = path.as_ref();
    let text = std::fs::read_to_string(path).map_err(|err| XyzError::Io {
        path: path.to_path_buf(),
        err,
    })?;
    parse_xyz_str(&text, &path.display().to_string())
}

/// Parse XYZ text that must hold exactly one frame. A second frame is
/// reported at its first line as extra content.
pub fn parse_single_xyz_str(text: &str, source_name: &str) -> Result<XyzFrame, XyzError> {
    let mut frames = parse_xyz_str(text, source_name)?;
    if frames.len() > 1 {
        let second = &frames[1];
        return Err(XyzError::Parse {
            source_name: source_name.to_string(),
            line: second.first_line,
            kind: XyzErrorKind::BadCount {
                frame: 2,
                found: second.molecule.len().to_string(),
                hint:
                    "; a single geometry was expected, but the file continues after the first frame"
                        .to_string(),
            },
        });
    }
    Ok(frames.remove(0))
}

/// Read an XYZ file that must hold exactly one frame.
pub fn read_single_xyz_file(path: impl AsRef<Path>) -> Result<XyzFrame, XyzError> {
    let path = path.as_ref();
    let text = std::fs::read_to_string(path).map_err(|err| XyzError::Io {
        path: path.to_path_buf(),
        err,
    })?;
    parse_single_xyz_str(&text, &path.display().to_string())
}

/// Parse extended-XYZ text as written by [`write_extxyz_frame`]: every frame
/// is returned with its comment-line properties. A `Properties=` entry, if
/// present, must be [`EXTXYZ_PROPERTIES`]; it is not included in the returned
/// properties.
pub fn parse_extxyz_str(
    text: &str,
    source_name: &str,
) -> Result<Vec<(XyzFrame, FrameProperties)>, XyzError> {
    let frames = parse_xyz_str(text, source_name)?;
    frames
        .into_iter()
        .map(|frame| {
            let comment_line = frame.first_line + 1;
            let bad = |e: PropertyError| XyzError::Parse {
                source_name: source_name.to_string(),
                line: comment_line,
                kind: XyzErrorKind::BadProperties(e),
            };
            let mut props = FrameProperties::parse(&frame.comment).map_err(bad)?;
            if let Some(pos) = props.entries.iter().position(|(k, _)| k == "Properties") {
                let (_, layout) = props.entries.remove(pos);
                if layout != PropValue::Text(EXTXYZ_PROPERTIES.to_string()) {
                    return Err(bad(PropertyError::UnsupportedLayout(layout.to_string())));
                }
            }
            Ok((frame, props))
        })
        .collect()
}

/// Read an extended-XYZ file; see [`parse_extxyz_str`].
pub fn read_extxyz_file(
    path: impl AsRef<Path>,
) -> Result<Vec<(XyzFrame, FrameProperties)>, XyzError> {
    let path = path.as_ref();
    let text = std::fs::read_to_string(path).map_err(|err| XyzError::Io {
        path: path.to_path_buf(),
        err,
    })?;
    parse_extxyz_str(&text, &path.display().to_string())
}

// ---------------------------------------------------------------------------
// Writing
// ---------------------------------------------------------------------------

fn write_atoms<W: Write>(w: &mut W, molecule: &Molecule) -> Result<(), XyzWriteError> {
    for (k, a) in molecule.atoms.iter().enumerate() {
        if !a.position_bohr.iter().all(|x| x.is_finite()) {
            return Err(XyzWriteError::NonFinitePosition {
                atom: k + 1,
                symbol: a.element.symbol(),
                position_bohr: a.position_bohr,
            });
        }
    }
    for a in &molecule.atoms {
        let [x, y, z] = a.position_bohr.map(bohr_to_angstrom);
        writeln!(
            w,
            "{:<2} {:>18.10} {:>18.10} {:>18.10}",
            a.element.symbol(),
            x,
            y,
            z
        )?;
    }
    Ok(())
}

/// Write one plain XYZ frame (positions in Å, ten decimals).
pub fn write_xyz_frame<W: Write>(
    w: &mut W,
    molecule: &Molecule,
    comment: &str,
) -> Result<(), XyzWriteError> {
    if comment.contains(['\n', '\r']) {
        return Err(XyzWriteError::MultilineComment);
    }
    // Validate before emitting anything so a failed frame leaves no partial output.
    let mut buf = Vec::new();
    writeln!(buf, "{}", molecule.len())?;
    writeln!(buf, "{comment}")?;
    write_atoms(&mut buf, molecule)?;
    w.write_all(&buf)?;
    Ok(())
}

/// One plain XYZ frame as a string.
pub fn xyz_string(molecule: &Molecule, comment: &str) -> Result<String, XyzWriteError> {
    let mut buf = Vec::new();
    write_xyz_frame(&mut buf, molecule, comment)?;
    Ok(String::from_utf8_lossy(&buf).into_owned())
}

/// Write one extended-XYZ frame: the comment line is
/// `Properties=species:S:1:pos:R:3` followed by `props`.
pub fn write_extxyz_frame<W: Write>(
    w: &mut W,
    molecule: &Molecule,
    props: &FrameProperties,
) -> Result<(), XyzWriteError> {
    let comment = props.to_comment_line().map_err(XyzWriteError::Property)?;
    write_xyz_frame(w, molecule, &comment)
}

/// Write frames to a plain XYZ file (created or truncated).
pub fn write_xyz_file(path: impl AsRef<Path>, frames: &[XyzFrame]) -> Result<(), XyzWriteError> {
    let path = path.as_ref();
    let mut buf = Vec::new();
    for f in frames {
        write_xyz_frame(&mut buf, &f.molecule, &f.comment)?;
    }
    std::fs::write(path, buf).map_err(|err| XyzWriteError::File {
        path: path.to_path_buf(),
        err,
    })
}

// ---------------------------------------------------------------------------
// Frame properties (extended-XYZ comment line)
// ---------------------------------------------------------------------------

/// A value on an extended-XYZ comment line.
#[derive(Debug, Clone, PartialEq)]
pub enum PropValue {
    /// Integer, written in decimal.
    Int(i64),
    /// Finite float, written so that it reads back bit-identically.
    Float(f64),
    /// Boolean, written `T` / `F`.
    Bool(bool),
    /// Text, quoted when it contains spaces or special characters.
    Text(String),
}

impl fmt::Display for PropValue {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            PropValue::Int(v) => write!(f, "{v}"),
            // `{:?}` always keeps a `.` or exponent, so it reads back as a float.
            PropValue::Float(v) => write!(f, "{v:?}"),
            PropValue::Bool(true) => f.write_str("T"),
            PropValue::Bool(false) => f.write_str("F"),
            PropValue::Text(s) => {
                let plain = !s.is_empty()
                    && !s
                        .chars()
                        .any(|c| c.is_whitespace() || matches!(c, '"' | '\\' | '='))
                    && PropValue::infer(s) == PropValue::Text(s.clone());
                if plain {
                    f.write_str(s)
                } else {
                    f.write_str("\"")?;
                    for c in s.chars() {
                        if matches!(c, '"' | '\\') {
                            f.write_str("\\")?;
                        }
                        write!(f, "{c}")?;
                    }
                    f.write_str("\"")
                }
            }
        }
    }
}

impl PropValue {
    /// The typed value of an unquoted token: integer, then float, then
    /// `T`/`F`/`true`/`false`, else text.
    fn infer(token: &str) -> PropValue {
        if let Ok(v) = token.parse::<i64>() {
            PropValue::Int(v)
        } else if let Some(v) = token.parse::<f64>().ok().filter(|v| v.is_finite()) {
            PropValue::Float(v)
        } else {
            match token {
                "T" | "true" | "True" => PropValue::Bool(true),
                "F" | "false" | "False" => PropValue::Bool(false),
                _ => PropValue::Text(token.to_string()),
            }
        }
    }
}

/// What is wrong with a frame property or comment line.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum PropertyError {
    /// Keys are `[A-Za-z_][A-Za-z0-9_]*`.
    #[error(
        "invalid key `{0}` (keys start with a letter or `_` and hold only letters, digits and `_`)"
    )]
    InvalidKey(String),
    /// The same key twice.
    #[error("duplicate key `{0}`")]
    DuplicateKey(String),
    /// `Properties` is written by the writer itself.
    #[error("key `Properties` is reserved for the per-atom column layout")]
    ReservedKey,
    /// A float value is NaN or infinite.
    #[error("value of `{0}` is not finite")]
    NonFiniteValue(String),
    /// A token is not `key=value`.
    #[error("expected `key=value` at character {position}, found `{found}`")]
    NotKeyValue {
        /// 1-based character position in the comment line.
        position: usize,
        /// The token.
        found: String,
    },
    /// A quoted value is not closed.
    #[error("unterminated quoted value for key `{0}`")]
    UnterminatedQuote(String),
    /// A `Properties=` layout other than species + position.
    #[error("unsupported per-atom layout `Properties={0}` (only `{EXTXYZ_PROPERTIES}` is read)")]
    UnsupportedLayout(String),
}

/// Ordered per-frame `key=value` properties for an extended-XYZ comment line.
///
/// ```
/// use flipswarm::chem::xyz::{FrameProperties, PropValue};
/// let p = FrameProperties::new().float("time_fs", 0.5).int("state", 2).text("label", "after hop");
/// let line = p.to_comment_line().unwrap();
/// assert_eq!(line, r#"Properties=species:S:1:pos:R:3 time_fs=0.5 state=2 label="after hop""#);
/// let back = FrameProperties::parse(&line).unwrap();
/// assert_eq!(back.get_f64("time_fs"), Some(0.5));
/// assert_eq!(back.get("state"), Some(&PropValue::Int(2)));
/// ```
#[derive(Debug, Clone, PartialEq, Default)]
pub struct FrameProperties {
    /// The entries in order.
    pub entries: Vec<(String, PropValue)>,
}

impl FrameProperties {
    /// No properties.
    pub fn new() -> FrameProperties {
        FrameProperties::default()
    }

    /// Append any value (validated when written).
    pub fn with(mut self, key: &str, value: PropValue) -> FrameProperties {
        self.entries.push((key.to_string(), value));
        self
    }

    /// Append a float.
    pub fn float(self, key: &str, value: f64) -> FrameProperties {
        self.with(key, PropValue::Float(value))
    }

    /// Append an integer.
    pub fn int(self, key: &str, value: i64) -> FrameProperties {
        self.with(key, PropValue::Int(value))
    }

    /// Append a boolean.
    pub fn bool(self, key: &str, value: bool) -> FrameProperties {
        self.with(key, PropValue::Bool(value))
    }

    /// Append text.
    pub fn text(self, key: &str, value: &str) -> FrameProperties {
        self.with(key, PropValue::Text(value.to_string()))
    }

    /// The value of `key`, if present.
    pub fn get(&self, key: &str) -> Option<&PropValue> {
        self.entries.iter().find(|(k, _)| k == key).map(|(_, v)| v)
    }

    /// The value of `key` as a float (integers are widened).
    pub fn get_f64(&self, key: &str) -> Option<f64> {
        match self.get(key)? {
            PropValue::Float(v) => Some(*v),
            PropValue::Int(v) => Some(*v as f64),
            _ => None,
        }
    }

    /// The value of `key` as an integer.
    pub fn get_i64(&self, key: &str) -> Option<i64> {
        match self.get(key)? {
            PropValue::Int(v) => Some(*v),
            _ => None,
        }
    }

    /// The comment line: `Properties=species:S:1:pos:R:3` then the entries.
    pub fn to_comment_line(&self) -> Result<String, PropertyError> {
        let mut out = format!("Properties={EXTXYZ_PROPERTIES}");
        for (n, (key, value)) in self.entries.iter().enumerate() {
            if !valid_key(key) {
                return Err(PropertyError::InvalidKey(key.clone()));
            }
            if key == "Properties" {
                return Err(PropertyError::ReservedKey);
            }
            if self.entries[..n].iter().any(|(k, _)| k == key) {
                return Err(PropertyError::DuplicateKey(key.clone()));
            }
            if let PropValue::Float(v) = value {
                if !v.is_finite() {
                    return Err(PropertyError::NonFiniteValue(key.clone()));
                }
            }
            out.push(' ');
            out.push_str(key);
            out.push('=');
            out.push_str(&value.to_string());
        }
        Ok(out)
    }

    /// Parse a comment line of whitespace-separated `key=value` pairs; values
    /// may be double-quoted with `\"` and `\\` escapes. Unquoted values are
    /// typed (integer, float, `T`/`F`, else text); quoted values are text.
    pub fn parse(comment: &str) -> Result<FrameProperties, PropertyError> {
        let chars: Vec<char> = comment.chars().collect();
        let mut entries: Vec<(String, PropValue)> = Vec::new();
        let mut i = 0;
        while i < chars.len() {
            if chars[i].is_whitespace() {
                i += 1;
                continue;
            }
            let start = i;
            while i < chars.len() && chars[i] != '=' && !chars[i].is_whitespace() {
                i += 1;
            }
            let key: String = chars[start..i].iter().collect();
            if i >= chars.len() || chars[i] != '=' {
                return Err(PropertyError::NotKeyValue {
                    position: start + 1,
                    found: key,
                });
            }
            if !valid_key(&key) {
                return Err(PropertyError::InvalidKey(key));
            }
            i += 1; // '='
            let value = if i < chars.len() && chars[i] == '"' {
                i += 1;
                let mut s = String::new();
                loop {
                    match chars.get(i) {
                        None => return Err(PropertyError::UnterminatedQuote(key)),
                        Some('"') => {
                            i += 1;
                            break;
                        }
                        Some('\\') if i + 1 < chars.len() => {
                            s.push(chars[i + 1]);
                            i += 2;
                        }
                        Some(&c) => {
                            s.push(c);
                            i += 1;
                        }
                    }
                }
                PropValue::Text(s)
            } else {
                let vstart = i;
                while i < chars.len() && !chars[i].is_whitespace() {
                    i += 1;
                }
                let token: String = chars[vstart..i].iter().collect();
                if token.is_empty() {
                    PropValue::Text(String::new())
                } else {
                    PropValue::infer(&token)
                }
            };
            if entries.iter().any(|(k, _)| *k == key) {
                return Err(PropertyError::DuplicateKey(key));
            }
            entries.push((key, value));
        }
        Ok(FrameProperties { entries })
    }
}

fn valid_key(key: &str) -> bool {
    let mut chars = key.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}
