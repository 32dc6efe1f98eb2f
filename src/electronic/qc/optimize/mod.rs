//! Geometry optimisation (being written).
