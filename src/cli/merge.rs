//! `flipswarm merge`.

use std::path::PathBuf;

use clap::Args;

use super::exit;
use crate::ensemble::h5;

/// Arguments of `flipswarm merge`.
#[derive(Debug, Args)]
pub struct MergeArgs {
    /// Part files or run directories to gather.
    #[arg(required = true)]
    pub parts: Vec<PathBuf>,
    /// The merged ensemble file (must not exist).
    #[arg(short, long, value_name = "FILE")]
    pub output: PathBuf,
}

/// Execute; returns the exit code.
pub fn execute(args: &MergeArgs) -> i32 {
    let mut files = Vec::new();
    for p in &args.parts {
        match super::inspect::part_files(p) {
            Ok(f) => files.extend(f),
            Err(e) => {
                eprintln!("error: {e}");
                return exit::INPUT;
            }
        }
    }
    // Probed in a child first: a damaged part gets a message, not a crash.
    match h5::merge_checked(&files, &args.output, true) {
        Ok(r) => {
            println!("{}: {} trajectories, {} rows, {} hop attempts from {} part files", r.output.display(), r.trajectories, r.rows, r.hops, r.parts);
            exit::OK
        }
        Err(e) => {
            eprintln!("error: {e}");
            exit::INPUT
        }
    }
}
