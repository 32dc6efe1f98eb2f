//! Malformed ensemble definitions: each must be refused with a message that
//! names the file, the line and the key (design §9, "parse, then build").

use std::path::Path;

use flipswarm::config::{load_str, ConfigError};

const GOOD: &str = r#"title = "test"
[model]
kind = "tully-1"
[start]
sampling = "wigner"
position_bohr = -15.0
momentum_au = 15.0
width_bohr = 1.3
state = 0
[dynamics]
timestep_au = 1.0
duration_au = 5000.0
decoherence = "none"
exit_region_bohr = [-16.0, 16.0]
[swarm]
trajectories = 10
seed = 7
"#;

fn load(text: &str, overrides: &[&str]) -> Result<flipswarm::config::RunConfig, ConfigError> {
    let o: Vec<String> = overrides.iter().map(|s| s.to_string()).collect();
    load_str(text, "ens.toml", Path::new("tests/data/models"), &o)
}

/// Replace line `n` (1-based) of GOOD.
fn with_line(n: usize, new: &str) -> String {
    GOOD.lines()
        .enumerate()
        .map(|(i, l)| {
            if i + 1 == n {
                new.to_string()
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n")
}

fn without_line(n: usize) -> String {
    GOOD.lines()
        .enumerate()
        .filter(|(i, _)| i + 1 != n)
        .map(|(_, l)| l)
        .collect::<Vec<_>>()
        .join("\n")
}

#[test]
fn the_good_file_loads() {
    let c = load(GOOD, &[]).unwrap();
    assert_eq!(c.trajectories, 10);
    assert_eq!(c.settings.dt, 1.0);
}

struct Case {
    name: &'static str,
    text: String,
    overrides: Vec<&'static str>,
    /// Expected origin, line and key, and a fragment of the message.
    origin: &'static str,
    line: Option<usize>,
    key: Option<&'static str>,
    says: &'static str,
}

fn case(
    name: &'static str,
    text: String,
    line: Option<usize>,
    key: Option<&'static str>,
    says: &'static str,
) -> Case {
    Case {
        name,
        text,
        overrides: vec![],
        origin: "ens.toml",
        line,
        key,
        says,
    }
}

#[test]
fn malformed_inputs_name_file_line_and_key() {
    let cases = vec![
        case(
            "misspelt key",
            with_line(11, "timestpe_au = 1.0"),
            Some(11),
            Some("dynamics.timestpe_au"),
            "did you mean `dynamics.timestep_au`",
        ),
        case(
            "key in the wrong table",
            GOOD.replace("seed = 7", "seed = 7\n[dynamics.extra]\nx = 1"),
            Some(18),
            Some("dynamics.extra"),
            "unknown table",
        ),
        case(
            "seed placed under dynamics",
            GOOD.replace("decoherence = \"none\"", "decoherence = \"none\"\nseed = 3"),
            Some(14),
            Some("dynamics.seed"),
            "did you mean `swarm.seed`",
        ),
        case(
            "unknown table",
            GOOD.replace("[swarm]", "[swamr]"),
            Some(15),
            Some("swamr"),
            "did you mean `swarm`",
        ),
        case(
            "missing model kind",
            without_line(3),
            Some(2),
            Some("model.kind"),
            "missing",
        ),
        case(
            "unknown model kind",
            with_line(3, "kind = \"tully-4\""),
            Some(3),
            Some("model.kind"),
            "did you mean \"tully-1\"",
        ),
        case(
            "negative time step",
            with_line(11, "timestep_au = -1.0"),
            Some(11),
            Some("dynamics.timestep_au"),
            "must be positive",
        ),
        case(
            "zero time step",
            with_line(11, "timestep_au = 0"),
            Some(11),
            Some("dynamics.timestep_au"),
            "must be positive",
        ),
        case(
            "both time-step units",
            GOOD.replace("timestep_au = 1.0", "timestep_au = 1.0\ntimestep_fs = 0.02"),
            Some(11),
            Some("dynamics.timestep_au"),
            "both",
        ),
        case(
            "missing time step",
            without_line(11),
            Some(10),
            Some("dynamics.timestep_fs"),
            "missing",
        ),
        case(
            "zero mass",
            GOOD.replace("kind = \"tully-1\"", "kind = \"tully-1\"\nmass_au = 0.0"),
            Some(4),
            Some("model.mass_au"),
            "must be positive",
        ),
        case(
            "state beyond the model",
            with_line(9, "state = 2"),
            Some(9),
            Some("start.state"),
            "has 2 state",
        ),
        case(
            "negative state",
            with_line(9, "state = -1"),
            Some(9),
            Some("start.state"),
            "must not be negative",
        ),
        case(
            "string where a number belongs",
            with_line(7, "momentum_au = \"fast\""),
            Some(7),
            Some("start.momentum_au"),
            "expected a number, found a string",
        ),
        case(
            "wigner without width",
            without_line(8),
            Some(4),
            Some("start.width_bohr"),
            "missing",
        ),
        case(
            "exit region reversed",
            with_line(14, "exit_region_bohr = [16.0, -16.0]"),
            Some(14),
            Some("dynamics.exit_region_bohr"),
            "not below",
        ),
        case(
            "start outside the exit region",
            with_line(6, "position_bohr = -20.0"),
            Some(14),
            Some("dynamics.exit_region_bohr"),
            "outside",
        ),
        case(
            "zero trajectories",
            with_line(16, "trajectories = 0"),
            Some(16),
            Some("swarm.trajectories"),
            "between 1 and",
        ),
        case(
            "missing seed",
            without_line(17),
            Some(15),
            Some("swarm.seed"),
            "missing",
        ),
        case(
            "unknown decoherence",
            with_line(13, "decoherence = \"edc\""),
            Some(13),
            Some("dynamics.decoherence"),
            "is not one of",
        ),
        case(
            "duration shorter than a step",
            with_line(12, "duration_au = 0.5"),
            Some(12),
            Some("dynamics.duration_au"),
            "shorter than one time step",
        ),
        case(
            "not TOML at all",
            with_line(12, "duration_au = = 3"),
            Some(12),
            None,
            "not valid TOML",
        ),
        case(
            "key of another model kind",
            GOOD.replace(
                "kind = \"tully-1\"",
                "kind = \"tully-1\"\nfile = \"x.toml\"",
            ),
            Some(4),
            Some("model.file"),
            "not used by model kind",
        ),
        case(
            "lvc file missing",
            GOOD.replace(
                "kind = \"tully-1\"",
                "kind = \"lvc\"\nfile = \"absent.toml\"",
            ),
            Some(4),
            Some("model.file"),
            "cannot read",
        ),
        case(
            "infinite momentum",
            with_line(7, "momentum_au = inf"),
            Some(7),
            Some("start.momentum_au"),
            "finite",
        ),
        Case {
            name: "misspelt override",
            text: GOOD.to_string(),
            overrides: vec!["dynamics.substep=5"],
            origin: "--set",
            line: None,
            key: Some("dynamics.substep"),
            says: "did you mean `dynamics.substeps`",
        },
        Case {
            name: "override without =",
            text: GOOD.to_string(),
            overrides: vec!["dynamics.substeps"],
            origin: "--set",
            line: None,
            key: None,
            says: "key=value",
        },
        Case {
            name: "override with a bad value",
            text: GOOD.to_string(),
            overrides: vec!["dynamics.substeps=0"],
            origin: "--set",
            line: None,
            key: Some("dynamics.substeps"),
            says: "between 1 and",
        },
        Case {
            name: "tracking floor of 1 or more",
            text: GOOD.to_string(),
            overrides: vec!["dynamics.min_overlap_determinant=1.5"],
            origin: "--set",
            line: None,
            key: Some("dynamics.min_overlap_determinant"),
            says: "at least 0 and below 1, found 1.5",
        },
    ];
    assert!(cases.len() >= 15);
    for c in &cases {
        let err = match load(&c.text, &c.overrides) {
            Ok(_) => panic!("case `{}` was accepted", c.name),
            Err(e) => e,
        };
        let shown = err.to_string();
        assert_eq!(err.origin, c.origin, "case `{}`: {shown}", c.name);
        assert_eq!(err.line, c.line, "case `{}`: {shown}", c.name);
        assert_eq!(err.key.as_deref(), c.key, "case `{}`: {shown}", c.name);
        assert!(
            shown.contains(c.says),
            "case `{}`: message `{shown}` lacks `{}`",
            c.name,
            c.says
        );
    }
}

#[test]
fn overrides_take_effect() {
    let c = load(
        GOOD,
        &[
            "dynamics.timestep_au=0.5",
            "model.kind=tully-2",
            "dynamics.decoherence=energy-based",
        ],
    )
    .unwrap();
    assert_eq!(c.settings.dt, 0.5);
    assert!(c.effective_toml.contains("tully-2"));
    assert!(
        matches!(c.settings.decoherence, flipswarm::dynamics::DecoherenceScheme::EnergyBased { c } if c == 0.1)
    );
}

/// Femtosecond keys are converted with the CODATA 2018 atomic unit of time.
#[test]
fn femtosecond_keys_convert() {
    let text = GOOD.replace("timestep_au = 1.0", "timestep_fs = 0.024188843265857");
    let c = load(&text, &[]).unwrap();
    assert!((c.settings.dt - 1.0).abs() < 1e-12);
}

#[test]
fn lvc_model_file_errors_name_the_entry() {
    let dir = std::env::temp_dir().join(format!("flipswarm-cfg-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    std::fs::write(dir.join("m.toml"), "frequencies_ev = [0.1]\nvertical_ev = [0.0, 3.0]\n[[coupling]]\nstates = [0, 1]\nmode = 4\nvalue_ev = 0.1\n").unwrap();
    let text = GOOD
        .replace("kind = \"tully-1\"", "kind = \"lvc\"\nfile = \"m.toml\"")
        .replace(
            "sampling = \"wigner\"\nposition_bohr = -15.0\nmomentum_au = 15.0\nwidth_bohr = 1.3\n",
            "",
        )
        .replace("exit_region_bohr = [-16.0, 16.0]\n", "");
    let err = load_str(&text, "ens.toml", &dir, &[])
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("m.toml")
            && err.contains("[[coupling]] entry 0")
            && err.contains("`mode` = 4"),
        "{err}"
    );
    std::fs::write(
        dir.join("m.toml"),
        "frequencies_ev = [0.1]\nvertical_ev = [0.0, 3.0]\nfrequency = 2\n",
    )
    .unwrap();
    let err = load_str(&text, "ens.toml", &dir, &[])
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("m.toml") && err.contains("line 3") && err.contains("frequency"),
        "{err}"
    );
    std::fs::remove_dir_all(&dir).ok();
}

/// Molecule ensembles: each bad entry is refused naming the key and what is
/// wrong (the first good file loads and tracks the requested singlets).
#[test]
fn molecule_model_errors_name_the_key() {
    let dir = std::env::temp_dir().join(format!("flipswarm-cfg-mol-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    std::fs::write(
        dir.join("ch2.xyz"),
        "3\nmethylene\nC 0 0 0\nH 0 0.86 0.65\nH 0 -0.86 0.65\n",
    )
    .unwrap();
    std::fs::write(
        dir.join("bad.xyz"),
        "3\nmethylene\nC 0 0 0\nH 0 0.86\nH 0 -0.86 0.65\n",
    )
    .unwrap();
    let good = "[model]\nkind = \"molecule\"\ngeometry = \"ch2.xyz\"\nbasis = \"STO-3G\"\nsinglets = 2\n[start]\nstate = 1\n[dynamics]\ntimestep_fs = 0.5\nduration_fs = 5.0\n[swarm]\ntrajectories = 2\nseed = 1\n";
    let c = load_str(good, "mol.toml", &dir, &[]).unwrap();
    assert_eq!(c.model.n_states(), 2);
    assert_eq!(c.model.n_dof(), 9);
    let cases: &[(&[&str], &str, &str)] = &[
        (
            &["model.geometry=\"missing.xyz\""],
            "model.geometry",
            "missing.xyz",
        ),
        (&["model.geometry=\"bad.xyz\""], "model.geometry", "line 4"),
        (&["model.basis=\"6-31Z\""], "model.basis", "6-31Z"),
        (
            &["model.functional=\"nonsense\""],
            "model.functional",
            "nonsense",
        ),
        (
            &["model.functional=\"hf\"", "model.grid=\"fine\""],
            "model.grid",
            "not used",
        ),
        (&["model.grid=\"huge\""], "model.grid", "huge"),
        (&["model.singlets=0"], "model.singlets", "between 1 and 50"),
        (&["model.charge=0.5"], "model.charge", "whole number"),
        (&["model.charge=1"], "model.charge", "triplet"),
        (
            &["model.gradient_step_bohr=0.5"],
            "model.gradient_step_bohr",
            "too large",
        ),
        (
            &["model.scf_tolerance=0.1"],
            "model.scf_tolerance",
            "too loose",
        ),
        (
            &["start.sampling=\"wigner\""],
            "start.sampling",
            "flipswarm sample",
        ),
        (
            &["start.position_bohr=1.0"],
            "start.position_bohr",
            "not used by molecules",
        ),
        (
            &["model.file=\"x.toml\""],
            "model.file",
            "not used by model kind",
        ),
        (&["start.state=2"], "start.state", "does not exist"),
    ];
    for (overrides, key, says) in cases {
        let o: Vec<String> = overrides.iter().map(|s| s.to_string()).collect();
        let err = load_str(good, "mol.toml", &dir, &o).unwrap_err();
        let shown = err.to_string();
        assert_eq!(err.key.as_deref(), Some(*key), "{overrides:?}: {shown}");
        assert!(
            shown.contains(says),
            "{overrides:?}: `{shown}` lacks `{says}`"
        );
    }
    std::fs::remove_dir_all(&dir).ok();
}
