//! Cost of one MRSF-TDDFT surface-hopping step, printed, never asserted
//! (`scripts/bench`): ethylene (BH&HLYP, coarse grid) in three basis sets,
//! analytic gradients (and, as the reference run, numerical ones for
//! 6-31G), a start and `STEPS` steps of one trajectory on S1 each, with
//! the breakdown the back end records (SCF and response at the step's
//! geometry, overlaps with the previous step, the 6N displaced calculations
//! of the numerical gradient) and the engine's share (everything else: Verlet,
//! amplitudes, hop test, decoherence). Ratios are against the step's SCF.

use std::path::Path;
use std::time::Instant;

use flipswarm::config::{load_str, ModelSpec};
use flipswarm::dynamics::Trajectory;
use flipswarm::electronic::qc::backend::MrsfBackend;
use flipswarm::swarm;

const STEPS: usize = 2;

fn main() {
    let dir = std::env::temp_dir().join(format!("flipswarm-bench-dynamics-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp dir");
    std::fs::copy(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("ensembles/molecules/ethylene.xyz"),
        dir.join("ethylene.xyz"),
    )
    .expect("ethylene geometry");
    println!("MRSF-TDDFT dynamics step, ethylene BH&HLYP (coarse grid), 3 singlets, start + {STEPS} steps on S1");
    println!(
        "{:>15} {:>4} {:>10} {:>9} {:>9} {:>9} {:>10} {:>10} {:>12} {:>11}",
        "basis/gradient",
        "nbf",
        "step (s)",
        "SCF",
        "response",
        "overlaps",
        "gradient",
        "engine",
        "engine share",
        "step/SCF"
    );
    let mut reference = None;
    for (basis, gradients) in [
        ("6-31G", "numerical"),
        ("STO-3G", "analytic"),
        ("6-31G", "analytic"),
        ("6-31G*", "analytic"),
    ] {
        let text = format!(
            r#"[model]
kind = "molecule"
geometry = "ethylene.xyz"
basis = "{basis}"
gradients = "{gradients}"
grid = "coarse"
singlets = 3
[start]
sampling = "fixed"
state = 1
[dynamics]
timestep_fs = 0.5
duration_fs = 100.0
[swarm]
trajectories = 1
seed = 3
"#
        );
        let cfg = load_str(&text, "bench", &dir, &[]).expect("valid bench config");
        let ModelSpec::Molecule { spec, .. } = &cfg.model else {
            unreachable!()
        };
        let nbf = flipswarm::electronic::qc::basis::BasisSet::new(
            &spec.calculation.molecule,
            &spec.calculation.basis,
            None,
        )
        .map(|b| b.nbf)
        .unwrap_or(0);
        let mut backend = MrsfBackend::new(spec.clone());
        let masses = spec.masses();
        let (q, v, state) = swarm::initial_condition(&cfg, &masses, 0);
        let t = Instant::now();
        {
            let rng = swarm::trajectory_rng(cfg.seed, 0, 1);
            let mut traj = Trajectory::start(&mut backend, cfg.settings.clone(), q, v, state, rng)
                .expect("start");
            for _ in 0..STEPS {
                traj.step().expect("step");
            }
        }
        let wall = t.elapsed().as_secs_f64();
        let tm = backend.timings();
        let per = |x: f64| x / (STEPS + 1) as f64;
        let engine = (wall - tm.total()).max(0.0);
        println!(
            "{:>15} {:>4} {:>10.2} {:>9.3} {:>9.3} {:>9.4} {:>10.2} {:>10.5} {:>11.4}% {:>11.1}",
            format!("{basis}/{}", &gradients[..4]),
            nbf,
            per(wall),
            per(tm.scf),
            per(tm.response),
            per(tm.overlaps),
            per(tm.gradients),
            per(engine),
            100.0 * engine / wall,
            wall / tm.scf
        );
        if basis == "6-31G" {
            match reference {
                None => reference = Some(per(wall)),
                Some(r) => println!(
                    "{:>15} 6-31G step: numerical / analytic gradients = {:.1}×",
                    "",
                    r / per(wall)
                ),
            }
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
}
