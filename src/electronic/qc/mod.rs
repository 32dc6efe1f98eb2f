//! The built-in quantum-chemistry back end. Placeholder: being written.
