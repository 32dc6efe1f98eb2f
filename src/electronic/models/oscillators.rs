//! One-state oscillators. Placeholder.
pub struct Harmonic;
pub struct Morse;
