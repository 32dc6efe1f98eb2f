//! Tests of `flipswarm::chem`: elements, geometries and XYZ files.
//!
//! External source for the isotope masses: AME2020 (M. Wang et al., Chinese
//! Physics C 45, 030003 (2021)) with the most abundant isotope chosen from the
//! IUPAC/CIAAW isotopic compositions, both as shipped in the PyPI package
//! `periodictable` (version recorded in the fixture, 2.1.0 when made) and
//! extracted by `scripts/reference/element_masses.py` into
//! `tests/data/chem/isotope_masses.json`.

use flipswarm::chem::xyz::{
    parse_extxyz_str, parse_single_xyz_str, parse_xyz_str, read_xyz_file, write_extxyz_frame,
    write_xyz_file, write_xyz_frame, xyz_string, FrameProperties, PropValue, PropertyError,
    XyzError, XyzErrorKind, XyzFrame, XyzWriteError,
};
use flipswarm::chem::{Atom, Element, ElementError, GeometryError, Molecule};
use flipswarm::units::{amu_to_me, angstrom_to_bohr, AMU_IN_ME};
use serde_json::Value;

// ---------------------------------------------------------------------------
// Elements
// ---------------------------------------------------------------------------

fn mass_fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/chem/isotope_masses.json"
    );
    let text = std::fs::read_to_string(path).expect("fixture isotope_masses.json is readable");
    serde_json::from_str(&text).expect("fixture is JSON")
}

/// Source: AME2020 via PyPI `periodictable` (fixture; see module doc).
#[test]
fn isotope_masses_match_ame2020_fixture_for_every_element() {
    let doc = mass_fixture();
    assert!(doc["data_source"].as_str().unwrap().contains("AME2020"));
    assert!(
        doc["library_version"].is_string(),
        "fixture records the periodictable version"
    );
    let entries = doc["elements"].as_array().unwrap();
    assert_eq!(entries.len(), 36, "fixture covers H to Kr");
    assert_eq!(Element::all().count(), 36);
    for (entry, el) in entries.iter().zip(Element::all()) {
        let z = entry["atomic_number"].as_u64().unwrap();
        assert_eq!(u64::from(el.atomic_number()), z);
        assert_eq!(el.symbol(), entry["symbol"].as_str().unwrap(), "Z={z}");
        assert_eq!(
            u64::from(el.mass_number()),
            entry["mass_number"].as_u64().unwrap(),
            "{}: isotope",
            el.symbol()
        );
        let want = entry["mass_u"].as_f64().unwrap();
        let got = el.isotope_mass_amu();
        // The brief asks for 1e-6 u; the table transcribes the same rounded
        // AME2020 values, so a far tighter bound also catches typos.
        assert!(
            (got - want).abs() <= 1e-9,
            "{}-{}: table {got} u, AME2020 {want} u",
            el.symbol(),
            el.mass_number()
        );
    }
}

/// Source: AME2020 (¹²C defines u; ¹H 1.007 825 03 u and ¹⁶O 15.994 914 62 u, from memory).
#[test]
fn a_few_masses_from_memory_and_unit_conversion() {
    let c = Element::from_symbol("C").unwrap();
    assert_eq!(c.isotope_mass_amu(), 12.0);
    assert!((Element::from_symbol("H").unwrap().isotope_mass_amu() - 1.007_825_03).abs() < 1e-8);
    assert!((Element::from_symbol("O").unwrap().isotope_mass_amu() - 15.994_914_62).abs() < 1e-8);
    for el in Element::all() {
        let m = el.isotope_mass_me();
        assert!((m - el.isotope_mass_amu() * AMU_IN_ME).abs() <= 1e-9 * m);
    }
}

#[test]
fn symbol_lookup_is_case_insensitive() {
    for (text, z) in [
        ("c", 6),
        ("C", 6),
        ("Cl", 17),
        ("CL", 17),
        ("cl", 17),
        ("cL", 17),
        (" Kr ", 36),
        ("h", 1),
    ] {
        assert_eq!(
            Element::from_symbol(text).unwrap().atomic_number(),
            z,
            "`{text}`"
        );
    }
    for el in Element::all() {
        assert_eq!(
            Element::from_symbol(&el.symbol().to_uppercase()).unwrap(),
            el
        );
        assert_eq!(
            Element::from_symbol(&el.symbol().to_lowercase()).unwrap(),
            el
        );
        assert_eq!(
            Element::from_atomic_number(u64::from(el.atomic_number())).unwrap(),
            el
        );
        assert_eq!(el.symbol().parse::<Element>().unwrap(), el);
        assert_eq!(
            el.atomic_number().to_string().parse::<Element>().unwrap(),
            el
        );
    }
}

/// Source: IUPAC element names and symbols.
#[test]
fn names_and_symbols_follow_iupac() {
    let expect = [
        (1, "H", "hydrogen"),
        (13, "Al", "aluminium"),
        (16, "S", "sulfur"),
        (26, "Fe", "iron"),
        (36, "Kr", "krypton"),
    ];
    for (z, sym, name) in expect {
        let el = Element::from_atomic_number(z).unwrap();
        assert_eq!((el.symbol(), el.name()), (sym, name));
    }
}

#[test]
fn unknown_elements_are_typed_errors() {
    assert_eq!(
        Element::from_symbol("Xx"),
        Err(ElementError::UnknownSymbol("Xx".into()))
    );
    assert_eq!(
        Element::from_symbol("Rb"),
        Err(ElementError::UnknownSymbol("Rb".into())),
        "Z=37 is beyond the table"
    );
    assert_eq!(Element::from_symbol("  "), Err(ElementError::Empty));
    assert_eq!(
        Element::from_atomic_number(0),
        Err(ElementError::UnknownAtomicNumber(0))
    );
    assert_eq!(
        Element::from_atomic_number(37),
        Err(ElementError::UnknownAtomicNumber(37))
    );
    assert!(matches!(
        "99999999999999999999999".parse::<Element>(),
        Err(ElementError::UnknownAtomicNumber(_))
    ));
    assert!(Element::from_symbol("Xx")
        .unwrap_err()
        .to_string()
        .contains("`Xx`"));
    assert!(Element::try_from(40u8)
        .unwrap_err()
        .to_string()
        .contains("40"));
}

#[test]
fn elements_serialize_as_symbols() {
    let cl = Element::from_symbol("cl").unwrap();
    assert_eq!(serde_json::to_string(&cl).unwrap(), "\"Cl\"");
    let back: Element = serde_json::from_str("\"CL\"").unwrap();
    assert_eq!(back, cl);
    assert!(serde_json::from_str::<Element>("\"Zz\"").is_err());
}

// ---------------------------------------------------------------------------
// Geometry
// ---------------------------------------------------------------------------

fn el(s: &str) -> Element {
    Element::from_symbol(s).unwrap()
}

fn water() -> Molecule {
    Molecule::from_elements_positions_bohr(
        &[el("O"), el("H"), el("H")],
        &[
            [0.0, 0.0, 0.2217],
            [0.0, 1.4309, -0.8867],
            [0.0, -1.4309, -0.8867],
        ],
    )
    .unwrap()
}

#[test]
fn masses_default_to_isotope_and_can_be_overridden() {
    let mut m = water();
    assert_eq!(
        m.masses_me(),
        vec![
            el("O").isotope_mass_me(),
            el("H").isotope_mass_me(),
            el("H").isotope_mass_me()
        ]
    );
    assert!(!m.atoms[1].has_mass_override());
    // ²H: 2.014 101 778 u (AME2020, from memory).
    m.set_mass_amu(1, 2.014_101_778).unwrap();
    assert!((m.atoms[1].mass_amu() - 2.014_101_778).abs() < 1e-12);
    assert!((m.atoms[1].mass_me() - amu_to_me(2.014_101_778)).abs() < 1e-9);
    assert!(m.atoms[1].has_mass_override());
    assert!(!m.atoms[2].has_mass_override());
    let total: f64 = m.masses_me().iter().sum();
    assert_eq!(m.total_mass_me(), total);

    for bad in [0.0, -1.0, f64::NAN, f64::INFINITY] {
        assert!(
            matches!(
                m.set_mass_me(0, bad),
                Err(GeometryError::InvalidMass { index: 0, .. })
            ),
            "{bad}"
        );
    }
    assert_eq!(
        m.set_mass_me(3, 1.0),
        Err(GeometryError::IndexOutOfRange { index: 3, len: 3 })
    );
    assert!(Atom::new(el("H"), [0.0; 3]).with_mass_me(-2.0).is_err());
    assert_eq!(
        Atom::new(el("H"), [0.0; 3])
            .with_mass_me(3000.0)
            .unwrap()
            .mass_me(),
        3000.0
    );
}

#[test]
fn centre_of_mass_of_diatomic_and_translation() {
    // HCl along z: the centre of mass divides the bond in the inverse mass ratio.
    let r = 2.4;
    let m = Molecule::from_elements_positions_bohr(
        &[el("H"), el("Cl")],
        &[[0.0, 0.0, 0.0], [0.0, 0.0, r]],
    )
    .unwrap();
    let (mh, mcl) = (el("H").isotope_mass_me(), el("Cl").isotope_mass_me());
    let com = m.centre_of_mass_bohr().unwrap();
    let d_h = com[2];
    let d_cl = r - com[2];
    assert!((d_h * mh - d_cl * mcl).abs() < 1e-9, "lever rule");
    assert_eq!((com[0], com[1]), (0.0, 0.0));

    let mut shifted = m.clone();
    shifted.translate_bohr([1.0, -2.0, 0.5]);
    let c2 = shifted.centre_of_mass_bohr().unwrap();
    for k in 0..3 {
        assert!((c2[k] - com[k] - [1.0, -2.0, 0.5][k]).abs() < 1e-12);
    }
    shifted.shift_centre_of_mass_to_origin().unwrap();
    assert!(shifted
        .centre_of_mass_bohr()
        .unwrap()
        .iter()
        .all(|x| x.abs() < 1e-12));
    assert!((shifted.distance_bohr(0, 1).unwrap() - r).abs() < 1e-12);
    assert_eq!(
        Molecule::default().centre_of_mass_bohr(),
        Err(GeometryError::Empty)
    );
}

#[test]
fn inertia_tensor_of_diatomic_is_reduced_mass_times_r_squared() {
    let r = 1.4;
    let m = Molecule::from_elements_positions_bohr(
        &[el("H"), el("F")],
        &[[0.0, 0.0, 0.0], [0.0, 0.0, r]],
    )
    .unwrap();
    let (a, b) = (el("H").isotope_mass_me(), el("F").isotope_mass_me());
    let mu = a * b / (a + b);
    let t = m.inertia_tensor().unwrap();
    assert!((t[(0, 0)] - mu * r * r).abs() < 1e-9 * mu);
    assert!((t[(1, 1)] - mu * r * r).abs() < 1e-9 * mu);
    assert!(t[(2, 2)].abs() < 1e-9);
    assert!(t[(0, 1)].abs() < 1e-12 && t[(0, 2)].abs() < 1e-12);
}

#[test]
fn flat_positions_round_trip_and_length_checks() {
    let mut m = water();
    let flat = m.positions_flat_bohr();
    assert_eq!(flat.len(), 9);
    assert_eq!(flat[4], 1.4309);
    let doubled: Vec<f64> = flat.iter().map(|x| 2.0 * x).collect();
    m.set_positions_flat_bohr(&doubled).unwrap();
    assert_eq!(m.atoms[2].position_bohr, [0.0, -2.8618, -1.7734]);
    assert_eq!(
        m.set_positions_flat_bohr(&[0.0; 8]),
        Err(GeometryError::WrongLength {
            expected: 9,
            found: 8
        })
    );
    assert!(Molecule::from_elements_positions_bohr(&[el("H")], &[]).is_err());
    assert!(m.distance_bohr(0, 5).is_err());
}

#[test]
fn hill_formula() {
    assert_eq!(water().formula(), "H2O");
    let ethanol: Vec<Element> = ["O", "C", "H", "C", "H", "H", "H", "H", "H"]
        .iter()
        .map(|s| el(s))
        .collect();
    let pos: Vec<[f64; 3]> = (0..ethanol.len())
        .map(|i| [i as f64 * 2.0, 0.0, 0.0])
        .collect();
    assert_eq!(
        Molecule::from_elements_positions_bohr(&ethanol, &pos)
            .unwrap()
            .formula(),
        "C2H6O"
    );
    let hcl =
        Molecule::from_elements_positions_bohr(&[el("H"), el("Cl")], &[[0.0; 3], [0.0, 0.0, 2.4]])
            .unwrap();
    assert_eq!(hcl.formula(), "ClH");
}

// ---------------------------------------------------------------------------
// XYZ
// ---------------------------------------------------------------------------

const WATER_XYZ: &str = "3\nwater, angstrom\nO 0.000000 0.000000 0.117300\nH 0.000000 0.757200 -0.469200\nH 0.000000 -0.757200 -0.469200\n";

#[test]
fn reads_a_plain_frame_into_bohr() {
    let frames = parse_xyz_str(WATER_XYZ, "water.xyz").unwrap();
    assert_eq!(frames.len(), 1);
    let f = &frames[0];
    assert_eq!(f.comment, "water, angstrom");
    assert_eq!(f.first_line, 1);
    assert_eq!(f.molecule.formula(), "H2O");
    assert!((f.molecule.atoms[1].position_bohr[1] - angstrom_to_bohr(0.7572)).abs() < 1e-12);
    assert!((f.molecule.atoms[2].position_bohr[2] - angstrom_to_bohr(-0.4692)).abs() < 1e-12);
}

#[test]
fn accepts_atomic_numbers_case_crlf_fortran_exponents_and_trailing_blanks() {
    let text =
        "3\r\n\r\n8 0 0 0.1173\r\nh 0.0 7.572D-01 -0.4692\r\nH 0 -0.7572 -4.692e-1\r\n\r\n  \r\n";
    let f = parse_single_xyz_str(text, "crlf").unwrap();
    assert_eq!(f.comment, "");
    assert_eq!(f.molecule.elements(), vec![el("O"), el("H"), el("H")]);
    assert!((f.molecule.atoms[1].position_bohr[1] - angstrom_to_bohr(0.7572)).abs() < 1e-12);
    assert!((f.molecule.atoms[2].position_bohr[2] - angstrom_to_bohr(-0.4692)).abs() < 1e-12);
}

#[test]
fn reads_multiple_frames() {
    let mut text = String::new();
    for k in 0..4 {
        text.push_str(&format!(
            "2\nframe {k}\nH 0 0 0\nH 0 0 {}\n",
            0.7 + 0.1 * k as f64
        ));
    }
    let frames = parse_xyz_str(&text, "traj.xyz").unwrap();
    assert_eq!(frames.len(), 4);
    for (k, f) in frames.iter().enumerate() {
        assert_eq!(f.comment, format!("frame {k}"));
        assert_eq!(f.first_line, 1 + 4 * k);
        let d = f.molecule.distance_bohr(0, 1).unwrap();
        assert!((d - angstrom_to_bohr(0.7 + 0.1 * k as f64)).abs() < 1e-12);
    }
    let err = parse_single_xyz_str(&text, "traj.xyz").unwrap_err();
    assert_eq!(err.line(), Some(5), "{err}");
    assert!(err.to_string().contains("single geometry"), "{err}");
}

#[test]
fn write_then_read_round_trips() {
    let mut m = water();
    m.translate_bohr([0.123_456_789, -5.5, 1e-3]);
    let text = xyz_string(&m, "round trip").unwrap();
    assert!(text.starts_with("3\nround trip\nO "), "{text}");
    let back = parse_single_xyz_str(&text, "mem").unwrap();
    assert_eq!(back.comment, "round trip");
    assert_eq!(back.molecule.elements(), m.elements());
    for (a, b) in back.molecule.atoms.iter().zip(&m.atoms) {
        for k in 0..3 {
            assert!(
                (a.position_bohr[k] - b.position_bohr[k]).abs() < 1e-9,
                "{a:?} vs {b:?}"
            );
        }
    }
}

#[test]
fn trajectory_file_round_trip() {
    let dir = std::env::temp_dir().join(format!("flipswarm-chem-test-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("traj.xyz");
    let frames: Vec<XyzFrame> = (0..3)
        .map(|k| {
            let mut m = water();
            m.translate_bohr([k as f64, 0.0, 0.0]);
            XyzFrame {
                molecule: m,
                comment: format!("step {k}"),
                first_line: 0,
            }
        })
        .collect();
    write_xyz_file(&path, &frames).unwrap();
    let back = read_xyz_file(&path).unwrap();
    std::fs::remove_dir_all(&dir).unwrap();
    assert_eq!(back.len(), 3);
    for (k, f) in back.iter().enumerate() {
        assert_eq!(f.comment, format!("step {k}"));
        assert!((f.molecule.atoms[0].position_bohr[0] - k as f64).abs() < 1e-9);
    }
}

#[test]
fn extended_xyz_round_trips_frame_properties() {
    let mut buf = Vec::new();
    for k in 0..3 {
        let props = FrameProperties::new()
            .float("time_fs", 0.5 * k as f64)
            .int("state", 2 - k)
            .float("e_pot_hartree", -76.4 + 1e-7 * k as f64)
            .bool("hopped", k == 1)
            .text("label", "water \"hot\" batch");
        write_extxyz_frame(&mut buf, &water(), &props).unwrap();
    }
    let text = String::from_utf8(buf).unwrap();
    assert!(
        text.lines()
            .nth(1)
            .unwrap()
            .starts_with("Properties=species:S:1:pos:R:3 time_fs=0.0 state=2"),
        "{text}"
    );
    let frames = parse_extxyz_str(&text, "traj.extxyz").unwrap();
    assert_eq!(frames.len(), 3);
    for (k, (frame, props)) in frames.iter().enumerate() {
        assert_eq!(frame.molecule.len(), 3);
        assert_eq!(props.get_f64("time_fs"), Some(0.5 * k as f64));
        assert_eq!(props.get_i64("state"), Some(2 - k as i64));
        assert_eq!(
            props.get_f64("e_pot_hartree"),
            Some(-76.4 + 1e-7 * k as f64),
            "floats read back bit-identically"
        );
        assert_eq!(props.get("hopped"), Some(&PropValue::Bool(k == 1)));
        assert_eq!(
            props.get("label"),
            Some(&PropValue::Text("water \"hot\" batch".into()))
        );
        assert!(props.get("Properties").is_none());
    }
}

#[test]
fn writer_rejects_what_it_could_not_read_back() {
    let mut m = water();
    m.atoms[1].position_bohr[2] = f64::NAN;
    let mut buf = Vec::new();
    assert!(matches!(
        write_xyz_frame(&mut buf, &m, "x"),
        Err(XyzWriteError::NonFinitePosition { atom: 2, .. })
    ));
    assert!(buf.is_empty(), "nothing written for a rejected frame");
    assert!(matches!(
        xyz_string(&water(), "two\nlines"),
        Err(XyzWriteError::MultilineComment)
    ));
    let w = |p: FrameProperties| write_extxyz_frame(&mut Vec::new(), &water(), &p);
    assert!(matches!(
        w(FrameProperties::new().int("bad key", 1)),
        Err(XyzWriteError::Property(PropertyError::InvalidKey(_)))
    ));
    assert!(matches!(
        w(FrameProperties::new().int("Properties", 1)),
        Err(XyzWriteError::Property(PropertyError::ReservedKey))
    ));
    assert!(matches!(
        w(FrameProperties::new().int("state", 1).int("state", 2)),
        Err(XyzWriteError::Property(PropertyError::DuplicateKey(_)))
    ));
    assert!(matches!(
        w(FrameProperties::new().float("t", f64::INFINITY)),
        Err(XyzWriteError::Property(PropertyError::NonFiniteValue(_)))
    ));
}

#[test]
fn missing_file_error_names_the_path() {
    let err = read_xyz_file("/nonexistent/flipswarm/geom.xyz").unwrap_err();
    assert!(matches!(err, XyzError::Io { .. }));
    assert!(
        err.to_string().contains("/nonexistent/flipswarm/geom.xyz"),
        "{err}"
    );
}

/// Each malformed input, the line the error must name, and words the message must contain.
#[test]
fn malformed_xyz_inputs_name_the_right_line() {
    let cases: &[(&str, &str, usize, &[&str])] = &[
        ("empty file", "", 1, &["empty"]),
        ("only blank lines", "\n   \n\t\n", 1, &["empty"]),
        (
            "non-numeric count",
            "three\nc\nH 0 0 0\n",
            1,
            &["atom count", "`three`"],
        ),
        (
            "negative count",
            "-2\nc\nH 0 0 0\nH 0 0 1\n",
            1,
            &["atom count", "`-2`"],
        ),
        (
            "count with trailing text",
            "2 atoms\nc\nH 0 0 0\nH 0 0 1\n",
            1,
            &["`2 atoms`"],
        ),
        ("zero atoms", "0\nempty frame\n", 1, &["0 atoms"]),
        ("missing comment line", "1", 2, &["comment line", "line 1"]),
        (
            "count too large",
            "3\nc\nH 0 0 0\nH 0 0 1\n",
            5,
            &["after 2 of the 3 atom lines", "line 1"],
        ),
        (
            "count too small",
            "2\nc\nH 0 0 0\nH 0 0 1\nH 0 0 2\n",
            5,
            &["`H 0 0 2`", "more atom lines than the 2 declared on line 1"],
        ),
        (
            "non-numeric y",
            "2\nc\nH 0 0 0\nH 0.0 abc 1.0\n",
            4,
            &["column 3", "y coordinate", "`abc`"],
        ),
        (
            "non-numeric x",
            "1\nc\nO 1,5 0 0\n",
            3,
            &["column 2", "x coordinate", "`1,5`"],
        ),
        (
            "NaN coordinate",
            "2\nc\nH 0 0 0\nO 0 0 NaN\n",
            4,
            &["column 4", "z coordinate", "not finite"],
        ),
        (
            "infinite coordinate",
            "1\nc\nH inf 0 0\n",
            3,
            &["column 2", "not finite", "`inf`"],
        ),
        (
            "unknown symbol",
            "2\nc\nH 0 0 0\nXx 0 0 1\n",
            4,
            &["column 1", "unknown element symbol `Xx`"],
        ),
        (
            "atomic number out of range",
            "1\nc\n99 0 0 0\n",
            3,
            &["column 1", "atomic number 99"],
        ),
        (
            "too few columns",
            "2\nc\nH 0 0 0\nH 0 0\n",
            4,
            &["atom 2 of 2", "3 column(s)"],
        ),
        (
            "blank line among atoms",
            "2\nc\nH 0 0 0\n\nH 0 0 1\n",
            4,
            &["atom 2 of 2", "0 column(s)"],
        ),
        (
            "extra column",
            "1\nc\nH 0 0 0 0.5\n",
            3,
            &["column 5", "`0.5`"],
        ),
        (
            "garbage after last frame",
            "1\nc\nH 0 0 0\nend of data\n",
            4,
            &["frame 2", "`end of data`"],
        ),
        (
            "error in second frame",
            "1\nf1\nH 0 0 0\n2\nf2\nH 0 0 0\nH 0 0 x\n",
            7,
            &["column 4", "`x`"],
        ),
        (
            "duplicate atoms",
            "3\nc\nO 0 0 0\nH 0 0 1\nH 0 0.05 1\n",
            5,
            &[
                "atom 3 (H)",
                "atom 2 (H) on line 4",
                "0.0500 Å",
                "duplicates",
            ],
        ),
    ];
    assert!(cases.len() >= 10);
    for (name, text, line, words) in cases {
        let err = parse_xyz_str(text, "bad.xyz").expect_err(name);
        assert_eq!(err.line(), Some(*line), "{name}: {err}");
        let msg = err.to_string();
        assert!(
            msg.starts_with(&format!("bad.xyz: line {line}: ")),
            "{name}: {msg}"
        );
        for w in *words {
            assert!(msg.contains(w), "{name}: message lacks `{w}`: {msg}");
        }
    }
}

#[test]
fn malformed_error_kinds_are_typed() {
    let kind = |t: &str| parse_xyz_str(t, "k").unwrap_err().kind().cloned().unwrap();
    assert!(matches!(
        kind("1\nc\nH 0 y 0\n"),
        XyzErrorKind::NonNumeric {
            column: 3,
            axis: 'y',
            ..
        }
    ));
    assert!(matches!(
        kind("1\nc\nH 0 0 -inf\n"),
        XyzErrorKind::NonFinite {
            column: 4,
            axis: 'z',
            ..
        }
    ));
    assert!(matches!(
        kind("2\nc\nC 0 0 0\nC 0 0 0\n"),
        XyzErrorKind::DuplicateAtom {
            first_atom: 1,
            first_line: 3,
            second_atom: 2,
            ..
        }
    ));
    assert!(matches!(
        kind("1\nc\nQ 0 0 0\n"),
        XyzErrorKind::UnknownElement(ElementError::UnknownSymbol(_))
    ));
}

#[test]
fn atoms_just_beyond_duplicate_threshold_are_accepted() {
    assert!(parse_xyz_str("2\nc\nH 0 0 0\nH 0 0 0.1001\n", "t").is_ok());
    assert!(parse_xyz_str("2\nc\nH 0 0 0\nH 0 0 0.0999\n", "t").is_err());
}

#[test]
fn malformed_extxyz_comment_names_the_comment_line() {
    let text = "1\ntime_fs=0.0\nH 0 0 0\n1\ntime_fs=1.0 junk\nH 0 0 0\n";
    let err = parse_extxyz_str(text, "p.extxyz").unwrap_err();
    assert_eq!(err.line(), Some(5), "{err}");
    assert!(err.to_string().contains("`junk`"), "{err}");
    let err = parse_extxyz_str("1\nlabel=\"open\nH 0 0 0\n", "p.extxyz").unwrap_err();
    assert_eq!(err.line(), Some(2));
    assert!(err.to_string().contains("unterminated"), "{err}");
    let err = parse_extxyz_str(
        "1\nProperties=species:S:1:pos:R:3:vel:R:3\nH 0 0 0\n",
        "p.extxyz",
    )
    .unwrap_err();
    assert!(
        err.to_string().contains("unsupported per-atom layout"),
        "{err}"
    );
}
