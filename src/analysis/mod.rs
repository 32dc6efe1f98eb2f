//! Analysis of ensemble files. Placeholder: being written.
