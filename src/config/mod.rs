//! Run configuration.
