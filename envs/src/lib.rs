//! mnemon's worlds: the [`Task`] interface the engine steps, the built-in partially
//! observable tasks, [`Lanes`] (K copies of a task stepped together with reproducible
//! auto-reset), [`make`], which turns a `[task]` section into a running task (the
//! kinds and their settings are the table in `mnemon_spec::tasks`), and tasks served by an outside process
//! (see `envs/PROTOCOL.md`).
//!
//! Every built-in task is written so that one step allocates nothing: observations
//! are written into a caller-owned `&mut [f32]`.
//!
//! ```
//! use std::collections::BTreeMap;
//! use mnemon_envs::{make, Ending};
//! use mnemon_spec::TaskSpec;
//!
//! let spec = TaskSpec { kind: "tmaze".into(), settings: BTreeMap::new() };
//! let mut task = make(&spec).unwrap();
//! let mut obs = vec![0.0; task.obs_space().len()];
//! task.reset(7, &mut obs).unwrap();
//! let east = 1;
//! let outcome = task.step(east, &mut obs).unwrap();
//! assert_eq!(outcome.ending, Ending::Running);
//! ```
#![deny(missing_docs)]

pub mod cartpole;
mod error;
pub mod fog_grid;
mod lanes;
pub mod process;
pub mod recall;
mod registry;
pub mod rng;
mod space;
pub mod tiger;
pub mod tmaze;

pub use error::{ProcessFailure, TaskError};
pub use lanes::{episode_seed, EpisodeSummary, LaneStep, Lanes};
pub use registry::make;
pub use space::{ActionSpace, Ending, ObsSpace, Optimum, Outcome, Task};
