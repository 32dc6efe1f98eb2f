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
    /// Refuse (exit 4, nothing written) unless every trajectory of every
    /// slice has ended; without it an incomplete merge only warns.
    #[arg(long)]
    pub require_complete: bool,
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
    if args.require_complete {
        if let Err(e) = files.iter().try_for_each(|f| h5::probe_in_child(f, true)) {
            eprintln!("error: {e}");
            return exit::INPUT;
        }
        match not_ended(&files) {
            Ok(None) => {}
            Ok(Some(m)) => {
                eprintln!("error: {m}; nothing written (resume the run, then merge again)");
                return exit::RUNTIME;
            }
            Err(e) => {
                eprintln!("error: {e}");
                return exit::INPUT;
            }
        }
    }
    // (Already probed above when completeness was checked.)
    match h5::merge_checked(&files, &args.output, !args.require_complete) {
        Ok(r) => {
            println!(
                "{}: {} trajectories, {} rows, {} hop attempts from {} part files",
                r.output.display(),
                r.trajectories,
                r.rows,
                r.hops,
                r.parts
            );
            if !args.require_complete {
                if let Ok(Some(m)) = not_ended(&files) {
                    eprintln!("warning: {m}; the merged file holds what has been computed so far");
                }
            }
            exit::OK
        }
        Err(e) => {
            eprintln!("error: {e}");
            exit::INPUT
        }
    }
}

/// Whether every trajectory of the run has ended (finished or failed): all
/// slices of the parts' slicing present, every trajectory they own begun and
/// ended; if not, what is missing. Parts whose writer did not close are left
/// to the merge itself, which refuses them.
fn not_ended(files: &[PathBuf]) -> Result<Option<String>, h5::EnsembleError> {
    use std::collections::BTreeSet;
    let (mut expected, mut begun, mut slices) = (BTreeSet::new(), BTreeSet::new(), BTreeSet::new());
    let mut slicing = 1usize;
    let mut unfinished = 0usize;
    for f in files {
        let r = h5::PartReader::open(f)?;
        if r.writer_state() == h5::WriterState::Open {
            return Ok(None);
        }
        expected.extend(r.meta().trajectories.iter().copied());
        slices.insert(r.meta().slice.0);
        slicing = r.meta().slice.1;
        for i in r.trajectory_indices() {
            begun.insert(i);
            if !matches!(r.status(i)?.1, h5::Phase::Finished | h5::Phase::Failed) {
                unfinished += 1;
            }
        }
    }
    let absent: Vec<usize> = (0..slicing).filter(|k| !slices.contains(k)).collect();
    let not_started = expected.difference(&begun).count();
    if unfinished + not_started == 0 && absent.is_empty() {
        return Ok(None);
    }
    let mut what = format!(
        "the run is incomplete: {} of the parts' {} trajectories have not ended ({unfinished} begun but stopped or interrupted, {not_started} not started)",
        unfinished + not_started,
        expected.len()
    );
    if !absent.is_empty() {
        what.push_str(&format!(
            "; slice(s) {absent:?} of {slicing} have no part file"
        ));
    }
    Ok(Some(what))
}
