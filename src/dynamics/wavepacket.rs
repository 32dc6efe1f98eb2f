//! Exact split-operator wavepacket reference solver. Placeholder.
