//! The engine's error type: which failures are the user's input and which are ours.

use std::path::Path;

/// Result with the engine's error.
pub type Result<T> = std::result::Result<T, Error>;

/// What stopped a run or a command.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// Bad input: a spec, a run folder, a checkpoint or an argument (exit code 2).
    #[error("{0}")]
    Input(String),
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: String,
        /// The cause.
        source: std::io::Error,
    },
    /// The task failed (an outside process crashed, say).
    #[error("task failed: {0}")]
    Task(String),
    /// The network produced a non-finite loss or Q value.
    #[error("{0}")]
    NonFinite(String),
    /// A failure inside mnemon (exit code 1).
    #[error("internal error: {0}")]
    Internal(String),
}

impl Error {
    /// An I/O error at `path`.
    pub fn io(path: &Path, source: std::io::Error) -> Self {
        Error::Io {
            path: path.display().to_string(),
            source,
        }
    }

    /// True when the failure is the user's input rather than mnemon's.
    pub fn is_input(&self) -> bool {
        matches!(self, Error::Input(_) | Error::Task(_))
    }
}
