//! Analytic and numerical nuclear gradients (being written).
