//! The one error type of `mnemon-nets`: every failure names what went wrong, where, and
//! what was expected.

use std::path::PathBuf;

/// Result with this crate's [`Error`].
pub type Result<T> = std::result::Result<T, Error>;

/// Errors of network building, running, losses and checkpoints.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// A tensor or buffer had the wrong shape or length at a part boundary.
    #[error("{op}: expected {expected}, got {got}")]
    Shape {
        /// The part or function that checked.
        op: &'static str,
        /// What was expected, e.g. `[batch, time, 16]`.
        expected: String,
        /// What arrived.
        got: String,
    },
    /// The spec asks for something this crate cannot build.
    #[error("network spec: {0}")]
    Spec(String),
    /// A checkpoint file could not be used.
    #[error("checkpoint {path}: {reason}")]
    Checkpoint {
        /// The file.
        path: PathBuf,
        /// What is wrong with it.
        reason: String,
    },
    /// Reading or writing a file failed.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating-system error.
        source: std::io::Error,
    },
    /// An error inside candle.
    #[error("tensor error: {0}")]
    Candle(#[from] candle_core::Error),
}

impl Error {
    pub(crate) fn shape(
        op: &'static str,
        expected: impl Into<String>,
        got: impl Into<String>,
    ) -> Self {
        Error::Shape {
            op,
            expected: expected.into(),
            got: got.into(),
        }
    }
}
