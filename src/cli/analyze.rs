//! `flipswarm analyze`: populations with confidence bands, kinetic fits with
//! bootstrap intervals, hop statistics and geometries, energy conservation,
//! tables and figures. The work is in `crate::analysis`; this file parses,
//! validates and reports.

use std::path::PathBuf;

use clap::Args;

use super::exit;
use crate::analysis::data::{self, LoadOptions};
use crate::analysis::geometry::Param;
use crate::analysis::kinetics::Model;
use crate::analysis::populations::Ended;
use crate::analysis::report::{self, Options};
use crate::analysis::AnalysisError;

/// Arguments of `flipswarm analyze`.
#[derive(Debug, Args)]
#[command(
    after_help = "Examples:\n  flipswarm analyze runs/cone --fit decay:2 --fit seq:2,1,0 --out runs/cone/analysis\n  flipswarm analyze part-0000-of-0002.h5 part-0001-of-0002.h5 --ended drop --from-fs 0 --to-fs 200 --json\n\nFits are made to the fractions of trajectories on each state; intervals are percentile bootstrap intervals over trajectories."
)]
pub struct AnalyzeArgs {
    /// Ensemble files (part files, merged files) or run directories.
    #[arg(required = true)]
    pub paths: Vec<PathBuf>,
    /// Directory for tables (CSV, JSON) and figures (SVG, PNG); without it only the summary is printed.
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// Overwrite existing output files.
    #[arg(long)]
    pub force: bool,
    /// Print the summary as JSON on standard output.
    #[arg(long)]
    pub json: bool,
    /// Trajectories that ended before the others: `hold` keeps their last state
    /// (1D scattering, trajectories stopped in the ground state), `drop` takes
    /// them out of the count from their end on. Failed ones are always left out.
    #[arg(long, value_enum, default_value_t = Ended::Hold)]
    pub ended: Ended,
    /// Fit a kinetic model to the fractions of trajectories: decay:S
    /// (P = exp(−(t−t0)/τ) for t > t0, 1 before), rise:S (1 − that) or seq:A,B,C
    /// (A → B → C, lifetimes τ1, τ2, all in A at t = 0). Times are those of the
    /// run (t = 0 at its start), also inside a --from-fs/--to-fs window. Repeatable.
    #[arg(long = "fit", value_name = "MODEL")]
    pub fits: Vec<String>,
    /// Fit a delay t0 in decay and rise models (otherwise t0 = 0).
    #[arg(long)]
    pub delay: bool,
    /// Bootstrap resamples for the intervals of fitted parameters.
    #[arg(long, default_value_t = 1000, value_name = "N")]
    pub resamples: usize,
    /// Seed of the bootstrap.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Bond length at hops between two atoms (0-based), e.g. --bond 0,1 (Å). Repeatable.
    #[arg(long = "bond", value_name = "I,J")]
    pub bonds: Vec<String>,
    /// Angle at hops, I–J–K at J (degrees). Repeatable.
    #[arg(long = "angle", value_name = "I,J,K")]
    pub angles: Vec<String>,
    /// Dihedral angle at hops, I–J–K–L (degrees). Repeatable.
    #[arg(long = "dihedral", value_name = "I,J,K,L")]
    pub dihedrals: Vec<String>,
    /// Bins of the hop-time histogram.
    #[arg(long, default_value_t = 40, value_name = "N")]
    pub bins: usize,
    /// Trajectory whose energies are plotted against time (default: the first one).
    #[arg(long, value_name = "N")]
    pub trajectory: Option<usize>,
    /// Start of the time window (fs).
    #[arg(long, value_name = "FS")]
    pub from_fs: Option<f64>,
    /// End of the time window (fs).
    #[arg(long, value_name = "FS")]
    pub to_fs: Option<f64>,
    /// States to report, e.g. 0,2 (default: all).
    #[arg(long, value_name = "LIST")]
    pub states: Option<String>,
    /// Trajectories to use (ensemble indices), e.g. 0-99,120 (default: all).
    #[arg(long, value_name = "LIST")]
    pub trajectories: Option<String>,
    /// Size of the figures in pixels, WIDTHxHEIGHT.
    #[arg(long, default_value = "960x640", value_name = "WxH")]
    pub size: String,
}

/// Parse "0-9,12" into indices.
pub fn parse_list(s: &str, opt: &str) -> Result<Vec<usize>, String> {
    let mut out = Vec::new();
    for part in s.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let bad = || format!("{opt} `{s}`: `{part}` is not a number or a range like 3-7");
        if let Some((a, b)) = part.split_once('-') {
            let a: usize = a.trim().parse().map_err(|_| bad())?;
            let b: usize = b.trim().parse().map_err(|_| bad())?;
            if b < a {
                return Err(format!("{opt} `{s}`: range {part} runs backwards"));
            }
            out.extend(a..=b);
        } else {
            out.push(part.parse().map_err(|_| bad())?);
        }
    }
    if out.is_empty() {
        return Err(format!("{opt} `{s}`: empty list"));
    }
    out.sort_unstable();
    out.dedup();
    Ok(out)
}

/// Parse "WxH".
pub fn parse_size(s: &str) -> Result<(u32, u32), String> {
    let bad = || {
        format!("--size `{s}`: expected WIDTHxHEIGHT in pixels, e.g. 960x640 (each 100 to 10000)")
    };
    let (w, h) = s.split_once(['x', 'X']).ok_or_else(bad)?;
    let w: u32 = w.trim().parse().map_err(|_| bad())?;
    let h: u32 = h.trim().parse().map_err(|_| bad())?;
    if !(100..=10000).contains(&w) || !(100..=10000).contains(&h) {
        return Err(bad());
    }
    Ok((w, h))
}

/// Validated options, the trajectories chosen and the figure size.
type Parsed = (Options, Option<Vec<usize>>, (u32, u32));

fn options(args: &AnalyzeArgs) -> Result<Parsed, String> {
    let mut params = Vec::new();
    for (kind, list) in [
        ("bond", &args.bonds),
        ("angle", &args.angles),
        ("dihedral", &args.dihedrals),
    ] {
        for s in list {
            params.push(Param::parse(kind, s)?);
        }
    }
    let fits = args
        .fits
        .iter()
        .map(|f| Model::parse(f, args.delay))
        .collect::<Result<Vec<_>, _>>()?;
    if !fits.is_empty() && args.resamples == 0 {
        return Err("--resamples 0: need at least one bootstrap resample for the intervals".into());
    }
    if args.bins == 0 {
        return Err("--bins 0: need at least one bin".into());
    }
    let states = args
        .states
        .as_deref()
        .map(|s| parse_list(s, "--states"))
        .transpose()?;
    let only = args
        .trajectories
        .as_deref()
        .map(|s| parse_list(s, "--trajectories"))
        .transpose()?;
    let size = parse_size(&args.size)?;
    let opts = Options {
        ended: args.ended,
        from_fs: args.from_fs,
        to_fs: args.to_fs,
        states,
        fits,
        resamples: args.resamples,
        seed: args.seed,
        params,
        bins: args.bins,
    };
    Ok((opts, only, size))
}

fn fail(e: AnalysisError) -> i32 {
    eprintln!("error: {e}");
    match e {
        AnalysisError::Input(_) => exit::INPUT,
        AnalysisError::Output(_) => exit::RUNTIME,
    }
}

/// Execute; returns the exit code.
pub fn execute(args: &AnalyzeArgs) -> i32 {
    let (opts, only, size) = match options(args) {
        Ok(x) => x,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
    };
    // Refuse to overwrite before any work is done.
    if let (Some(dir), false) = (&args.out, args.force) {
        let probe = report::output_files(dir, args.trajectory);
        if let Some(f) = probe.iter().find(|f| f.exists()) {
            eprintln!("error: {}: exists; refusing to overwrite it (use --force, or choose another --out directory)", f.display());
            return exit::INPUT;
        }
    }
    let files = match data::part_files(&args.paths) {
        Ok(f) => f,
        Err(e) => return fail(e),
    };
    // The energy plot needs one trajectory's energies: the chosen one, or the first present.
    let energies_of = match args.trajectory {
        Some(i) => Some(i),
        None if args.out.is_some() => first_trajectory(&files, only.as_deref()),
        None => None,
    };
    let load = LoadOptions {
        keep_q: !opts.params.is_empty(),
        energies_of,
        only,
    };
    let ens = match data::load(&args.paths, &load) {
        Ok(e) => e,
        Err(e) => return fail(e),
    };
    let energy_traj = match energies_of {
        Some(i) => match ens.trajs.iter().find(|t| t.index == i) {
            Some(t) => Some(t),
            None => {
                let have: Vec<usize> = ens.trajs.iter().map(|t| t.index).take(10).collect();
                eprintln!("error: --trajectory {i}: no such trajectory with data in {} (first ones: {:?})", data::file_list(&ens.files), have);
                return exit::INPUT;
            }
        },
        None => None,
    };
    let analysis = match report::analyse(&ens, &opts) {
        Ok(a) => a,
        Err(e) => return fail(e),
    };
    if let Some(dir) = &args.out {
        match report::write_all(
            &analysis,
            if args.out.is_some() {
                energy_traj
            } else {
                None
            },
            dir,
            size,
            args.force,
        ) {
            Ok(written) => tracing::info!("wrote {} files into {}", written.len(), dir.display()),
            Err(e) => return fail(e),
        }
    }
    if args.json {
        match serde_json::to_string_pretty(&analysis) {
            Ok(s) => println!("{s}"),
            Err(e) => {
                eprintln!("error: cannot write JSON: {e}");
                return exit::RUNTIME;
            }
        }
    } else {
        print!("{}", analysis.to_text());
        if let Some(dir) = &args.out {
            println!("\ntables and figures in {}", dir.display());
        }
    }
    exit::OK
}

/// The first trajectory index with data in `files` (within `only`).
fn first_trajectory(files: &[PathBuf], only: Option<&[usize]>) -> Option<usize> {
    let mut best: Option<usize> = None;
    for f in files {
        let Ok(r) = crate::ensemble::h5::PartReader::open(f) else {
            continue;
        };
        for i in r.trajectory_indices() {
            if only.is_none_or(|o| o.contains(&i)) {
                best = Some(best.map_or(i, |b: usize| b.min(i)));
                break;
            }
        }
    }
    best
}
