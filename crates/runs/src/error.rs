//! The records crate's error: a file that could not be read or written, or a record
//! that could not be encoded.

use std::path::{Path, PathBuf};

/// Result with the records crate's error.
pub type Result<T> = std::result::Result<T, Error>;

/// What went wrong with a run file.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// A file could not be read or written.
    #[error("{}: {source}", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating-system error.
        source: std::io::Error,
    },
    /// A path that names no file (`/`, `..`).
    #[error("{}: not a file path", path.display())]
    NotAFile {
        /// The path.
        path: PathBuf,
    },
    /// A record could not be encoded as JSON (a bug: records hold plain numbers).
    #[error("cannot encode a record: {0}")]
    Encode(#[from] serde_json::Error),
}

impl Error {
    /// An I/O error at `path`.
    pub fn io(path: &Path, source: std::io::Error) -> Self {
        Error::Io {
            path: path.to_path_buf(),
            source,
        }
    }
}
