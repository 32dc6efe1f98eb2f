//! Command-line interface: argument definitions and one function per
//! subcommand. No physics here.

pub mod analyze;
pub mod export;
pub mod inspect;
pub mod merge;
pub mod modes;
pub mod optimize;
pub mod resume;
pub mod run;
pub mod sample;
pub mod single_point;
pub mod spectrum;
pub mod status;
pub mod submit;

use clap::{Parser, Subcommand};

/// Exit codes (documented in the README and in `--help`).
pub mod exit {
    /// Everything succeeded.
    pub const OK: i32 = 0;
    /// The run completed but some trajectories failed.
    pub const SOME_FAILED: i32 = 1;
    /// Bad usage or input (nothing was run).
    pub const INPUT: i32 = 2;
    /// Stopped on request; resumable.
    pub const STOPPED: i32 = 3;
    /// An internal or I/O error while running.
    pub const RUNTIME: i32 = 4;
}

const AFTER_HELP: &str = "\
Units: inside, everything is atomic units (bohr, hartree, electron masses, ħ/E_h for time).
Configuration keys carry their unit in the name (timestep_fs, mass_au, width_bohr, max_energy_drift_ev).

Exit codes: 0 success; 1 some trajectories failed; 2 bad usage or input (nothing was run);
3 stopped on request, resumable; 4 runtime or I/O error.

Logging goes to standard error; set FLIPSWARM_LOG (e.g. FLIPSWARM_LOG=debug) or use -v/-q.";

/// Excited-state molecular dynamics with fewest-switches surface hopping.
#[derive(Debug, Parser)]
#[command(name = "flipswarm", version, about, long_about = None, after_help = AFTER_HELP)]
pub struct Cli {
    /// More log output (repeat for more).
    #[arg(short, long, action = clap::ArgAction::Count, global = true)]
    pub verbose: u8,
    /// Only warnings and errors in the log.
    #[arg(short, long, global = true)]
    pub quiet: bool,
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run an ensemble of surface-hopping trajectories described by a TOML file
    /// and print a summary (branching ratios with standard errors for
    /// one-dimensional scattering models; state fractions and mean quantum
    /// populations otherwise).
    Run(run::RunArgs),
    /// Continue every unfinished trajectory of a run directory (finished ones
    /// are left untouched); the continued trajectories are bit-for-bit those
    /// that never stopped.
    Resume(resume::ResumeArgs),
    /// Show the status of every trajectory of a run directory or part files.
    Inspect(inspect::InspectArgs),
    /// Gather part files into one ensemble file.
    Merge(merge::MergeArgs),
    /// Write chosen trajectories as CSV or extended XYZ (for molecular viewers).
    Export(export::ExportArgs),
    /// Analyse ensemble files: populations with confidence bands, lifetimes
    /// with bootstrap intervals, hop statistics, plots and tables.
    Analyze(analyze::AnalyzeArgs),
    /// One SCF calculation (RHF, UHF, ROHF, RKS, UKS, ROKS) at one geometry:
    /// total energy and its parts, orbital energies with occupations, <S^2>,
    /// SCF iterations.
    SinglePoint(single_point::SinglePointArgs),
    /// Geometry optimisation (quasi-Newton, Cartesian) of the SCF ground
    /// state or of an MRSF-TDDFT state; writes the optimised XYZ.
    Optimize(optimize::OptimizeArgs),
    /// Harmonic normal modes of a model's ground state, or of a molecule
    /// from a Hessian file, written to a normal-modes file for `sample`.
    Modes(modes::ModesArgs),
    /// Wigner-distributed initial conditions from a normal-modes file (T = 0
    /// or thermal), optionally with excitation energies, oscillator strengths
    /// and initial-state selection; `run` reads the file with
    /// start.sampling = "file".
    Sample(sample::SampleArgs),
    /// Absorption spectrum of an initial-conditions file (nuclear-ensemble
    /// approach): CSV with cross section and molar absorption coefficient,
    /// per-state contributions, SVG and PNG plots.
    Spectrum(spectrum::SpectrumArgs),
    /// Run an ensemble on a Slurm cluster: a job array with one slice per
    /// task, pre-timeout checkpointing and requeue, and a merge job.
    Submit(submit::SubmitArgs),
    /// Progress of a run directory slice by slice, with its Slurm jobs.
    Status(status::StatusArgs),
    /// List every configuration key with its unit and default.
    Keys,
}

/// Install handlers: the first SIGINT, SIGTERM or SIGUSR1 asks the run to
/// finish the current step of every trajectory, checkpoint and exit with
/// code 3 (resumable); a second SIGINT or SIGTERM ends the process at once.
pub fn stop_flag() -> std::sync::Arc<std::sync::atomic::AtomicBool> {
    use signal_hook::consts::{SIGINT, SIGTERM, SIGUSR1};
    let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    for sig in [SIGINT, SIGTERM] {
        // Order matters: the conditional shutdown sees the flag set by the first signal.
        let _ = signal_hook::flag::register_conditional_shutdown(sig, 130, flag.clone());
        let _ = signal_hook::flag::register(sig, flag.clone());
    }
    let _ = signal_hook::flag::register(SIGUSR1, flag.clone());
    flag
}

/// Run (or resume) into a directory and report; returns the exit code.
pub fn run_into(
    cfg: &crate::config::RunConfig,
    dir: &std::path::Path,
    slice: (usize, usize),
    threads: usize,
    resume: bool,
    json: bool,
    populations: Option<&std::path::Path>,
) -> i32 {
    use crate::ensemble::runner;
    let stop = stop_flag();
    let model = cfg.model.clone();
    let factory = move |_: usize| crate::swarm::make_backend(&model);
    let opts = runner::Options {
        threads,
        stop: stop.clone(),
        factory: &factory,
        progress_bar: true,
    };
    let result = if resume {
        runner::resume(cfg, dir, slice, &opts)
    } else {
        runner::start(cfg, dir, slice, &opts)
    };
    let report = match result {
        Ok(r) => r,
        Err(e @ (runner::RunError::Directory { .. } | runner::RunError::Config(_))) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
        Err(e) => {
            eprintln!("error: {e}");
            eprintln!("what was computed up to the last checkpoint is kept in {}; `flipswarm resume {}` continues", dir.display(), dir.display());
            return exit::RUNTIME;
        }
    };
    let part = report.part.display();
    // The summary is computed from what is on disk: the file is the result.
    let outcomes = match read_outcomes(&report.part) {
        Ok(o) => o,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::RUNTIME;
        }
    };
    let summary = crate::swarm::Summary::new(cfg, &outcomes);
    if let Some(p) = populations {
        let curves = crate::swarm::PopulationCurves::new(cfg, &outcomes, cfg.output.record_every);
        if let Err(e) = std::fs::write(p, curves.to_csv()) {
            eprintln!("error: cannot write {}: {e}", p.display());
            return exit::RUNTIME;
        }
    }
    if json {
        let v = serde_json::json!({
            "part": report.part, "finished": report.finished, "failed": report.failed,
            "stopped": report.stopped, "pending": report.pending,
            "resumed_from_checkpoint": report.resumed_from_checkpoint,
            "resumed_from_previous_checkpoint": report.resumed_from_previous,
            "summary": summary,
        });
        println!("{v}");
    } else {
        println!(
            "{part}: {} finished, {} failed, {} stopped, {} not started",
            report.finished, report.failed, report.stopped, report.pending
        );
        if report.resumed_from_previous > 0 {
            println!("{} trajectories resumed from their previous checkpoint (the newest was missing or damaged)", report.resumed_from_previous);
        }
        println!();
        print!("{}", summary.to_text());
    }
    if report.stopped + report.pending > 0 {
        eprintln!(
            "stopped: {} trajectories can be continued with `flipswarm resume {}`",
            report.stopped + report.pending,
            dir.display()
        );
        return exit::STOPPED;
    }
    if report.failed > 0 {
        return exit::SOME_FAILED;
    }
    exit::OK
}

/// Outcomes of the ended trajectories of a part file (for the summary).
fn read_outcomes(
    part: &std::path::Path,
) -> Result<Vec<crate::swarm::Outcome>, crate::ensemble::h5::EnsembleError> {
    let reader = crate::ensemble::h5::PartReader::open(part)?;
    let mut out = Vec::new();
    for i in reader.trajectory_indices() {
        let course = reader.read_course(i)?;
        if !matches!(course.status, crate::dynamics::Status::Running) {
            out.push(crate::swarm::Outcome::from_course(&course));
        }
    }
    Ok(out)
}
