//! Nuclear and electronic propagation.
pub mod wavepacket;
