//! The one error type of `mnemon-export`.

/// Result with this crate's [`Error`].
pub type Result<T> = std::result::Result<T, Error>;

/// Errors of loading a policy, exporting it and stepping it.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// The checkpoint could not be read (missing, not a mnemon checkpoint, damaged) or
    /// the export could not be written.
    #[error(transparent)]
    Nets(#[from] mnemon_nets::Error),
    /// The spec stored in the checkpoint does not load.
    #[error("{file}: the spec stored in the checkpoint does not load:\n{message}")]
    Spec {
        /// The checkpoint.
        file: String,
        /// The rendered spec errors.
        message: String,
    },
    /// The spec's task could not be built to read its observation and action spaces.
    #[error("task {kind}: {message}")]
    Task {
        /// Task kind.
        kind: String,
        /// What failed.
        message: String,
    },
    /// The parameters do not fit the network the spec describes.
    #[error("policy parameters: {0}")]
    Params(String),
    /// A step got inputs of the wrong size.
    #[error("policy step: {0}")]
    Input(String),
}
