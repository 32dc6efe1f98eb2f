//! Ensembles of trajectories.
