//! The report crate's one error type. Callers match on the kind; each message names the
//! file, the runs or the option at fault, so the command line can print it as is.

use std::path::{Path, PathBuf};

/// Result with the report crate's error.
pub type Result<T> = std::result::Result<T, Error>;

/// What stopped a statistic, a report or a plot.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// A file could not be read or written.
    #[error("{}: {source}", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// Runs of different tasks were given to one report; the message lists the runs by task.
    #[error("runs of different tasks cannot be compared: {0}")]
    MixedTasks(String),
    /// No runs were given.
    #[error("no runs to report on")]
    NoRuns,
    /// The named baseline variant is not among the runs.
    #[error("baseline variant `{name}` is not among the runs (variants: {known})")]
    UnknownBaseline {
        /// The baseline asked for.
        name: String,
        /// The variants present, comma-separated.
        known: String,
    },
    /// An option is out of range (a level outside (0, 1), zero resamples).
    #[error("{0}")]
    InvalidOption(String),
    /// The exact bootstrap would enumerate more resamples than allowed.
    #[error(
        "the exact bootstrap would enumerate {count:.3e} resamples, more than the limit of {limit}; \
         use the random bootstrap instead"
    )]
    TooManyResamples {
        /// How many resamples full enumeration needs (prod n_i^n_i).
        count: f64,
        /// The limit ([`crate::stats::EXACT_BOOTSTRAP_LIMIT`]).
        limit: u64,
    },
    /// Drawing a plot failed (the backend's message).
    #[error("plot: {0}")]
    Plot(String),
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
