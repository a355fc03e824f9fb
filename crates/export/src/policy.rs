//! The embedding API: load a checkpoint and step its greedy policy from Rust, with no
//! engine, threads or task.
//!
//! ```no_run
//! use mnemon_export::Policy;
//!
//! let mut policy = Policy::load("runs/tmaze-lstm/checkpoints/step-12000.safetensors")?;
//! let mut state = policy.new_state(); // zeros: an episode start
//! let obs = vec![0.0f32; policy.obs_len()];
//! let (action, q) = policy.step(&obs, &mut state)?;
//! println!("action {action}, q = {q:?}");
//! println!("{}", policy.action_names()[action]);
//! state.reward(0.0); // what the world paid for `action`, fed to the next step
//! state.reset(); // a new episode
//! # Ok::<(), mnemon_export::Error>(())
//! ```

use std::path::Path;

use mnemon_envs::ObsSpace;
use mnemon_nets::{checkpoint, ActorNet, NetShape, ObsShape, Params};
use mnemon_spec::Spec;

use crate::error::{Error, Result};

/// What a policy's task looks like from outside: observation and action spaces.
#[derive(Debug, Clone, PartialEq)]
pub struct TaskFace {
    /// Registered task kind.
    pub kind: String,
    /// Observation space.
    pub obs: ObsSpace,
    /// Action names, in index order.
    pub actions: Vec<String>,
}

impl TaskFace {
    /// Builds the spec's task once to read its spaces (a `process` task starts its
    /// program for that).
    pub fn of(spec: &Spec) -> Result<Self> {
        let task = mnemon_envs::make(&spec.task).map_err(|e| Error::Task {
            kind: spec.task.kind.clone(),
            message: e.to_string(),
        })?;
        Ok(TaskFace {
            kind: spec.task.kind.clone(),
            obs: task.obs_space(),
            actions: task.action_space().names,
        })
    }

    /// The sizes a network needs.
    pub fn net_shape(&self) -> NetShape {
        let obs = match self.obs {
            ObsSpace::Image {
                channels,
                height,
                width,
            } => ObsShape::Image {
                channels,
                height,
                width,
            },
            ref other => ObsShape::Vector(other.len()),
        };
        NetShape {
            obs,
            actions: self.actions.len(),
        }
    }
}

/// A checkpoint's online network with its spec, read for acting or export.
#[derive(Debug, Clone)]
pub struct PolicySource {
    /// The resolved spec stored in the checkpoint.
    pub spec: Spec,
    /// The resolved spec as TOML text.
    pub spec_toml: String,
    /// The online network's parameters.
    pub params: Params,
    /// The task's spaces.
    pub face: TaskFace,
    /// Env steps the network was trained for.
    pub env_steps: u64,
}

impl PolicySource {
    /// Reads a checkpoint file: format, checksum, spec and parameter shapes are checked.
    pub fn load(path: impl AsRef<Path>) -> Result<Self> {
        let path = path.as_ref();
        let loaded = checkpoint::load(path)?;
        let file = path.display().to_string();
        let spec = mnemon_spec::load_str(&loaded.meta.spec_toml, &file, &[])
            .map_err(|e| Error::Spec {
                file: file.clone(),
                message: e.render(false),
            })?
            .spec;
        Self::from_parts(spec, loaded.online, loaded.meta.env_steps)
    }

    /// From a spec and parameters already in memory (e.g. a live network's snapshot).
    pub fn from_parts(spec: Spec, params: Params, env_steps: u64) -> Result<Self> {
        let face = TaskFace::of(&spec)?;
        // Building the acting path checks every name and shape against the spec.
        ActorNet::from_params(&spec.agent, face.net_shape(), &params)
            .map_err(|e| Error::Params(e.to_string()))?;
        Ok(PolicySource {
            spec_toml: mnemon_spec::to_toml(&spec),
            spec,
            params,
            face,
            env_steps,
        })
    }
}

/// The recurrent state of one episode: LSTM h and c, and the previous action and
/// reward when the spec feeds them to the network.
#[derive(Debug, Clone, PartialEq)]
pub struct PolicyState {
    memory: Vec<f32>,
    prev_action: [usize; 1],
    prev_reward: [f32; 1],
}

impl PolicyState {
    /// Starts a new episode: zero state, no previous action.
    pub fn reset(&mut self) {
        self.memory.fill(0.0);
        self.prev_action = [usize::MAX];
        self.prev_reward = [0.0];
    }

    /// Records the reward the world paid for the last action (input of the next step).
    pub fn reward(&mut self, reward: f32) {
        self.prev_reward = [reward];
    }

    /// Overrides the previous action and reward, for a caller that acted otherwise than
    /// the policy chose (e.g. exploring).
    pub fn set_previous(&mut self, action: usize, reward: f32) {
        self.prev_action = [action];
        self.prev_reward = [reward];
    }

    /// The LSTM state `[2 * size]`: h then c (empty without memory).
    pub fn memory(&self) -> &[f32] {
        &self.memory
    }

    /// The previous action (`None` at an episode start).
    pub fn previous_action(&self) -> Option<usize> {
        (self.prev_action[0] != usize::MAX).then_some(self.prev_action[0])
    }

    /// The previous reward.
    pub fn previous_reward(&self) -> f32 {
        self.prev_reward[0]
    }
}

/// A trained policy for one observation at a time, on mnemon's own acting path
/// ([`ActorNet`]): no allocation per step after the first.
#[derive(Debug, Clone)]
pub struct Policy {
    source: PolicySource,
    net: ActorNet,
    q: Vec<f32>,
}

impl Policy {
    /// Loads a checkpoint file written by `mnemon train`.
    pub fn load(path: impl AsRef<Path>) -> Result<Self> {
        Self::new(PolicySource::load(path)?)
    }

    /// A policy from a loaded source.
    pub fn new(source: PolicySource) -> Result<Self> {
        let net =
            ActorNet::from_params(&source.spec.agent, source.face.net_shape(), &source.params)
                .map_err(|e| Error::Params(e.to_string()))?;
        let q = vec![0.0; net.actions()];
        Ok(Policy { source, net, q })
    }

    /// The checkpoint's spec, parameters and task spaces.
    pub fn source(&self) -> &PolicySource {
        &self.source
    }

    /// Floats per observation.
    pub fn obs_len(&self) -> usize {
        self.source.face.obs.len()
    }

    /// Action names in index order.
    pub fn action_names(&self) -> &[String] {
        &self.source.face.actions
    }

    /// Floats of LSTM state (`2 * size`, 0 without memory).
    pub fn state_len(&self) -> usize {
        self.net.state_len()
    }

    /// A fresh episode state.
    pub fn new_state(&self) -> PolicyState {
        PolicyState {
            memory: vec![0.0; self.net.state_len()],
            prev_action: [usize::MAX],
            prev_reward: [0.0],
        }
    }

    /// One step: the greedy action (argmax of `q`, the first on ties) and the per-action
    /// values. `state` advances; the chosen action becomes its previous action and its
    /// previous reward is reset to 0 until [`PolicyState::reward`] records the real one.
    pub fn step(&mut self, obs: &[f32], state: &mut PolicyState) -> Result<(usize, &[f32])> {
        if obs.len() != self.obs_len() {
            return Err(Error::Input(format!(
                "expected an observation of {} floats ({}), got {}",
                self.obs_len(),
                self.source.face.obs.describe(),
                obs.len()
            )));
        }
        if state.memory.len() != self.net.state_len() {
            return Err(Error::Input(format!(
                "expected a state of {} floats (made by this policy's new_state), got {}",
                self.net.state_len(),
                state.memory.len()
            )));
        }
        self.net
            .step(
                obs,
                &state.prev_action,
                &state.prev_reward,
                &mut state.memory,
                &mut self.q,
            )
            .map_err(|e| Error::Input(e.to_string()))?;
        // The engine's greedy choice: the first maximum, NaN never chosen over a number.
        let mut best = 0;
        let mut best_v = f32::NEG_INFINITY;
        for (i, &v) in self.q.iter().enumerate() {
            if v > best_v {
                best = i;
                best_v = v;
            }
        }
        state.prev_action = [best];
        state.prev_reward = [0.0];
        Ok((best, &self.q))
    }
}
