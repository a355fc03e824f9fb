//! mnemon's run records, in one place for the engine that writes them and the report
//! that reads them. No tensors, no training: serde and the file system only.
//!
//! - [`record`]: the typed lines of `metrics.jsonl` ([`Record`]: train, eval, end) and
//!   why a run stopped ([`StopReason`]).
//! - [`metrics`]: appending records ([`MetricsLog`]) and reading them back
//!   ([`read_metrics`]), tolerating the partial last line of a killed run.
//! - [`atomic`]: [`write_atomic`], the one whole-file write every crate uses.
//! - [`interval`]: the Student-t confidence interval of a mean.
#![deny(missing_docs)]

pub mod atomic;
pub mod error;
pub mod interval;
pub mod metrics;
pub mod record;

pub use atomic::write_atomic;
pub use error::{Error, Result};
pub use interval::t_interval;
pub use metrics::{read_metrics, Metrics, MetricsLog};
pub use record::{EndRecord, EvalRecord, Phases, Record, StopReason, TrainRecord};
