//! Nuclear and electronic propagation: velocity Verlet for the nuclei,
//! overlap-driven amplitude propagation, fewest-switches hops, decoherence,
//! and an exact wavepacket reference solver for one-dimensional models.

pub mod amplitudes;
pub mod decoherence;
pub mod hopping;
pub mod trajectory;
pub mod verlet;
pub mod wavepacket;

pub use decoherence::DecoherenceScheme;
pub use hopping::{FrustratedHops, HopDirection};
pub use trajectory::{
    EndReason, Flow, Hop, Observer, RecordKind, Settings, Status, StepRecord, Trajectory,
    TrajectoryState,
};
