//! Molecular integration grids (being written).
