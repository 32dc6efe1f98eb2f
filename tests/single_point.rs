//! `flipswarm single-point`: the command-line SCF.
//!
//! Sources: `tests/data/qc/scf_energies.json` (PySCF 2.14.0, made by
//! `scripts/reference/scf_energies.py`); the error cases check our own
//! messages and exit codes (documented in the README).

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_flipswarm");
/// Å per bohr (CODATA 2018), to write the fixture's bohr geometries as XYZ.
const BOHR_IN_ANGSTROM: f64 = 0.529_177_210_903;

fn fixture() -> Value {
    let path = format!(
        "{}/tests/data/qc/scf_energies.json",
        env!("CARGO_MANIFEST_DIR")
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn scratch(name: &str) -> PathBuf {
    common::scratch("sp", name)
}

fn write_xyz(dir: &Path, case: &Value) -> PathBuf {
    let symbols = ["", "H", "He", "Li", "Be", "B", "C", "N", "O", "F"];
    let atoms = case["atoms"].as_array().unwrap();
    let mut s = format!("{}\n{}\n", atoms.len(), case["molecule"].as_str().unwrap());
    for a in atoms {
        let p = a["position_bohr"].as_array().unwrap();
        s.push_str(&format!(
            "{} {:.15} {:.15} {:.15}\n",
            symbols[a["z"].as_u64().unwrap() as usize],
            p[0].as_f64().unwrap() * BOHR_IN_ANGSTROM,
            p[1].as_f64().unwrap() * BOHR_IN_ANGSTROM,
            p[2].as_f64().unwrap() * BOHR_IN_ANGSTROM
        ));
    }
    let path = dir.join(format!("{}.xyz", case["molecule"].as_str().unwrap()));
    std::fs::write(&path, s).unwrap();
    path
}

fn find<'a>(fx: &'a Value, molecule: &str, method: &str, functional: Option<&str>) -> &'a Value {
    fx["cases"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| {
            c["molecule"] == molecule
                && c["method"] == method
                && c["functional"].as_str() == functional
        })
        .unwrap()
}

fn run(args: &[&str]) -> (i32, String, String) {
    let out = Command::new(BIN)
        .args(args)
        .env("FLIPSWARM_LOG", "warn")
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

// Source: PySCF 2.14.0 fixture (ROHF triplet methylene, 6-31G*), 1e-8 Eh;
// <S²> of ROHF is exactly s(s+1) = 2.
#[test]
fn rohf_json_matches_the_reference() {
    let fx = fixture();
    let case = find(&fx, "ch2", "rohf", None);
    let dir = scratch("rohf");
    let xyz = write_xyz(&dir, case);
    let (code, out, err) = run(&[
        "single-point",
        xyz.to_str().unwrap(),
        "--method",
        "rohf",
        "--basis",
        "6-31g*",
        "--multiplicity",
        "3",
        "--json",
    ]);
    assert_eq!(code, 0, "{err}");
    let v: Value = serde_json::from_str(&out).unwrap();
    let e = v["energy"].as_f64().unwrap();
    assert!((e - case["energy"].as_f64().unwrap()).abs() < 1e-8, "{e}");
    assert!((v["s_squared"].as_f64().unwrap() - 2.0).abs() < 1e-10);
    let occ_a = v["occupations_alpha"].as_array().unwrap();
    let occ_b = v["occupations_beta"].as_array().unwrap();
    let na: f64 = occ_a.iter().map(|x| x.as_f64().unwrap()).sum();
    let nb: f64 = occ_b.iter().map(|x| x.as_f64().unwrap()).sum();
    assert_eq!((na, nb), (5.0, 3.0));
    assert!(v["iterations"].as_u64().unwrap() >= 2);
    assert_eq!(
        v["history"].as_array().unwrap().len() as u64,
        v["iterations"].as_u64().unwrap()
    );
}

// Source: PySCF 2.14.0 fixture (ROKS/BH&HLYP triplet methylene), 1e-6 Eh on
// the fine grid; the table names the method and prints the energy.
#[test]
fn roks_table_matches_the_reference() {
    let fx = fixture();
    let case = find(&fx, "ch2", "roks", Some("bhhlyp"));
    let dir = scratch("roks");
    let xyz = write_xyz(&dir, case);
    let (code, out, err) = run(&["single-point", xyz.to_str().unwrap()]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("ROKS/bhhlyp, 6-31G*"), "{out}");
    let line = out
        .lines()
        .find(|l| l.trim_start().starts_with("total energy"))
        .unwrap();
    let e: f64 = line.split_whitespace().nth(2).unwrap().parse().unwrap();
    assert!((e - case["energy"].as_f64().unwrap()).abs() < 1e-6, "{e}");
    assert!(out.contains("<S^2>"));
}

#[test]
fn bad_input_is_named_with_a_non_zero_exit() {
    let fx = fixture();
    let dir = scratch("bad");
    let xyz = write_xyz(&dir, find(&fx, "h2o", "rhf", None));
    let x = xyz.to_str().unwrap();
    // (arguments, exit code, text the message must contain)
    let cases: Vec<(Vec<&str>, i32, &str)> = vec![
        (
            vec!["single-point", "/nonexistent/w.xyz"],
            2,
            "/nonexistent/w.xyz",
        ),
        (vec!["single-point", x, "--basis", "6-31q*"], 2, "6-31q*"),
        (
            vec!["single-point", x, "--method", "rhf", "--multiplicity", "3"],
            2,
            "closed-shell",
        ),
        (
            vec!["single-point", x, "--method", "rohf", "--multiplicity", "2"],
            2,
            "multiplicity 2",
        ),
        (
            vec![
                "single-point",
                x,
                "--method",
                "rks",
                "--functional",
                "b3lpy",
            ],
            2,
            "b3lpy",
        ),
        (
            vec!["single-point", x, "--method", "rks", "--grid", "superfine"],
            2,
            "superfine",
        ),
        (
            vec![
                "single-point",
                x,
                "--method",
                "rhf",
                "--max-iterations",
                "2",
            ],
            4,
            "not converged in 2 iterations",
        ),
    ];
    for (args, code, text) in cases {
        let (c, _, err) = run(&args);
        assert_eq!(c, code, "{args:?}: {err}");
        assert!(
            err.contains(text),
            "{args:?}: message lacks {text:?}: {err}"
        );
        assert!(!err.contains("panicked"), "{err}");
    }
    // Two atoms on top of each other.
    let clash = dir.join("clash.xyz");
    std::fs::write(&clash, "2\nclash\nH 0 0 0\nH 0 0 0.01\n").unwrap();
    let (c, _, err) = run(&["single-point", clash.to_str().unwrap(), "--method", "rhf"]);
    assert_eq!(c, 2, "{err}");
    assert!(err.contains("line 4") && err.contains("atom 2"), "{err}");
}

/// The states of `single-point X --method rohf --basis 6-31g* --excited mrsf
/// EXTRA --json` (exit code 0 asserted).
fn mrsf_states(x: &str, extra: &[&str]) -> Vec<Value> {
    let mut args = vec![
        "single-point",
        x,
        "--method",
        "rohf",
        "--basis",
        "6-31g*",
        "--excited",
        "mrsf",
    ];
    args.extend_from_slice(extra);
    args.push("--json");
    let (code, out, err) = run(&args);
    assert_eq!(code, 0, "{err}");
    let v: Value = serde_json::from_str(&out).unwrap();
    v["excited_states"]["states"].as_array().unwrap().clone()
}

// `--excited`: the table and JSON carry S0 as the lowest singlet at 0 eV,
// exact triplet <S²> = 2 (MRSF triplet block, J. Chem. Phys. 149, 104101
// (2018), from memory), and the same energies as the library call
// (`tests/mrsf.rs` checks those against a determinant CI).
#[test]
fn excited_states_from_the_command_line() {
    let fx = fixture();
    let case = find(&fx, "ch2", "rohf", None);
    let dir = scratch("excited");
    let xyz = write_xyz(&dir, case);
    let x = xyz.to_str().unwrap();
    let states = &mrsf_states(x, &["--singlets", "2", "--triplets", "1"]);
    assert_eq!(states.len(), 3);
    let s0 = states.iter().find(|s| s["label"] == "S0").unwrap();
    assert_eq!(s0["excitation_ev"].as_f64().unwrap(), 0.0);
    let t = states.iter().find(|s| s["spin"] == "triplet").unwrap();
    assert!((t["s_squared"].as_f64().unwrap() - 2.0).abs() < 1e-8);
    // energies ascending
    let e: Vec<f64> = states
        .iter()
        .map(|s| s["energy"].as_f64().unwrap())
        .collect();
    assert!(e.windows(2).all(|w| w[0] <= w[1]), "{e:?}");
    // a singlet reference cannot be spin-flipped
    let (code, _, err) = run(&["single-point", x, "--method", "rhf", "--excited", "mrsf"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("triplet reference"), "{err}");
    let (code, out, err) = run(&[
        "single-point",
        x,
        "--method",
        "rohf",
        "--basis",
        "sto-3g",
        "--excited",
        "sf",
        "--singlets",
        "3",
    ]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("SF-TDA") && out.contains("<S^2>"), "{out}");
}

// `--singlet-cv drop`: without the core→virtual configurations every MRSF
// singlet is exactly spin-pure (exact spin algebra, module docs of
// `response`: the singlet CV combination is 2/3 singlet + 1/3 quintet, so
// with them <S²> = 2 w_CV), and each singlet energy can only rise, since the
// block is then a principal submatrix of the full singlet block (Cauchy's
// interlacing theorem, textbook linear algebra). Only MRSF takes the option.
#[test]
fn singlets_without_core_virtual_configurations_are_spin_pure() {
    let fx = fixture();
    let dir = scratch("singlet-cv");
    let xyz = write_xyz(&dir, find(&fx, "ch2", "rohf", None));
    let x = xyz.to_str().unwrap();
    let singlets = |cv: &str| -> Vec<(f64, f64)> {
        mrsf_states(x, &["--singlets", "4", "--singlet-cv", cv])
            .iter()
            .filter(|s| s["spin"] == "singlet")
            .map(|s| {
                (
                    s["energy"].as_f64().unwrap(),
                    s["s_squared"].as_f64().unwrap(),
                )
            })
            .collect()
    };
    let (keep, drop) = (singlets("keep"), singlets("drop"));
    assert_eq!((keep.len(), drop.len()), (4, 4));
    eprintln!("keep {keep:?}\ndrop {drop:?}");
    assert!(keep.iter().any(|s| s.1 > 1e-6), "{keep:?}");
    for (k, d) in keep.iter().zip(&drop) {
        assert!(d.1.abs() < 1e-10, "{drop:?}");
        assert!(d.0 >= k.0 - 1e-10, "{keep:?} {drop:?}");
    }
    let (code, _, err) = run(&[
        "single-point",
        x,
        "--method",
        "rohf",
        "--excited",
        "sf",
        "--singlet-cv",
        "drop",
    ]);
    assert_eq!(code, 2, "{err}");
    assert!(
        err.contains("--singlet-cv") && err.contains("MRSF"),
        "{err}"
    );
}

// `flipswarm optimize`: the reported largest gradient component of the
// RHF/STO-3G water minimum is below the documented threshold 4.5e-4 Eh/bohr
// (common practice; tests/gradients.rs compares optimised geometries with
// PySCF 2.14.0 fixtures), and a step limit that is too small exits with
// code 4 and keeps the last accepted geometry.
#[test]
fn optimize_from_the_command_line() {
    let fx = fixture();
    let dir = scratch("opt");
    let xyz = write_xyz(&dir, find(&fx, "h2o", "rhf", None));
    let x = xyz.to_str().unwrap();
    let out_xyz = dir.join("opt.xyz");
    let (code, out, err) = run(&[
        "optimize",
        x,
        "-o",
        out_xyz.to_str().unwrap(),
        "--method",
        "rhf",
        "--basis",
        "sto-3g",
    ]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("converged in"), "{out}");
    let g: f64 = out
        .split("max |gradient| = ")
        .nth(1)
        .unwrap()
        .split_whitespace()
        .next()
        .unwrap()
        .parse()
        .unwrap();
    assert!(g < 4.5e-4, "{out}");
    let text = std::fs::read_to_string(&out_xyz).unwrap();
    assert_eq!(text.lines().next().unwrap().trim(), "3");
    let stuck = dir.join("stuck.xyz");
    let (code, _, err) = run(&[
        "optimize",
        x,
        "-o",
        stuck.to_str().unwrap(),
        "--method",
        "rhf",
        "--basis",
        "sto-3g",
        "--max-steps",
        "1",
    ]);
    assert_eq!(code, 4, "{err}");
    assert!(
        err.contains("not converged after 1 steps") && err.contains("last accepted geometry"),
        "{err}"
    );
    assert!(std::fs::read_to_string(&stuck)
        .unwrap()
        .contains("not converged"));
    // A crossing search (gradient projection, the default) that runs out
    // of steps names the gap it reached and keeps its last geometry.
    let twisted = dir.join("twisted.xyz");
    std::fs::write(
        &twisted,
        "6\ntwisted, folded ethylene\nC 0 0 -0.7\nC 0 0 0.7\nH 0 0.920132 -1.274962\n\
         H 0 -0.920132 -1.274962\nH 0.920132 0.636396 1.10656\nH -0.920132 0.636396 1.10656\n",
    )
    .unwrap();
    let meci = dir.join("meci.xyz");
    let (code, _, err) = run(&[
        "optimize",
        twisted.to_str().unwrap(),
        "-o",
        meci.to_str().unwrap(),
        "--method",
        "rohf",
        "--basis",
        "sto-3g",
        "--crossing",
        "S0,S1",
        "--singlets",
        "2",
        "--triplets",
        "0",
        "--max-steps",
        "2",
    ]);
    assert_eq!(code, 4, "{err}");
    assert!(
        err.contains("step limit 2 (gap") && err.contains("last accepted geometry"),
        "{err}"
    );
    assert!(std::fs::read_to_string(&meci)
        .unwrap()
        .contains("S0/S1 crossing of ROHF: not converged"));
}
