//! Command-line interface: argument definitions and one function per
//! subcommand. No physics here.

pub mod run;

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
    /// List every configuration key with its unit and default.
    Keys,
}
