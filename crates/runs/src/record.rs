//! The lines of `metrics.jsonl`: one JSON object each, `kind` saying which record it is
//! (README, "Runs on disk"). Field names and meanings are the file format: renaming one
//! breaks old run folders, so add fields (with a default when read) rather than change
//! them.

use serde::{Deserialize, Serialize};

/// One line of `metrics.jsonl`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "lowercase")]
pub enum Record {
    /// After every round.
    Train(TrainRecord),
    /// After every greedy evaluation.
    Eval(EvalRecord),
    /// When the run stops.
    End(EndRecord),
    /// A record of a kind this version does not know (read only; never written).
    #[serde(other)]
    Unknown,
}

impl Record {
    /// Env steps of the record (`None` for an unknown kind).
    pub fn env_steps(&self) -> Option<u64> {
        match self {
            Record::Train(r) => Some(r.env_steps),
            Record::Eval(r) => Some(r.env_steps),
            Record::End(r) => Some(r.env_steps),
            Record::Unknown => None,
        }
    }
}

/// Progress of training after a round (`"kind": "train"`). Every field has a default
/// when read, so a record of an older or newer version still reads.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct TrainRecord {
    /// Env steps so far.
    pub env_steps: u64,
    /// Learner updates so far.
    pub learner_steps: u64,
    /// Training episodes finished so far.
    pub episodes: u64,
    /// Wall seconds of the run, including time before any resume.
    pub wall_seconds: f64,
    /// Mean return over the last 200 training episodes (none finished yet: `null`).
    pub episode_return: Option<f64>,
    /// Success rate over the last 200 training episodes, for tasks that define success.
    pub success_rate: Option<f64>,
    /// Mean loss of this round's updates.
    pub loss: Option<f64>,
    /// Mean Q of the taken actions over this round's updates.
    pub mean_q: Option<f64>,
    /// Stored-state vs recomputed-state Q difference at the first learned step
    /// (Kapturowski et al. 2019).
    pub q_discrepancy_first: Option<f64>,
    /// The same at the last learned step.
    pub q_discrepancy_last: Option<f64>,
    /// Env steps per second since this process started the run (or resumed it).
    pub steps_per_second: f64,
    /// Learner updates per second since this process started the run (or resumed it).
    pub updates_per_second: f64,
    /// Replay fill (0..1).
    pub replay_fill: f64,
    /// Seconds by phase so far (this process).
    pub phases: Phases,
}

/// A greedy evaluation (`"kind": "eval"`). `env_steps`, `wall_seconds` and
/// `eval_return` must be present; the rest default when missing.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct EvalRecord {
    /// Env steps when the evaluation ran.
    pub env_steps: u64,
    /// Learner updates when the evaluation ran.
    #[serde(default)]
    pub learner_steps: u64,
    /// Wall seconds of the run at that point, including time before any resume.
    pub wall_seconds: f64,
    /// Mean undiscounted return of the evaluation episodes.
    pub eval_return: f64,
    /// Mean discounted return.
    #[serde(default)]
    pub eval_discounted_return: f64,
    /// Success rate, for tasks that define success (`null` otherwise).
    #[serde(default)]
    pub eval_success_rate: Option<f64>,
    /// Mean episode length.
    #[serde(default)]
    pub eval_length: f64,
    /// Episodes played.
    #[serde(default)]
    pub eval_episodes: usize,
}

/// The end of a run (`"kind": "end"`). A resumed run appends records after it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct EndRecord {
    /// Env steps at the end.
    pub env_steps: u64,
    /// Learner updates at the end.
    #[serde(default)]
    pub learner_steps: u64,
    /// Wall seconds of the run, including time before any resume.
    pub wall_seconds: f64,
    /// Why the run stopped.
    pub stopped_by: StopReason,
    /// Env steps at which the stop target was first met.
    #[serde(default)]
    pub target_reached_at: Option<u64>,
    /// Seconds by phase (this process).
    #[serde(default)]
    pub phases: Phases,
}

/// Why a run stopped.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum StopReason {
    /// The budget (env steps or seconds) was used.
    Budget,
    /// A greedy evaluation met the spec's stop target.
    Target,
    /// The user asked it to stop (Ctrl-C); it can be resumed.
    Interrupt,
}

impl StopReason {
    /// The name written in records and shown to the user.
    pub fn as_str(self) -> &'static str {
        match self {
            StopReason::Budget => "budget",
            StopReason::Target => "target",
            StopReason::Interrupt => "interrupt",
        }
    }

    /// True when the run is finished for good (budget or target), false when it was
    /// interrupted and can go on.
    pub fn is_final(self) -> bool {
        !matches!(self, StopReason::Interrupt)
    }

    /// The reason named `text` (`budget`, `target`, `interrupt`).
    pub fn parse(text: &str) -> Option<Self> {
        [
            StopReason::Budget,
            StopReason::Target,
            StopReason::Interrupt,
        ]
        .into_iter()
        .find(|r| r.as_str() == text)
    }
}

impl std::fmt::Display for StopReason {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Wall-clock seconds by phase. Acting and learning overlap (they run on their own
/// threads); `waiting_*` is the time the coordinator idled for each side.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct Phases {
    /// Actor threads stepping tasks and the network (max over actors per round).
    pub acting: f64,
    /// Learner thread training.
    pub learning: f64,
    /// Learner thread inserting into replay.
    pub replay: f64,
    /// Greedy evaluations (nothing else runs meanwhile).
    pub evaluation: f64,
    /// Checkpoint writes.
    pub checkpoints: f64,
    /// Coordinator time spent waiting on the learner.
    pub waiting_for_learner: f64,
    /// Coordinator time spent waiting for actors.
    pub waiting_for_actors: f64,
}
