//! `flipswarm resume`.

use std::path::PathBuf;

use clap::Args;

use super::exit;

/// Arguments of `flipswarm resume`.
#[derive(Debug, Args)]
pub struct ResumeArgs {
    /// The run directory given to `flipswarm run --out`.
    pub dir: PathBuf,
    /// The slice this process continues (as given to `run --slice`).
    #[arg(long, value_name = "K/N", value_parser = super::run::parse_slice)]
    pub slice: Option<(usize, usize)>,
    /// Worker threads (0 = one per core).
    #[arg(long, default_value_t = 0)]
    pub threads: usize,
    /// Print the report as JSON.
    #[arg(long)]
    pub json: bool,
}

/// Execute; returns the exit code.
pub fn execute(args: &ResumeArgs) -> i32 {
    let cfg = match crate::ensemble::runner::load_run_config(&args.dir) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
    };
    let slice = args
        .slice
        .or_else(|| single_slice(&args.dir))
        .unwrap_or((0, 1));
    super::run_into(&cfg, &args.dir, slice, args.threads, true, args.json, None)
}

/// The slice of the only part file in `dir`, if there is exactly one.
fn single_slice(dir: &std::path::Path) -> Option<(usize, usize)> {
    let mut found = Vec::new();
    for e in std::fs::read_dir(dir).ok()?.flatten() {
        let name = e.file_name().to_string_lossy().to_string();
        if let Some(rest) = name
            .strip_prefix("part-")
            .and_then(|r| r.strip_suffix(".h5"))
        {
            if let Some((k, n)) = rest.split_once("-of-") {
                if let (Ok(k), Ok(n)) = (k.parse(), n.parse()) {
                    found.push((k, n));
                }
            }
        }
    }
    (found.len() == 1).then(|| found[0])
}
