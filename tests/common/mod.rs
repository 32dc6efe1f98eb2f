pub mod qc;
