//! The resolved spec: typed values with every default filled in.
//!
//! This is what the rest of mnemon reads (`envs`, `nets`, `engine`, `cli`). It is
//! produced by the loader (`load` in `lib.rs`) after parsing, `extends`, `--set`
//! overrides and validation, so every value here is already known to be in range
//! and every cross-field rule holds. Nothing here builds a network or starts a thread.

use std::collections::BTreeMap;

/// One experiment, fully resolved.
#[derive(Debug, Clone, PartialEq)]
pub struct Spec {
    /// Experiment name; also the folder under `runs/`.
    pub name: String,
    /// The environment the agent learns in.
    pub task: TaskSpec,
    /// Network architecture.
    pub agent: AgentSpec,
    /// Actor threads and exploration.
    pub acting: ActingSpec,
    /// Sequence replay.
    pub replay: ReplaySpec,
    /// Learner settings.
    pub learn: LearnSpec,
    /// Budget, seed, checkpoints, evaluation, stop condition.
    pub run: RunSpec,
}

/// `[task]`: which task, and its own settings (validated against the task's schema in
/// `tasks.rs`, defaults filled in).
#[derive(Debug, Clone, PartialEq)]
pub struct TaskSpec {
    /// Registered kind: `tmaze`, `cartpole`, `cartpole-positions`, `tiger`, `recall`,
    /// `fog-grid` or `process`.
    pub kind: String,
    /// Every setting of this kind, by name, defaults filled in.
    pub settings: BTreeMap<String, Value>,
}

/// A task setting's value.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    /// Whole number.
    Int(i64),
    /// Real number.
    Float(f64),
    /// Switch.
    Bool(bool),
    /// Text.
    Str(String),
    /// List of values (e.g. a process task's command line).
    List(Vec<Value>),
    /// Free-form table (a process task's `settings`, passed on as JSON).
    Table(BTreeMap<String, Value>),
}

impl TaskSpec {
    /// An integer setting (validated by the loader; `None` if absent or of another type).
    pub fn int(&self, key: &str) -> Option<i64> {
        match self.settings.get(key) {
            Some(Value::Int(v)) => Some(*v),
            _ => None,
        }
    }
    /// A real-valued setting; integers are widened.
    pub fn float(&self, key: &str) -> Option<f64> {
        match self.settings.get(key) {
            Some(Value::Float(v)) => Some(*v),
            Some(Value::Int(v)) => Some(*v as f64),
            _ => None,
        }
    }
    /// A boolean setting.
    pub fn bool(&self, key: &str) -> Option<bool> {
        match self.settings.get(key) {
            Some(Value::Bool(v)) => Some(*v),
            _ => None,
        }
    }
    /// A text setting.
    pub fn str(&self, key: &str) -> Option<&str> {
        match self.settings.get(key) {
            Some(Value::Str(v)) => Some(v),
            _ => None,
        }
    }
    /// A list-of-text setting.
    pub fn strings(&self, key: &str) -> Option<Vec<String>> {
        match self.settings.get(key) {
            Some(Value::List(items)) => items
                .iter()
                .map(|v| match v {
                    Value::Str(s) => Some(s.clone()),
                    _ => None,
                })
                .collect(),
            _ => None,
        }
    }
}

/// `[agent]`: torso, memory and head.
#[derive(Debug, Clone, PartialEq)]
pub struct AgentSpec {
    /// Feature extractor applied to each observation.
    pub torso: Torso,
    /// Recurrent memory (or none).
    pub memory: Memory,
    /// Value head.
    pub head: Head,
    /// Feed the previous action (one-hot) and previous reward to the memory.
    /// Default: true for an LSTM memory, false for none.
    pub previous_action_reward: bool,
}

/// Activation function of MLP layers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Activation {
    /// max(0, x)
    Relu,
    /// tanh(x)
    Tanh,
}

/// Torso part.
#[derive(Debug, Clone, PartialEq)]
pub enum Torso {
    /// Fully connected layers.
    Mlp {
        /// Widths of the hidden layers, in order (may be empty: identity torso).
        layers: Vec<usize>,
        /// Activation after each layer.
        activation: Activation,
    },
    /// Convolution layers for image observations, then one linear layer.
    Conv {
        /// Output channels per conv layer.
        channels: Vec<usize>,
        /// Kernel size per conv layer (square).
        kernels: Vec<usize>,
        /// Stride per conv layer.
        strides: Vec<usize>,
        /// Width of the linear layer after the convs.
        out: usize,
    },
}

/// Memory part.
#[derive(Debug, Clone, PartialEq)]
pub enum Memory {
    /// LSTM with `size` hidden units.
    Lstm {
        /// Hidden (and cell) state width.
        size: usize,
    },
    /// No memory: the torso output goes straight to the head.
    None,
}

/// Head part.
#[derive(Debug, Clone, PartialEq)]
pub enum Head {
    /// Expected value: one Q per action.
    Value,
    /// Dueling: V + A - mean(A) (Wang et al. 2016).
    Dueling,
    /// Quantile regression (Dabney et al. 2017): `quantiles` per action, kappa of the
    /// quantile Huber loss.
    Quantile {
        /// Number of quantiles (>= 2).
        quantiles: usize,
        /// Huber threshold kappa (> 0).
        kappa: f64,
    },
}

/// `[acting]`.
#[derive(Debug, Clone, PartialEq)]
pub struct ActingSpec {
    /// Actor threads.
    pub actors: usize,
    /// Task copies stepped together by one actor.
    pub lanes: usize,
    /// Per-actor epsilon eps_i = base^(1 + spread*i/(N-1)) (Horgan et al. 2018).
    pub epsilon_base: f64,
    /// Spread of the per-actor epsilon.
    pub epsilon_spread: f64,
    /// Round length: env steps each actor takes (all its lanes together) with one
    /// set of parameters before it pulls the learner's newest (`acting.round`).
    pub round: u64,
}

/// Where the learner's unroll starts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StartState {
    /// The actor's recurrent state stored with the sequence.
    Stored,
    /// A zero state (the ablation of Kapturowski et al. 2019).
    Zero,
}

/// `[replay]`.
#[derive(Debug, Clone, PartialEq)]
pub struct ReplaySpec {
    /// Capacity in transitions.
    pub capacity: u64,
    /// Steps per stored sequence (burn-in included).
    pub sequence: usize,
    /// Steps shared by adjacent sequences of one lane.
    pub overlap: usize,
    /// Leading steps that only warm the recurrent state.
    pub burn_in: usize,
    /// Start state for the learner's unroll.
    pub start_state: StartState,
    /// Priority exponent alpha (0 = uniform).
    pub priority_exponent: f64,
    /// Importance-weight exponent beta (0 = no correction).
    pub priority_correction: f64,
    /// eta of p = eta*max|d| + (1-eta)*mean|d|.
    pub priority_mix: f64,
}

/// TD error shape.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TdLoss {
    /// 0.5 * d^2
    Squared,
    /// Huber with threshold 1.
    Huber,
}

/// `[learn]`.
#[derive(Debug, Clone, PartialEq)]
pub struct LearnSpec {
    /// Discount gamma in (0, 1].
    pub discount: f64,
    /// n of the n-step target (>= 1).
    pub n_step: usize,
    /// Sequences per learner batch.
    pub batch: usize,
    /// Learning rate schedule (by learner step).
    pub rate: Schedule,
    /// Adam epsilon.
    pub adam_epsilon: f64,
    /// Global gradient-norm clip (0 = off).
    pub clip: f64,
    /// Learner steps between target-network copies.
    pub target_every: u64,
    /// epsilon of the value rescaling h(x); 0 turns rescaling off.
    pub rescale: f64,
    /// Transitions in replay before the first update.
    pub warmup: u64,
    /// Learner-sampled transitions per inserted transition.
    pub replay_ratio: f64,
    /// TD error shape for the value and dueling heads.
    pub loss: TdLoss,
}

/// A run's budget: env steps or wall time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Budget {
    /// Total env steps across actors.
    Steps(u64),
    /// Wall-clock seconds.
    Seconds(f64),
}

/// What the periodic evaluation must reach to stop the run early.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum StopWhen {
    /// Greedy success rate >= value.
    Success(f64),
    /// Greedy mean return >= value.
    Return(f64),
}

/// `[run]`.
#[derive(Debug, Clone, PartialEq)]
pub struct RunSpec {
    /// Budget.
    pub budget: Budget,
    /// Seed of every random stream of the run.
    pub seed: u64,
    /// Env steps between checkpoints (0 = only the final one).
    pub checkpoint_every: u64,
    /// Env steps between greedy evaluations (0 = none).
    pub eval_every: u64,
    /// Episodes per evaluation.
    pub eval_episodes: usize,
    /// Stop early when the evaluation reaches this.
    pub stop: Option<StopWhen>,
    /// Folder under which `runs/<name>/<run-id>` is made.
    pub out: String,
}

/// A value that changes with the step count.
#[derive(Debug, Clone, PartialEq)]
pub enum Schedule {
    /// The same value at every step.
    Constant(f64),
    /// Linear from `from` to `to` over `over` steps, then `to`.
    Ramp {
        /// Value at step 0.
        from: f64,
        /// Value from step `over` on.
        to: f64,
        /// Length of the ramp in steps.
        over: u64,
    },
    /// Piecewise linear through (step, value) points, constant outside them.
    Points(Vec<(u64, f64)>),
}

impl Schedule {
    /// The value at `step`.
    pub fn at(&self, step: u64) -> f64 {
        match self {
            Schedule::Constant(v) => *v,
            Schedule::Ramp { from, to, over } => {
                if *over == 0 || step >= *over {
                    *to
                } else {
                    from + (to - from) * (step as f64 / *over as f64)
                }
            }
            Schedule::Points(points) => {
                let Some(first) = points.first() else {
                    return 0.0;
                };
                if step <= first.0 {
                    return first.1;
                }
                for pair in points.windows(2) {
                    let ((s0, v0), (s1, v1)) = (pair[0], pair[1]);
                    if step <= s1 {
                        let frac = (step - s0) as f64 / (s1 - s0).max(1) as f64;
                        return v0 + (v1 - v0) * frac;
                    }
                }
                points[points.len() - 1].1
            }
        }
    }
}
