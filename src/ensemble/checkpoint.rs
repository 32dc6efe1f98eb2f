//! Per-trajectory checkpoint files: everything needed to continue a
//! trajectory exactly (its [`TrajectoryState`], with the hopping generator,
//! and the back end's [`Snapshot`]), plus how many rows and hops of it are
//! already in the part file.
//!
//! A checkpoint is JSON (floats round-trip bit-for-bit) followed by a line
//! with an FNV-1a 64-bit checksum of the JSON. It is written to a temporary
//! name, flushed to disk, and renamed over the previous checkpoint, which is
//! first kept as `*.prev`: a kill at any moment leaves either the new or the
//! previous checkpoint intact, and a damaged newest checkpoint falls back to
//! the previous one.

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::dynamics::TrajectoryState;
use crate::electronic::Snapshot;

/// Format tag of checkpoint files.
pub const FORMAT: &str = "flipswarm-checkpoint";

/// The content of one checkpoint.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Checkpoint {
    /// Always [`FORMAT`].
    pub format: String,
    /// Layout version (1).
    pub version: u32,
    /// Ensemble index of the trajectory.
    pub index: usize,
    /// Rows of this trajectory in the part file that this checkpoint covers.
    pub rows_written: u64,
    /// Hop rows in the part file that this checkpoint covers.
    pub hops_written: u64,
    /// Warning rows in the part file that this checkpoint covers.
    #[serde(default)]
    pub warnings_written: u64,
    /// The engine state after the last completed step.
    pub state: TrajectoryState,
    /// The back end's electronic state.
    pub snapshot: Snapshot,
}

/// Problems with checkpoint files.
#[derive(Debug, thiserror::Error)]
pub enum CheckpointError {
    /// Reading or writing failed.
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    /// The file is damaged or not a checkpoint.
    #[error("{path}: damaged checkpoint: {reason}")]
    Damaged { path: PathBuf, reason: String },
}

/// Which file a checkpoint came from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Source {
    /// The newest checkpoint.
    Latest,
    /// The previous one (the newest was missing or damaged).
    Previous,
}

/// FNV-1a, 64 bits.
pub fn fnv1a(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xcbf2_9ce4_8422_2325u64, |h, &b| {
        (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
    })
}

/// The checkpoint path of trajectory `index` in directory `dir`.
pub fn path_for(dir: &Path, index: usize) -> PathBuf {
    dir.join(format!("traj-{index:06}.ckpt"))
}

/// `path` with `suffix` appended to its file name.
pub(crate) fn with_suffix(path: &Path, suffix: &str) -> PathBuf {
    let mut s = path.as_os_str().to_owned();
    s.push(suffix);
    PathBuf::from(s)
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> CheckpointError + '_ {
    move |source| CheckpointError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Write `ckpt` to `path` atomically, keeping the previous checkpoint as `path.prev`.
pub fn write(path: &Path, ckpt: &Checkpoint) -> Result<(), CheckpointError> {
    let json = serde_json::to_string(ckpt).map_err(|e| CheckpointError::Damaged {
        path: path.to_path_buf(),
        reason: format!("cannot serialise: {e}"),
    })?;
    let tmp = with_suffix(path, ".tmp");
    {
        let mut f = fs::File::create(&tmp).map_err(io(&tmp))?;
        writeln!(f, "{json}").map_err(io(&tmp))?;
        writeln!(f, "checksum {:016x}", fnv1a(json.as_bytes())).map_err(io(&tmp))?;
        f.sync_all().map_err(io(&tmp))?;
    }
    if path.exists() {
        let prev = with_suffix(path, ".prev");
        fs::rename(path, &prev).map_err(io(path))?;
    }
    fs::rename(&tmp, path).map_err(io(path))?;
    if let Some(dir) = path.parent() {
        // Make the renames durable (best effort: not every file system allows it).
        if let Ok(d) = fs::File::open(dir) {
            let _ = d.sync_all();
        }
    }
    Ok(())
}

/// Write several checkpoints, each atomically as [`write()`] does, with one
/// directory sync per directory at the end (the writer's commit).
pub fn write_batch(items: &[(PathBuf, Checkpoint)]) -> Result<(), CheckpointError> {
    let mut dirs: Vec<PathBuf> = Vec::new();
    for (path, ckpt) in items {
        let json = serde_json::to_string(ckpt).map_err(|e| CheckpointError::Damaged {
            path: path.to_path_buf(),
            reason: format!("cannot serialise: {e}"),
        })?;
        let tmp = with_suffix(path, ".tmp");
        {
            let mut f = fs::File::create(&tmp).map_err(io(&tmp))?;
            let mut text = json;
            let sum = fnv1a(text.as_bytes());
            text.push_str(&format!("\nchecksum {sum:016x}\n"));
            f.write_all(text.as_bytes()).map_err(io(&tmp))?;
            f.sync_all().map_err(io(&tmp))?;
        }
        if path.exists() {
            fs::rename(path, with_suffix(path, ".prev")).map_err(io(path))?;
        }
        fs::rename(&tmp, path).map_err(io(path))?;
        if let Some(d) = path.parent() {
            if !dirs.iter().any(|x| x == d) {
                dirs.push(d.to_path_buf());
            }
        }
    }
    for d in dirs {
        // Make the renames durable (best effort: not every file system allows it).
        if let Ok(f) = fs::File::open(&d) {
            let _ = f.sync_all();
        }
    }
    Ok(())
}

/// Read and verify one checkpoint file.
pub fn read_file(path: &Path) -> Result<Checkpoint, CheckpointError> {
    let text = fs::read_to_string(path).map_err(io(path))?;
    let damaged = |reason: String| CheckpointError::Damaged {
        path: path.to_path_buf(),
        reason,
    };
    let (json, tail) = text
        .split_once('\n')
        .ok_or_else(|| damaged("no checksum line (truncated?)".into()))?;
    let sum = tail
        .trim()
        .strip_prefix("checksum ")
        .and_then(|h| u64::from_str_radix(h, 16).ok())
        .ok_or_else(|| damaged("no valid checksum line (truncated?)".into()))?;
    if fnv1a(json.as_bytes()) != sum {
        return Err(damaged("checksum does not match the content".into()));
    }
    let ckpt: Checkpoint = serde_json::from_str(json).map_err(|e| damaged(e.to_string()))?;
    if ckpt.format != FORMAT || ckpt.version != 1 {
        return Err(damaged(format!(
            "format `{}` version {} is not {FORMAT} version 1",
            ckpt.format, ckpt.version
        )));
    }
    Ok(ckpt)
}

/// The newest intact checkpoint at `path` (or its `.prev`), with the problems
/// met on the way (for the log). `Ok(None)` when there is none at all.
pub fn read_best(path: &Path) -> (Option<(Checkpoint, Source)>, Vec<CheckpointError>) {
    let mut problems = Vec::new();
    for (p, source) in [
        (path.to_path_buf(), Source::Latest),
        (with_suffix(path, ".prev"), Source::Previous),
    ] {
        if !p.exists() {
            continue;
        }
        match read_file(&p) {
            Ok(c) => return (Some((c, source)), problems),
            Err(e) => problems.push(e),
        }
    }
    (None, problems)
}

/// Remove a trajectory's checkpoint files (after it has ended and its data is on disk).
pub fn remove(path: &Path) {
    for p in [
        path.to_path_buf(),
        with_suffix(path, ".prev"),
        with_suffix(path, ".tmp"),
    ] {
        let _ = fs::remove_file(p);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// FNV-1a test vectors (the published reference values for "" and "a").
    #[test]
    fn fnv_reference_values() {
        assert_eq!(fnv1a(b""), 0xcbf29ce484222325);
        assert_eq!(fnv1a(b"a"), 0xaf63dc4c8601ec8c);
    }
}
