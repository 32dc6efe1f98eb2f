//! Exchange–correlation functionals through libxc (being written).
