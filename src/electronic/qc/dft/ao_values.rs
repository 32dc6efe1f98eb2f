//! Basis-function values and derivatives on grid points (being written).
