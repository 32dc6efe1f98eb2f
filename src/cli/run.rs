//! `flipswarm run`.

use std::path::PathBuf;

use clap::Args;

use super::exit;
use crate::config;
use crate::swarm::{self, PopulationCurves, Summary};

/// Arguments of `flipswarm run`.
#[derive(Debug, Args)]
#[command(after_help = "Example:\n  flipswarm run ensembles/tully-1.toml --set start.momentum_au=20 --set start.width_bohr=1.0 --threads 2\n\nSee `flipswarm keys` for every key, its unit and its default.")]
pub struct RunArgs {
    /// The ensemble definition (TOML).
    pub ensemble: PathBuf,
    /// Override a configuration key, e.g. --set dynamics.timestep_au=0.5 (repeatable).
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub overrides: Vec<String>,
    /// Worker threads (0 = one per core).
    #[arg(long, default_value_t = 0)]
    pub threads: usize,
    /// Print the summary as JSON on standard output.
    #[arg(long)]
    pub json: bool,
    /// Write ensemble-averaged population curves (time in fs; fraction of
    /// trajectories and mean |c|² per state) to this CSV file. An existing
    /// file is not overwritten.
    #[arg(long, value_name = "CSV")]
    pub populations: Option<PathBuf>,
}

/// Execute; returns the exit code.
pub fn execute(args: &RunArgs) -> i32 {
    let cfg = match config::load_file(&args.ensemble, &args.overrides) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
    };
    if let Some(p) = &args.populations {
        if p.exists() {
            eprintln!("error: {} exists; choose another name or remove it first", p.display());
            return exit::INPUT;
        }
    }
    tracing::info!(
        "ensemble {}: {} trajectories, model {}, {} states, time step {:.4} a.u., {} steps at most",
        args.ensemble.display(),
        cfg.trajectories,
        swarm::make_backend(&cfg.model).info().name,
        cfg.model.n_states(),
        cfg.settings.dt,
        (cfg.settings.max_time / cfg.settings.dt).ceil()
    );
    let outcomes = match swarm::run(&cfg, args.threads) {
        Ok(o) => o,
        Err(e) => {
            eprintln!("error: cannot start {} worker threads: {e}", args.threads);
            return exit::RUNTIME;
        }
    };
    let summary = Summary::new(&cfg, &outcomes);
    if let Some(p) = &args.populations {
        let curves = PopulationCurves::new(&cfg, &outcomes, swarm::record_interval(&cfg));
        if let Err(e) = std::fs::write(p, curves.to_csv()) {
            eprintln!("error: cannot write {}: {e}", p.display());
            return exit::RUNTIME;
        }
        tracing::info!("population curves written to {}", p.display());
    }
    if args.json {
        match serde_json::to_string_pretty(&summary) {
            Ok(s) => println!("{s}"),
            Err(e) => {
                eprintln!("error: cannot write JSON: {e}");
                return exit::RUNTIME;
            }
        }
    } else {
        print!("{}", summary.to_text());
    }
    if summary.failed.is_empty() {
        exit::OK
    } else {
        exit::SOME_FAILED
    }
}
