//! Physical constants (CODATA 2018) and unit conversions. Placeholder: being written.
