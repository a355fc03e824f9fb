//! mnemon's engine: actors, sequence replay, the learner, the training loop and
//! evaluation. It joins the spec (`mnemon-spec`), the tasks (`mnemon-envs`), the
//! networks (`mnemon-nets`) and the run records (`mnemon-runs`); it prints nothing (the
//! binary renders progress and errors).
//!
//! - [`train`]: one training run (the coordinator [`train::train`] and its phases);
//!   its threads live in a private `workers` module.
//! - [`schedule`]: several runs at once, in a pool of threads (`mnemon compare`).
//! - [`actor`], [`learner`], [`replay`], [`sequence`], [`explore`]: the two sides of a
//!   round and what flows between them.
//! - [`eval`]: greedy evaluation (with the task's exact optimum where the task knows it).
//! - [`rundir`]: run folders on disk and where a run stands.
//! - [`seeds`]: the named random streams.
#![deny(missing_docs)]

pub mod actor;
pub mod error;
pub mod eval;
pub mod explore;
pub mod learner;
pub mod replay;
pub mod rundir;
pub mod schedule;
pub mod seeds;
pub mod sequence;
pub mod train;
mod workers;

pub use error::{Error, Result};
