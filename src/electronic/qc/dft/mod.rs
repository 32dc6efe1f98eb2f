//! Density-functional pieces: exchange–correlation functionals through
//! libxc ([`xc`]), molecular integration grids ([`grid`]) and basis-function
//! values on grid points ([`ao_values`]).

pub mod ao_values;
pub mod grid;
pub mod ks;
pub mod xc;
