//! Ensembles on disk: HDF5 part files (one writer per file), per-trajectory
//! checkpoints, and the runner that ties them to the engine.

pub mod checkpoint;
pub mod h5;
pub mod record;
pub mod runner;
