//! Tests of `flipswarm::units`.
//!
//! External source for the constants: CODATA 2018 (E. Tiesinga et al.,
//! Rev. Mod. Phys. 93, 025010 (2021)), as shipped in the PyPI package `scipy`
//! (version recorded in the fixture, 1.17.1 when made) and extracted by
//! `scripts/reference/codata2018.py` into `tests/data/chem/codata2018.json`.
//! The consistency tests derive one constant from others using the defining
//! relations of atomic units and the exact 2019 SI constants.

use flipswarm::units::*;
use serde_json::Value;
use std::collections::HashMap;

/// CODATA 2018 values from the scipy-generated fixture, keyed by the CODATA name.
fn codata() -> HashMap<String, f64> {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/chem/codata2018.json"
    );
    let text = std::fs::read_to_string(path).expect("fixture codata2018.json is readable");
    let doc: Value = serde_json::from_str(&text).expect("fixture is JSON");
    assert!(
        doc["data_source"].as_str().unwrap().contains("CODATA 2018"),
        "fixture must be made from the CODATA 2018 table"
    );
    assert!(
        doc["library_version"].is_string(),
        "fixture records the scipy version"
    );
    doc["constants"]
        .as_object()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v["value"].as_f64().unwrap()))
        .collect()
}

fn rel(a: f64, b: f64) -> f64 {
    ((a - b) / b).abs()
}

fn assert_rel(name: &str, got: f64, want: f64, tol: f64) {
    assert!(
        rel(got, want) <= tol,
        "{name}: got {got:e}, want {want:e}, relative error {:e} > {tol:e}",
        rel(got, want)
    );
}

// --- CODATA 2018 values (source: scipy CODATA 2018 table, see module doc) ---

#[test]
fn codata2018_atomic_unit_factors_match_fixture() {
    let c = codata();
    // Printed CODATA values: the constants must agree to double rounding.
    assert_rel(
        "hartree in eV",
        HARTREE_IN_EV,
        c["Hartree energy in eV"],
        1e-15,
    );
    assert_rel(
        "bohr in Å",
        BOHR_IN_ANGSTROM,
        c["Bohr radius"] * 1e10,
        1e-15,
    );
    assert_rel("bohr in m", BOHR_IN_M, c["Bohr radius"], 1e-15);
    assert_rel(
        "a.u. time in fs",
        AU_TIME_IN_FS,
        c["atomic unit of time"] * 1e15,
        1e-15,
    );
    assert_rel(
        "k_B in hartree/K",
        BOLTZMANN_IN_HARTREE_PER_K,
        c["kelvin-hartree relationship"],
        1e-15,
    );
    assert_rel(
        "k_B in eV/K",
        BOLTZMANN_IN_EV_PER_K,
        c["Boltzmann constant in eV/K"],
        1e-15,
    );
    assert_rel(
        "hartree in cm^-1",
        HARTREE_IN_CM1,
        c["hartree-inverse meter relationship"] / 100.0,
        1e-15,
    );
    assert_rel(
        "c in a.u.",
        SPEED_OF_LIGHT_AU,
        c["inverse fine-structure constant"],
        1e-15,
    );
    // m_u/m_e is the inverse of the listed m_e in u (13 significant digits kept).
    assert_rel("u in m_e", AMU_IN_ME, 1.0 / c["electron mass in u"], 1e-12);
}

#[test]
fn codata2018_exact_si_constants_match_fixture() {
    // Exact in the 2019 SI. serde_json's default float parser may be one ulp
    // off, so compare to 2 ulp rather than bit-for-bit.
    let c = codata();
    let tol = 2.0 * f64::EPSILON;
    assert_rel("c", SPEED_OF_LIGHT_SI, c["speed of light in vacuum"], tol);
    assert_rel("e", ELEMENTARY_CHARGE_C, c["elementary charge"], tol);
    assert_rel("h", PLANCK_J_S, c["Planck constant"], tol);
    assert_rel("k_B", BOLTZMANN_J_PER_K, c["Boltzmann constant"], tol);
    assert_rel("N_A", AVOGADRO_PER_MOL, c["Avogadro constant"], tol);
}

#[test]
fn debye_matches_codata2018_atomic_unit_of_dipole() {
    // 1 D = 1e-21/c C·m (definition); a.u. of dipole e·a0 from CODATA 2018.
    let c = codata();
    let debye_c_m = 1e-21 / c["speed of light in vacuum"];
    assert_rel(
        "debye in e·bohr",
        DEBYE_IN_E_BOHR,
        debye_c_m / c["atomic unit of electric dipole mom."],
        1e-10,
    );
    // from memory: 1 D ≈ 0.393430 e·a0.
    assert!((DEBYE_IN_E_BOHR - 0.393_430).abs() < 1e-6);
}

#[test]
fn electronvolt_in_hartree_matches_codata2018() {
    let c = codata();
    assert_rel(
        "1 eV in hartree",
        ev_to_hartree(1.0),
        c["electron volt-hartree relationship"],
        1e-12,
    );
}

// --- Internal consistency of the atomic-unit system ---

#[test]
fn boltzmann_in_ev_over_hartree_in_ev_is_boltzmann_in_hartree() {
    // k_B[eV/K] / E_h[eV] = k_B[E_h/K]; CODATA 2018 relative uncertainty of E_h is 1.9e-12.
    assert_rel(
        "k_B consistency",
        BOLTZMANN_IN_EV_PER_K / HARTREE_IN_EV,
        BOLTZMANN_IN_HARTREE_PER_K,
        1e-11,
    );
}

#[test]
fn speed_of_light_in_au_is_c_times_time_over_length() {
    // c [a0 / (ħ/E_h)] = c[m/s] · t_au[s] / a0[m]
    let c_au = SPEED_OF_LIGHT_SI * (AU_TIME_IN_FS * 1e-15) / BOHR_IN_M;
    assert_rel("c in a.u.", c_au, SPEED_OF_LIGHT_AU, 1e-11);
}

#[test]
fn atomic_unit_of_time_is_hbar_over_hartree() {
    let hbar = PLANCK_J_S / (2.0 * std::f64::consts::PI);
    let hartree_j = HARTREE_IN_EV * ELEMENTARY_CHARGE_C;
    assert_rel("ħ/E_h in fs", hbar / hartree_j * 1e15, AU_TIME_IN_FS, 1e-11);
}

#[test]
fn hartree_in_wavenumbers_is_hartree_over_hc() {
    let hartree_j = HARTREE_IN_EV * ELEMENTARY_CHARGE_C;
    let per_cm = hartree_j / (PLANCK_J_S * SPEED_OF_LIGHT_SI) / 100.0;
    assert_rel("E_h/(hc) in cm^-1", per_cm, HARTREE_IN_CM1, 1e-11);
    assert_rel(
        "hc in hartree·cm",
        HC_IN_HARTREE_CM * HARTREE_IN_CM1,
        1.0,
        1e-15,
    );
    // A 1 cm^-1 photon has energy hc·(1 cm^-1).
    assert_rel("1 cm^-1", cm1_to_hartree(1.0), HC_IN_HARTREE_CM, 1e-15);
}

#[test]
fn hartree_in_kelvin_is_hartree_over_kb() {
    // E_h / k_B from the exact k_B and e: 315 775.024 804 07 K in CODATA 2018 (from memory).
    let t = HARTREE_IN_EV / BOLTZMANN_IN_EV_PER_K;
    assert_rel("E_h/k_B", hartree_to_kelvin(1.0), t, 1e-11);
    assert!((t - 315_775.024_804).abs() < 1e-3);
}

// --- Helpers and round trips ---

#[test]
fn conversion_helpers_round_trip() {
    type Pair = (&'static str, fn(f64) -> f64, fn(f64) -> f64);
    let pairs: [Pair; 7] = [
        ("eV", ev_to_hartree, hartree_to_ev),
        ("Å", angstrom_to_bohr, bohr_to_angstrom),
        ("fs", fs_to_au, au_to_fs),
        ("u", amu_to_me, me_to_amu),
        ("K", kelvin_to_hartree, hartree_to_kelvin),
        ("cm^-1", cm1_to_hartree, hartree_to_cm1),
        ("D", debye_to_au, au_to_debye),
    ];
    for (name, to, back) in pairs {
        for x in [-3.5e3, -1.0, 1e-12, 0.5, 1.0, 42.0, 6.02e23] {
            let y = back(to(x));
            assert!(
                rel(y, x) < 4.0 * f64::EPSILON,
                "{name}: {x} -> {} -> {y}",
                to(x)
            );
        }
        assert_eq!(to(0.0), 0.0, "{name}: zero maps to zero");
        // Each conversion actually scales (factor differs from 1).
        assert!((to(1.0) - 1.0).abs() > 1e-3, "{name}: factor is not 1");
    }
}

#[test]
fn helpers_apply_the_documented_factor_direction() {
    assert_rel("1 hartree in eV", hartree_to_ev(1.0), HARTREE_IN_EV, 1e-15);
    assert_rel(
        "1 bohr in Å",
        bohr_to_angstrom(1.0),
        BOHR_IN_ANGSTROM,
        1e-15,
    );
    assert_rel("1 a.u. in fs", au_to_fs(1.0), AU_TIME_IN_FS, 1e-15);
    assert_rel("1 u in m_e", amu_to_me(1.0), AMU_IN_ME, 1e-15);
    assert_rel(
        "1 K in hartree",
        kelvin_to_hartree(1.0),
        BOLTZMANN_IN_HARTREE_PER_K,
        1e-15,
    );
    assert_rel(
        "1 hartree in cm^-1",
        hartree_to_cm1(1.0),
        HARTREE_IN_CM1,
        1e-15,
    );
    assert_rel("1 D in a.u.", debye_to_au(1.0), DEBYE_IN_E_BOHR, 1e-15);
    // 1 fs is about 41.341 a.u. of time (from memory).
    assert!((fs_to_au(1.0) - 41.341_373_3).abs() < 1e-6);
    // k_B T at 300 K is about 25.852 meV (from memory).
    assert!((hartree_to_ev(kelvin_to_hartree(300.0)) - 0.025_852).abs() < 1e-6);
}

// --- Length newtypes ---

#[test]
fn bohr_and_angstrom_convert_with_from() {
    let b = Bohr::from(Angstrom(1.0));
    assert_rel("1 Å in bohr", b.0, 1.0 / BOHR_IN_ANGSTROM, 1e-15);
    let a = Angstrom::from(Bohr(2.0));
    assert_rel("2 bohr in Å", a.0, 2.0 * BOHR_IN_ANGSTROM, 1e-15);
    let back: Angstrom = Bohr::from(Angstrom(3.25)).into();
    assert_rel("Å round trip", back.0, 3.25, 2.0 * f64::EPSILON);
}

#[test]
fn length_newtype_arithmetic_and_display() {
    assert_eq!(Bohr(1.5) + Bohr(2.0), Bohr(3.5));
    assert_eq!(Bohr(1.5) - Bohr(2.0), Bohr(-0.5));
    assert_eq!(-Angstrom(1.0), Angstrom(-1.0));
    assert_eq!(Angstrom(1.0) * 3.0, Angstrom(3.0));
    assert_eq!(Bohr(3.0) / 2.0, Bohr(1.5));
    assert!(Bohr(1.0) < Bohr(2.0));
    assert_eq!(Bohr(1.5).to_string(), "1.5 bohr");
    assert_eq!(Angstrom(0.25).to_string(), "0.25 Å");
}

#[test]
fn length_newtypes_serialize_as_plain_numbers() {
    assert_eq!(serde_json::to_string(&Bohr(1.25)).unwrap(), "1.25");
    let a: Angstrom = serde_json::from_str("0.75").unwrap();
    assert_eq!(a, Angstrom(0.75));
}
