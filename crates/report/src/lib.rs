//! mnemon's report: statistics over runs, comparison tables and plots. It reads run
//! records only (no tensors, no training) and prints nothing.
//!
//! - [`stats`]: IQM, stratified bootstrap intervals, probability of improvement, Welch's t.
//! - [`error`]: the crate's [`Error`].
#![deny(missing_docs)]

pub mod error;
pub mod stats;

pub use error::{Error, Result};
pub use stats::{Interval, Welch};
