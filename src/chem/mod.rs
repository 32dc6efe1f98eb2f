//! Elements, masses, geometries and XYZ files. Placeholder: being written.
