//! `flipswarm analyze`. Placeholder: being written.

use std::path::PathBuf;

use clap::Args;

/// Arguments of `flipswarm analyze`.
#[derive(Debug, Args)]
pub struct AnalyzeArgs {
    /// Ensemble files (part files, merged files) or run directories.
    #[arg(required = true)]
    pub paths: Vec<PathBuf>,
}

/// Execute; returns the exit code.
pub fn execute(_args: &AnalyzeArgs) -> i32 {
    eprintln!("error: analyze is not available yet");
    super::exit::RUNTIME
}
