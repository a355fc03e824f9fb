//! The crate's one error type, [`TaskError`]: bad settings, bad actions, bad map files,
//! and the ways an outside-process task can misbehave ([`ProcessFailure`]).

/// Everything that can go wrong creating or stepping a task.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum TaskError {
    /// A `[task]` section the task table (`mnemon_spec::tasks`) refuses: an unknown
    /// kind, or a setting that is unknown, missing, of the wrong type or out of range.
    #[error(transparent)]
    Settings(#[from] mnemon_spec::tasks::SettingError),
    /// An action index outside the action space.
    #[error("task {kind}: action {action} is out of range (expected 0..{count})")]
    Action {
        /// Task kind.
        kind: String,
        /// The action received.
        action: usize,
        /// Number of actions.
        count: usize,
    },
    /// `step` after the episode ended, or before the first `reset`.
    #[error("task {kind}: step called while no episode is running; call reset first")]
    NotRunning {
        /// Task kind.
        kind: String,
    },
    /// An observation buffer of the wrong length.
    #[error("task {kind}: observation buffer has {got} values, expected {expected}")]
    ObsBuffer {
        /// Task kind.
        kind: String,
        /// Buffer length given.
        got: usize,
        /// Observation length.
        expected: usize,
    },
    /// A fog-grid map file could not be read or is malformed.
    #[error("fog-grid map {map}: {problem}")]
    Map {
        /// Map name or path (with line number where known).
        map: String,
        /// What is wrong.
        problem: String,
    },
    /// Lanes were asked for with bad arguments (zero lanes, wrong action count).
    #[error("lanes: {0}")]
    Lanes(String),
    /// An outside-process task misbehaved.
    #[error("outside task \"{task}\": {failure}")]
    Process {
        /// The task's name (file name of its program).
        task: String,
        /// What happened.
        failure: ProcessFailure,
    },
}

/// How an outside-process task failed. Each message says what mnemon received and
/// what it expected.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ProcessFailure {
    /// The program could not be started.
    #[error("could not start {command:?}: {reason}")]
    Spawn {
        /// The command line.
        command: Vec<String>,
        /// The operating system's reason.
        reason: String,
    },
    /// The program ended while mnemon waited for its answer.
    #[error(
        "the program exited ({status}) while mnemon waited for the answer to {waiting_for}{stderr}"
    )]
    Exited {
        /// Exit status as text.
        status: String,
        /// The message that went unanswered.
        waiting_for: String,
        /// Its last stderr lines, formatted (empty if none).
        stderr: String,
    },
    /// A line that is not the expected JSON message.
    #[error(
        "answer to {waiting_for} is not valid: {problem}; received: {line}; expected: {expected}"
    )]
    Garbage {
        /// The message that was answered.
        waiting_for: String,
        /// What is wrong with the line.
        problem: String,
        /// The line received (shortened).
        line: String,
        /// What a valid answer looks like.
        expected: String,
    },
    /// An observation with the wrong number of values.
    #[error("answer to {waiting_for} has an observation of {got} values, expected {expected} (as declared in the hello)")]
    ObsSize {
        /// The message that was answered.
        waiting_for: String,
        /// Values received.
        got: usize,
        /// Values declared.
        expected: usize,
    },
    /// No answer within the time limit.
    #[error("no answer to {waiting_for} within {seconds} s (setting \"timeout\")")]
    Timeout {
        /// The message that went unanswered.
        waiting_for: String,
        /// The limit.
        seconds: f64,
    },
    /// The program speaks another protocol version.
    #[error("the program speaks protocol version {got}, mnemon speaks version {expected}")]
    Version {
        /// Version received.
        got: String,
        /// Version mnemon speaks.
        expected: u32,
    },
    /// Reading or writing the pipes failed.
    #[error("pipe error while sending {waiting_for}: {reason}")]
    Io {
        /// The message being exchanged.
        waiting_for: String,
        /// The operating system's reason.
        reason: String,
    },
}
