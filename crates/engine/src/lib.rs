//! mnemon's engine: actors, sequence replay, the learner, the training loop and
//! evaluation. It joins the spec (`mnemon-spec`), the tasks (`mnemon-envs`) and the
//! networks (`mnemon-nets`); it prints nothing (the binary renders progress and errors).
#![deny(missing_docs)]

pub mod error;
pub mod explore;
pub mod replay;
pub mod rundir;
pub mod sequence;

pub use error::{Error, Result};
pub mod actor;
pub mod eval;
pub mod learner;
pub mod train;
