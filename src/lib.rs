//! flipswarm: excited-state molecular dynamics with fewest-switches surface
//! hopping, from initial conditions to population analysis, on CPUs.
//!
//! The modules follow the data flow of a photodynamics study:
//! [`config`] (validated run descriptions) → [`electronic`] (the back-end
//! contract and its implementations) → [`dynamics`] (velocity Verlet, electronic
//! amplitudes, hops, decoherence) → [`swarm`] (ensembles of trajectories) .
//! Everything inside is in atomic units; conversions live in [`units`].

pub mod analysis;
pub mod chem;
pub mod cli;
pub mod config;
pub mod dynamics;
pub mod electronic;
pub mod ensemble;
pub mod sampling;
pub mod swarm;
pub mod units;
