//! Analysis of ensemble files (`flipswarm analyze`).
//!
//! The flow, one module per step:
//!
//! - [`data`]: part files (or run directories) → an [`data::Ensemble`] of
//!   compact per-trajectory series; checks that the parts belong together.
//! - [`populations`]: the common time grid (one point every `record_every`
//!   steps), the state each trajectory is on at each point, fractions of
//!   trajectories with 95 % Wilson score intervals, mean |c|² — under a
//!   stated policy for trajectories that ended early ([`populations::Ended`]).
//! - [`fit`]: a small Levenberg–Marquardt least-squares solver.
//! - [`kinetics`]: single-exponential decay/rise with optional delay and the
//!   sequential A → B → C model, fitted to the fraction curves, with
//!   percentile bootstrap intervals over trajectories.
//! - [`hops`] and [`geometry`]: hop counts, hop-time histogram, energy gaps and
//!   bonds/angles/dihedrals at hops.
//! - [`report`]: the whole analysis as one serialisable value, its text table,
//!   CSV files; [`plot`]: SVG and PNG figures.
//!
//! Library code returns [`AnalysisError`]; the command line maps `Input` to
//! exit code 2 and `Output` to 4.

pub mod data;
pub mod fit;
pub mod geometry;
pub mod hops;
pub mod kinetics;
pub mod plot;
pub mod populations;
pub mod report;

/// Errors of the analysis. Messages name the file or option and what is wrong.
#[derive(Debug, thiserror::Error)]
pub enum AnalysisError {
    /// Bad input: files, options or selections that cannot be analysed.
    #[error("{0}")]
    Input(String),
    /// Writing results failed.
    #[error("{0}")]
    Output(String),
}

/// Shorthand for input errors.
pub(crate) fn input<T>(msg: impl Into<String>) -> Result<T, AnalysisError> {
    Err(AnalysisError::Input(msg.into()))
}
