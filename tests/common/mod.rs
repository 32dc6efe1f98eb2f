//! Helpers shared by the integration tests.

#![allow(dead_code)] // each test file uses a subset

pub mod qc;

use std::path::{Path, PathBuf};

/// A fresh scratch directory `flipswarm-<suite>-<pid>-<name>` in the system
/// temporary directory (short paths: the Slurm test puts sockets in it).
pub fn scratch(suite: &str, name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("flipswarm-{suite}-{}-{name}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Every trajectory of a part or ensemble file.
pub fn read_all(part: &Path) -> Vec<flipswarm::ensemble::h5::TrajectoryData> {
    let r = flipswarm::ensemble::h5::PartReader::open(part).unwrap();
    r.trajectory_indices()
        .into_iter()
        .map(|i| r.read(i).unwrap())
        .collect()
}
