//! mnemon's report: statistics over runs, comparison tables and plots. It reads run
//! records only (no tensors, no training) and prints nothing; the `mnemon compare`
//! command gathers runs, calls [`compare::build_report`] and writes what it returns.
//!
//! - [`stats`]: IQM, stratified bootstrap intervals, probability of improvement, Welch's t.
//! - [`runs`]: reading `metrics.jsonl` into learning curves; [`runs::RunRecord`].
//! - [`compare`]: the per-variant report and its markdown, text and JSON forms.
//! - [`plot`]: learning curves and final-score interval plots, as SVG and PNG.
//! - [`error`]: the crate's [`Error`].
#![deny(missing_docs)]

pub mod compare;
pub mod error;
pub mod plot;
pub mod runs;
pub mod stats;

pub use compare::{build_report, Report, ReportOptions, Threshold, VariantRow};
pub use error::{Error, Result};
pub use runs::{read_metrics, CurvePoint, MetricsFile, RunEnd, RunRecord};
pub use stats::{Interval, Welch};
