//! `flipswarm run`.

use std::path::PathBuf;

use clap::Args;

use super::exit;
use crate::config;
use crate::swarm::{self, PopulationCurves, Summary};

/// Arguments of `flipswarm run`.
#[derive(Debug, Args)]
#[command(
    after_help = "Example:\n  flipswarm run ensembles/tully-1.toml --set start.momentum_au=20 --set start.width_bohr=1.0 --threads 2\n\nSee `flipswarm keys` for every key, its unit and its default."
)]
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
    /// Run directory for the ensemble files (part file, checkpoints, run.toml).
    /// Without it nothing is saved: only the summary is printed.
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// Run only slice K of N of the ensemble (trajectories K·T/N to (K+1)·T/N − 1), e.g. 0/4.
    #[arg(long, value_name = "K/N", value_parser = parse_slice)]
    pub slice: Option<(usize, usize)>,
    /// Write ensemble-averaged population curves (time in fs; fraction of
    /// trajectories and mean |c|² per state) to this CSV file. An existing
    /// file is not overwritten.
    #[arg(long, value_name = "CSV")]
    pub populations: Option<PathBuf>,
}

/// Parse "K/N" with 0 ≤ K < N.
pub fn parse_slice(s: &str) -> Result<(usize, usize), String> {
    let (k, n) = s
        .split_once('/')
        .ok_or_else(|| format!("`{s}` is not of the form K/N, e.g. 0/4"))?;
    let k: usize = k
        .trim()
        .parse()
        .map_err(|_| format!("`{k}` in `{s}` is not a whole number"))?;
    let n: usize = n
        .trim()
        .parse()
        .map_err(|_| format!("`{n}` in `{s}` is not a whole number"))?;
    if n == 0 || k >= n {
        return Err(format!("slice {k}/{n}: need 0 ≤ K < N"));
    }
    Ok((k, n))
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
            eprintln!(
                "error: {} exists; choose another name or remove it first",
                p.display()
            );
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
    if let Some(dir) = &args.out {
        return super::run_into(
            &cfg,
            dir,
            args.slice.unwrap_or((0, 1)),
            args.threads,
            false,
            args.json,
            args.populations.as_deref(),
        );
    }
    if args.slice.is_some() {
        eprintln!("error: --slice needs --out (a slice is only useful when its results are saved)");
        return exit::INPUT;
    }
    tracing::info!("no --out directory given: results are summarised, not saved");
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
