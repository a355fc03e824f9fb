//! The task interface: [`ObsSpace`], [`ActionSpace`], [`Ending`], [`Outcome`] and the
//! [`Task`] trait the engine steps.

use crate::TaskError;

/// What a task's observations look like. Observations are always `f32`.
#[derive(Debug, Clone, PartialEq)]
pub enum ObsSpace {
    /// A flat vector with per-component bounds (inclusive).
    Vector {
        /// Lower bound per component.
        low: Vec<f32>,
        /// Upper bound per component.
        high: Vec<f32>,
    },
    /// An image, channel-major (C x H x W), every value in [0, 1].
    Image {
        /// Channels.
        channels: usize,
        /// Rows.
        height: usize,
        /// Columns.
        width: usize,
    },
}

impl ObsSpace {
    /// Number of `f32` values in one observation.
    pub fn len(&self) -> usize {
        match self {
            ObsSpace::Vector { low, .. } => low.len(),
            ObsSpace::Image {
                channels,
                height,
                width,
            } => channels * height * width,
        }
    }
    /// True for a zero-length space (never the case for a valid task).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// Bounds of component `i`.
    pub fn bounds(&self, i: usize) -> (f32, f32) {
        match self {
            ObsSpace::Vector { low, high } => (low[i], high[i]),
            ObsSpace::Image { .. } => (0.0, 1.0),
        }
    }
    /// True if every value of `obs` is finite and inside its bounds.
    pub fn contains(&self, obs: &[f32]) -> bool {
        obs.len() == self.len()
            && obs.iter().enumerate().all(|(i, &v)| {
                let (lo, hi) = self.bounds(i);
                v.is_finite() && v >= lo && v <= hi
            })
    }
    /// One-line description, e.g. `vector of 4 in [-4.8, 4.8] x ...` or `image 5x5x5`.
    pub fn describe(&self) -> String {
        match self {
            ObsSpace::Vector { low, high } => {
                let parts: Vec<String> = low
                    .iter()
                    .zip(high)
                    .map(|(l, h)| format!("[{l}, {h}]"))
                    .collect();
                let unique: std::collections::BTreeSet<&String> = parts.iter().collect();
                if unique.len() == 1 {
                    format!("vector of {}, each in {}", low.len(), parts[0])
                } else {
                    format!("vector of {}: {}", low.len(), parts.join(" "))
                }
            }
            ObsSpace::Image {
                channels,
                height,
                width,
            } => format!("image {channels}x{height}x{width} (CxHxW) in [0, 1]"),
        }
    }
}

/// Discrete actions, `0..names.len()`.
#[derive(Debug, Clone, PartialEq)]
pub struct ActionSpace {
    /// One name per action, in index order.
    pub names: Vec<String>,
}

impl ActionSpace {
    /// Build from static names.
    pub fn from_names(names: &[&str]) -> Self {
        ActionSpace {
            names: names.iter().map(|s| s.to_string()).collect(),
        }
    }
    /// Number of actions.
    pub fn count(&self) -> usize {
        self.names.len()
    }
}

/// How a step left the episode.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Ending {
    /// The episode goes on.
    Running,
    /// The episode ended by the task's own rules (failure, success, or the end of a
    /// finite-horizon problem): no value follows, do not bootstrap.
    Terminal,
    /// The episode was cut by a time limit: the state still has a value, so a
    /// learner should bootstrap from the final observation.
    Truncated,
}

impl Ending {
    /// True for `Terminal` and `Truncated`.
    pub fn is_done(self) -> bool {
        self != Ending::Running
    }
    /// Lower-case name as used in messages and the outside-process protocol.
    pub fn name(self) -> &'static str {
        match self {
            Ending::Running => "running",
            Ending::Terminal => "terminal",
            Ending::Truncated => "truncated",
        }
    }
}

/// What one step produced besides the observation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Outcome {
    /// Reward for this step.
    pub reward: f32,
    /// Whether and how the episode ended.
    pub ending: Ending,
    /// For tasks that define success: `Some` on the step that ends the episode.
    pub success: Option<bool>,
}

/// The best expected discounted return on a task, where it is known exactly.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Optimum {
    /// The optimal expected discounted return from an episode's start.
    pub value: f64,
    /// How it was computed, in words for the user.
    pub method: &'static str,
}

/// One environment instance. `reset` and `step` write the observation into `obs`,
/// whose length must be `obs_space().len()`.
pub trait Task: Send {
    /// Observation description (fixed for the instance's life).
    fn obs_space(&self) -> ObsSpace;
    /// Action description (fixed for the instance's life).
    fn action_space(&self) -> ActionSpace;
    /// Start a new episode whose randomness comes only from `seed`.
    fn reset(&mut self, seed: u64, obs: &mut [f32]) -> Result<(), TaskError>;
    /// Apply `action`; write the next observation.
    fn step(&mut self, action: usize, obs: &mut [f32]) -> Result<Outcome, TaskError>;
    /// Whether the task reports success at episode ends.
    fn has_success(&self) -> bool;
    /// The best expected discounted return any policy can get from an episode's start
    /// under `discount`, with how it was computed, for tasks where it is known exactly
    /// (Tiger: belief-space dynamic programming). Evaluation reports it beside the
    /// agent's return. `None` (the default) where it is not known.
    fn exact_optimum(&self, discount: f64) -> Option<Optimum> {
        let _ = discount;
        None
    }
    /// Start a step whose answer comes from outside (an outside program), so that
    /// [`crate::Lanes`] can have every lane's program work at once: it calls this
    /// for each lane, then `step` with the same actions. Built-in tasks do nothing.
    fn send_action(&mut self, action: usize) -> Result<(), TaskError> {
        let _ = action;
        Ok(())
    }
    /// Move any diagnostic lines the task collected (an outside program's stderr,
    /// prefixed with the task's name) into `out`. Built-in tasks have none.
    fn drain_messages(&mut self, out: &mut Vec<String>) {
        let _ = out;
    }
}

/// Shared check used by the built-in tasks.
pub(crate) fn check_obs_len(kind: &str, obs: &[f32], expected: usize) -> Result<(), TaskError> {
    if obs.len() != expected {
        return Err(TaskError::ObsBuffer {
            kind: kind.to_string(),
            got: obs.len(),
            expected,
        });
    }
    Ok(())
}
