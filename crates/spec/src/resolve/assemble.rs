//! Putting the checked values together into the typed [`Spec`]. It runs only when
//! no problem was found, so every value is present and of its key's type; a value
//! that is not is an internal error with a message, never replaced by a default.

use std::collections::BTreeMap;

use super::{CheckedValue, Checker};
use crate::model::*;

impl Checker<'_> {
    /// `value`, or an internal error about `path` when it is missing.
    fn need<T>(&mut self, path: &str, value: Option<T>) -> Option<T> {
        if value.is_none() {
            self.internal(
                path,
                format!("`{path}` passed every check but has no value of its type"),
            );
        }
        value
    }
    fn need_int(&mut self, path: &str) -> Option<i64> {
        let v = self.int(path);
        self.need(path, v)
    }
    fn need_count(&mut self, path: &str) -> Option<u64> {
        let v = self.need_int(path)?;
        let n = u64::try_from(v).ok();
        self.need(path, n)
    }
    fn need_size(&mut self, path: &str) -> Option<usize> {
        let v = self.need_int(path)?;
        let n = usize::try_from(v).ok();
        self.need(path, n)
    }
    fn need_float(&mut self, path: &str) -> Option<f64> {
        let v = self.float(path);
        self.need(path, v)
    }
    fn need_string(&mut self, path: &str) -> Option<String> {
        let v = self.string(path);
        self.need(path, v)
    }
    fn need_sizes(&mut self, path: &str) -> Option<Vec<usize>> {
        let v = self.ints(path);
        self.need(path, v)
    }

    /// A word of a choice or kind that the registry allows but the assembly does
    /// not know.
    fn unplaced<T>(&mut self, path: &str, word: &str) -> Option<T> {
        self.internal(
            path,
            format!(
                "\"{word}\" passed the check of `{path}` but the spec model has no place for it"
            ),
        );
        None
    }

    pub(super) fn assemble(
        &mut self,
        default_name: &str,
        settings: BTreeMap<String, Value>,
    ) -> Option<Spec> {
        let name = self
            .string("name")
            .unwrap_or_else(|| default_name.to_string());
        let task_kind = self.need_string("task.kind")?;

        let memory = match self.need_string("agent.memory.kind")?.as_str() {
            "lstm" => Memory::Lstm {
                size: self.need_size("agent.memory.size")?,
            },
            "none" => Memory::None,
            other => return self.unplaced("agent.memory.kind", other),
        };
        let torso = match self.need_string("agent.torso.kind")?.as_str() {
            "conv" => Torso::Conv {
                channels: self.need_sizes("agent.torso.channels")?,
                kernels: self.need_sizes("agent.torso.kernels")?,
                strides: self.need_sizes("agent.torso.strides")?,
                out: self.need_size("agent.torso.out")?,
            },
            "mlp" => Torso::Mlp {
                layers: self.need_sizes("agent.torso.layers")?,
                activation: match self.need_string("agent.torso.activation")?.as_str() {
                    "relu" => Activation::Relu,
                    "tanh" => Activation::Tanh,
                    other => return self.unplaced("agent.torso.activation", other),
                },
            },
            other => return self.unplaced("agent.torso.kind", other),
        };
        let head = match self.need_string("agent.head.kind")?.as_str() {
            "value" => Head::Value,
            "dueling" => Head::Dueling,
            "quantile" => Head::Quantile {
                quantiles: self.need_size("agent.head.quantiles")?,
                kappa: self.need_float("agent.head.kappa")?,
            },
            other => return self.unplaced("agent.head.kind", other),
        };
        // Computed default: on with a memory to carry it, off without.
        let previous_action_reward = match self.get("agent.previous_action_reward") {
            Some(CheckedValue::Plain(Value::Bool(b))) => *b,
            None => matches!(memory, Memory::Lstm { .. }),
            Some(other) => {
                let other = format!("{other:?}");
                return self.unplaced("agent.previous_action_reward", &other);
            }
        };
        let rate = match self.get("learn.rate") {
            Some(CheckedValue::Schedule(s)) => s.clone(),
            _ => return self.need("learn.rate", None),
        };
        let budget = match self.get("run.budget") {
            Some(CheckedValue::Budget(b)) => *b,
            _ => return self.need("run.budget", None),
        };
        let stop = match self.get("run.stop") {
            Some(CheckedValue::Stop(s)) => *s,
            _ => return self.need("run.stop", None),
        };
        let start_state = match self.need_string("replay.start_state")?.as_str() {
            "stored" => StartState::Stored,
            "zero" => StartState::Zero,
            other => return self.unplaced("replay.start_state", other),
        };
        let loss = match self.need_string("learn.loss")?.as_str() {
            "squared" => TdLoss::Squared,
            "huber" => TdLoss::Huber,
            other => return self.unplaced("learn.loss", other),
        };
        Some(Spec {
            name,
            task: TaskSpec {
                kind: task_kind,
                settings,
            },
            agent: AgentSpec {
                torso,
                memory,
                head,
                previous_action_reward,
            },
            acting: ActingSpec {
                actors: self.need_size("acting.actors")?,
                lanes: self.need_size("acting.lanes")?,
                epsilon_base: self.need_float("acting.epsilon.base")?,
                epsilon_spread: self.need_float("acting.epsilon.spread")?,
                round: self.need_count("acting.round")?,
            },
            replay: ReplaySpec {
                capacity: self.need_count("replay.capacity")?,
                sequence: self.need_size("replay.sequence")?,
                overlap: self.need_size("replay.overlap")?,
                burn_in: self.need_size("replay.burn_in")?,
                start_state,
                priority_exponent: self.need_float("replay.priority.exponent")?,
                priority_correction: self.need_float("replay.priority.correction")?,
                priority_mix: self.need_float("replay.priority.mix")?,
            },
            learn: LearnSpec {
                discount: self.need_float("learn.discount")?,
                n_step: self.need_size("learn.n_step")?,
                batch: self.need_size("learn.batch")?,
                rate,
                adam_epsilon: self.need_float("learn.adam_epsilon")?,
                clip: self.need_float("learn.clip")?,
                target_every: self.need_count("learn.target_every")?,
                rescale: self.need_float("learn.rescale")?,
                warmup: self.need_count("learn.warmup")?,
                replay_ratio: self.need_float("learn.replay_ratio")?,
                loss,
            },
            run: RunSpec {
                budget,
                seed: self.need_count("run.seed")?,
                checkpoint_every: self.need_count("run.checkpoint_every")?,
                eval_every: self.need_count("run.eval.every")?,
                eval_episodes: self.need_size("run.eval.episodes")?,
                stop,
                out: self.need_string("run.out")?,
            },
        })
    }
}
