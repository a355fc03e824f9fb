//! The engine's error type: which failures are the user's input and which are ours,
//! keeping the typed cause of each so callers match on kinds, not on text.

use std::path::{Path, PathBuf};

/// Result with the engine's error.
pub type Result<T> = std::result::Result<T, Error>;

/// What stopped a run or a command.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// Bad input said in words: a run folder, a checkpoint that does not fit the spec,
    /// an argument.
    #[error("{0}")]
    Input(String),
    /// A task could not be built or stepped (an outside process crashed, a setting the
    /// task refuses).
    #[error("task failed: {0}")]
    TaskFailed(#[source] Box<mnemon_envs::TaskError>),
    /// The network side failed: a checkpoint that cannot be read, a shape that does not
    /// fit, a tensor operation.
    #[error("{0}")]
    Nets(#[source] Box<mnemon_nets::Error>),
    /// A run file (metrics, plan, report) could not be read or written.
    #[error("{0}")]
    Records(#[from] mnemon_runs::Error),
    /// A file could not be read or written.
    #[error("{}: {source}", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The network produced a non-finite loss or Q value.
    #[error("{0}")]
    NonFinite(String),
    /// A failure inside mnemon.
    #[error("internal error: {0}")]
    Internal(String),
}

// The large causes are boxed so that `Result<T, Error>` stays small on every path.
impl From<mnemon_envs::TaskError> for Error {
    fn from(e: mnemon_envs::TaskError) -> Self {
        Error::TaskFailed(Box::new(e))
    }
}

impl From<mnemon_nets::Error> for Error {
    fn from(e: mnemon_nets::Error) -> Self {
        Error::Nets(Box::new(e))
    }
}

impl Error {
    /// An I/O error at `path`.
    pub fn io(path: &Path, source: std::io::Error) -> Self {
        Error::Io {
            path: path.to_path_buf(),
            source,
        }
    }

    /// True when the failure is the user's input (a spec, a task, a file, a checkpoint)
    /// rather than mnemon's: the binary exits 2 for these and 1 for the rest.
    pub fn is_input(&self) -> bool {
        match self {
            Error::Input(_) | Error::TaskFailed(_) | Error::Io { .. } => true,
            Error::Records(e) => !matches!(e, mnemon_runs::Error::Encode(_)),
            Error::Nets(e) => matches!(
                **e,
                mnemon_nets::Error::Checkpoint { .. }
                    | mnemon_nets::Error::Io { .. }
                    | mnemon_nets::Error::Spec(_)
            ),
            Error::NonFinite(_) | Error::Internal(_) => false,
        }
    }
}
