//! `process`: a task served by an outside program over mnemon's line protocol
//! (JSON lines on the program's stdin and stdout, specified in `envs/PROTOCOL.md`).
//! Each [`ProcessTask`] owns one child process; [`crate::Lanes`] makes one per lane.
//!
//! Every answer is awaited for at most `timeout` seconds, read by a helper thread
//! so that a silent program cannot hang mnemon. Any protocol violation is an error
//! naming the task, what was received and what was expected, after which the
//! program is killed. The program's stderr is collected, each line prefixed with
//! `[name] `, and handed out by [`Task::drain_messages`] (this library prints
//! nothing). Dropping a task sends `bye`, waits briefly, then kills and reaps the
//! child: no process outlives its task and none is left a zombie.

use std::collections::VecDeque;
use std::io::{BufRead, BufReader, Read, Write};
use std::process::{Child, ChildStdin, Command, Stdio};
use std::sync::mpsc::{channel, Receiver, RecvTimeoutError};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use mnemon_spec::{TaskSpec, Value};
use serde::Deserialize;

use crate::registry::{real, strings, table};
use crate::space::check_obs_len;
use crate::{ActionSpace, Ending, ObsSpace, Outcome, ProcessFailure, Task, TaskError};

/// The protocol version this mnemon speaks.
pub const PROTOCOL_VERSION: u32 = 1;
/// Most stderr lines kept between two drains (older ones are dropped, counted).
const STDERR_KEEP: usize = 10_000;
/// Recent stderr lines quoted in an error message.
const STDERR_QUOTE: usize = 5;
/// How long a program may take to leave after `bye` before it is killed.
const BYE_GRACE: Duration = Duration::from_millis(300);

enum Line {
    Text(String),
    End,
    Failed(String),
}

#[derive(Default)]
struct StderrStore {
    lines: Vec<String>,
    dropped: usize,
    recent: VecDeque<String>,
}

/// An outside program acting as a task.
pub struct ProcessTask {
    name: String,
    child: Child,
    stdin: Option<ChildStdin>,
    lines: Receiver<Line>,
    stderr: Arc<Mutex<StderrStore>>,
    timeout: Duration,
    obs_space: ObsSpace,
    actions: ActionSpace,
    success: bool,
    running: bool,
    stopped: bool,
    /// A step message already sent by `send_action`, awaiting its answer.
    sent: Option<usize>,
    message: String,
}

#[derive(Deserialize)]
#[serde(untagged)]
enum ObsDecl {
    Vector { low: Vec<f32>, high: Vec<f32> },
    Image { image: [usize; 3] },
}

#[derive(Deserialize)]
struct Hello {
    observation: ObsDecl,
    actions: Vec<String>,
    #[serde(default)]
    success: bool,
}

#[derive(Deserialize)]
struct Reply {
    observation: Vec<f32>,
    #[serde(default)]
    reward: f32,
    #[serde(default)]
    ending: Option<String>,
    #[serde(default)]
    success: Option<bool>,
}

const HELLO_EXPECTED: &str = r#"{"version": 1, "observation": {"low": [...], "high": [...]} or {"image": [C, H, W]}, "actions": ["name", ...], "success": true|false}"#;
const RESET_EXPECTED: &str = r#"{"observation": [numbers]}"#;
const STEP_EXPECTED: &str = r#"{"observation": [numbers], "reward": number, "ending": "running"|"terminal"|"truncated", "success": true|false|null}"#;

/// Convert a spec value to JSON for the hello message.
pub fn to_json(v: &Value) -> serde_json::Value {
    match v {
        Value::Int(i) => (*i).into(),
        Value::Float(f) => serde_json::Number::from_f64(*f)
            .map(serde_json::Value::Number)
            .unwrap_or(serde_json::Value::Null),
        Value::Bool(b) => (*b).into(),
        Value::Str(s) => s.clone().into(),
        Value::List(items) => items.iter().map(to_json).collect::<Vec<_>>().into(),
        Value::Table(t) => t
            .iter()
            .map(|(k, v)| (k.clone(), to_json(v)))
            .collect::<serde_json::Map<_, _>>()
            .into(),
    }
}

/// The name a command's task goes by: the file name of its script (the first
/// argument that looks like a path), else of the program.
/// `python3 -u tasks/beacon.py fast` -> `beacon.py`; `./sim --fast` -> `sim`.
pub fn task_name(command: &[String]) -> String {
    let script = command
        .iter()
        .skip(1)
        .find(|a| !a.starts_with('-') && (a.contains('.') || a.contains('/')))
        .or(command.first());
    let path = script.map(String::as_str).unwrap_or("process");
    std::path::Path::new(path)
        .file_name()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.to_string())
}

fn shorten(line: &str) -> String {
    const MAX: usize = 200;
    let line = line.trim_end();
    if line.chars().count() > MAX {
        let cut: String = line.chars().take(MAX).collect();
        format!("{cut:?}...")
    } else {
        format!("{line:?}")
    }
}

impl ProcessTask {
    pub(crate) fn from_spec(spec: &TaskSpec) -> Result<Self, TaskError> {
        // The task table keeps `command` a non-empty list of strings with a program
        // name, and fills `settings` with {} when not given.
        let command = strings(spec, "command")?;
        let timeout = real(spec, "timeout")?;
        let settings = to_json(table(spec, "settings")?);
        Self::start(&command, settings, Duration::from_secs_f64(timeout))
    }

    /// Start `command`, send the hello with `settings` and check the answer.
    pub fn start(
        command: &[String],
        settings: serde_json::Value,
        timeout: Duration,
    ) -> Result<Self, TaskError> {
        let name = task_name(command);
        let mut child = Command::new(&command[0])
            .args(&command[1..])
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .env("PYTHONUNBUFFERED", "1")
            .spawn()
            .map_err(|e| TaskError::Process {
                task: name.clone(),
                failure: ProcessFailure::Spawn {
                    command: command.to_vec(),
                    reason: e.to_string(),
                },
            })?;
        let stdout = child.stdout.take().expect("stdout is piped");
        let stderr_pipe = child.stderr.take().expect("stderr is piped");
        let (tx, lines) = channel();
        std::thread::Builder::new()
            .name(format!("{name}-stdout"))
            .spawn(move || {
                let mut reader = BufReader::new(stdout);
                loop {
                    let mut line = String::new();
                    let msg = match reader.read_line(&mut line) {
                        Ok(0) => Line::End,
                        Ok(_) => Line::Text(line),
                        Err(e) => Line::Failed(e.to_string()),
                    };
                    let last = !matches!(msg, Line::Text(_));
                    if tx.send(msg).is_err() || last {
                        return;
                    }
                }
            })
            .expect("spawn stdout reader thread");
        let stderr = Arc::new(Mutex::new(StderrStore::default()));
        let store = Arc::clone(&stderr);
        let prefix = format!("[{name}] ");
        std::thread::Builder::new()
            .name(format!("{name}-stderr"))
            .spawn(move || {
                let mut reader = BufReader::new(stderr_pipe);
                let mut buf = Vec::new();
                loop {
                    buf.clear();
                    match reader.by_ref().read_until(b'\n', &mut buf) {
                        Ok(0) | Err(_) => return,
                        Ok(_) => {
                            let text = String::from_utf8_lossy(&buf);
                            let line = format!("{prefix}{}", text.trim_end());
                            let mut s = store.lock().unwrap_or_else(|p| p.into_inner());
                            if s.lines.len() >= STDERR_KEEP {
                                s.lines.remove(0);
                                s.dropped += 1;
                            }
                            s.recent.push_back(line.clone());
                            if s.recent.len() > STDERR_QUOTE {
                                s.recent.pop_front();
                            }
                            s.lines.push(line);
                        }
                    }
                }
            })
            .expect("spawn stderr reader thread");
        let stdin = child.stdin.take();
        let mut task = ProcessTask {
            name,
            child,
            stdin,
            lines,
            stderr,
            timeout,
            obs_space: ObsSpace::Vector {
                low: vec![],
                high: vec![],
            },
            actions: ActionSpace { names: vec![] },
            success: false,
            running: false,
            stopped: false,
            sent: None,
            message: String::new(),
        };
        task.handshake(settings)?;
        Ok(task)
    }

    /// The task's name (its program's file name), used as the prefix of its
    /// stderr lines and in errors.
    pub fn name(&self) -> &str {
        &self.name
    }
    /// The child's process id.
    pub fn child_id(&self) -> u32 {
        self.child.id()
    }

    fn fail(&mut self, failure: ProcessFailure) -> TaskError {
        self.stop();
        TaskError::Process {
            task: self.name.clone(),
            failure,
        }
    }

    fn handshake(&mut self, settings: serde_json::Value) -> Result<(), TaskError> {
        let hello =
            serde_json::json!({"type": "hello", "version": PROTOCOL_VERSION, "settings": settings});
        let line = self.exchange("hello", &hello.to_string())?;
        let garbage = |problem: String| ProcessFailure::Garbage {
            waiting_for: "hello".into(),
            problem,
            line: shorten(&line),
            expected: HELLO_EXPECTED.into(),
        };
        let value: serde_json::Value = match serde_json::from_str(&line) {
            Ok(v) => v,
            Err(e) => return Err(self.fail(garbage(format!("not JSON ({e})")))),
        };
        match value.get("version") {
            Some(v) if v.as_u64() == Some(PROTOCOL_VERSION as u64) => {}
            Some(v) => {
                let failure = ProcessFailure::Version {
                    got: v.to_string(),
                    expected: PROTOCOL_VERSION,
                };
                return Err(self.fail(failure));
            }
            None => return Err(self.fail(garbage("no \"version\" field".into()))),
        }
        let hello: Hello = match serde_json::from_value(value) {
            Ok(h) => h,
            Err(e) => return Err(self.fail(garbage(e.to_string()))),
        };
        let space = match hello.observation {
            ObsDecl::Vector { low, high } => {
                if low.is_empty()
                    || low.len() != high.len()
                    || low.iter().zip(&high).any(|(l, h)| l > h)
                {
                    return Err(self.fail(garbage(format!(
                        "observation bounds must be two lists of equal, non-zero length with low <= high; got {} and {} values",
                        low.len(),
                        high.len()
                    ))));
                }
                ObsSpace::Vector { low, high }
            }
            ObsDecl::Image { image: [c, h, w] } => {
                if c * h * w == 0 {
                    return Err(self.fail(garbage("image dimensions must be positive".into())));
                }
                ObsSpace::Image {
                    channels: c,
                    height: h,
                    width: w,
                }
            }
        };
        if hello.actions.is_empty() {
            return Err(self.fail(garbage(
                "\"actions\" is empty; at least one action name is needed".into(),
            )));
        }
        self.obs_space = space;
        self.actions = ActionSpace {
            names: hello.actions,
        };
        self.success = hello.success;
        Ok(())
    }

    /// Send one line and wait for one line back.
    fn exchange(&mut self, waiting_for: &str, message: &str) -> Result<String, TaskError> {
        self.send(waiting_for, message)?;
        self.receive(waiting_for)
    }

    /// Write one message line to the program.
    fn send(&mut self, waiting_for: &str, message: &str) -> Result<(), TaskError> {
        if self.stopped {
            return Err(TaskError::Process {
                task: self.name.clone(),
                failure: ProcessFailure::Io {
                    waiting_for: waiting_for.into(),
                    reason: "the program was stopped after an earlier error".into(),
                },
            });
        }
        self.message.clear();
        self.message.push_str(message);
        self.message.push('\n');
        let written = match self.stdin.as_mut() {
            Some(stdin) => stdin
                .write_all(self.message.as_bytes())
                .and_then(|_| stdin.flush()),
            None => Err(std::io::Error::other("stdin closed")),
        };
        if let Err(e) = written {
            // Most often the program has exited: report that, with its status.
            if let Some(failure) = self.exited(waiting_for, Duration::from_millis(500)) {
                return Err(self.fail(failure));
            }
            let failure = ProcessFailure::Io {
                waiting_for: waiting_for.into(),
                reason: e.to_string(),
            };
            return Err(self.fail(failure));
        }
        Ok(())
    }

    /// Wait (at most `timeout`) for the program's answer line.
    fn receive(&mut self, waiting_for: &str) -> Result<String, TaskError> {
        match self.lines.recv_timeout(self.timeout) {
            Ok(Line::Text(line)) => Ok(line),
            Ok(Line::End) | Err(RecvTimeoutError::Disconnected) => {
                let failure = self
                    .exited(waiting_for, Duration::from_millis(1000))
                    .unwrap_or_else(|| ProcessFailure::Exited {
                        status: "still running, but it closed its stdout".into(),
                        waiting_for: waiting_for.into(),
                        stderr: self.recent_stderr(),
                    });
                Err(self.fail(failure))
            }
            Ok(Line::Failed(reason)) => {
                let failure = ProcessFailure::Io {
                    waiting_for: waiting_for.into(),
                    reason,
                };
                Err(self.fail(failure))
            }
            Err(RecvTimeoutError::Timeout) => {
                let failure = ProcessFailure::Timeout {
                    waiting_for: waiting_for.into(),
                    seconds: self.timeout.as_secs_f64(),
                };
                Err(self.fail(failure))
            }
        }
    }

    /// If the child exits within `grace`, the failure describing it.
    fn exited(&mut self, waiting_for: &str, grace: Duration) -> Option<ProcessFailure> {
        let deadline = Instant::now() + grace;
        loop {
            match self.child.try_wait() {
                Ok(Some(status)) => {
                    // Let the stderr thread catch the last lines.
                    std::thread::sleep(Duration::from_millis(20));
                    return Some(ProcessFailure::Exited {
                        status: status.to_string(),
                        waiting_for: waiting_for.into(),
                        stderr: self.recent_stderr(),
                    });
                }
                Ok(None) if Instant::now() < deadline => {
                    std::thread::sleep(Duration::from_millis(5))
                }
                _ => return None,
            }
        }
    }

    fn recent_stderr(&self) -> String {
        let s = self.stderr.lock().unwrap_or_else(|p| p.into_inner());
        if s.recent.is_empty() {
            String::new()
        } else {
            let lines: Vec<&str> = s.recent.iter().map(String::as_str).collect();
            format!("; its last stderr lines:\n  {}", lines.join("\n  "))
        }
    }

    /// Kill and reap the child (idempotent).
    fn stop(&mut self) {
        if self.stopped {
            return;
        }
        self.stopped = true;
        self.running = false;
        drop(self.stdin.take());
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    fn send_step(&mut self, action: usize) -> Result<(), TaskError> {
        let message = format!("{{\"type\":\"step\",\"action\":{action}}}");
        self.send("step", &message)
    }

    fn parse_reply(
        &mut self,
        waiting_for: &str,
        line: &str,
        expected: &'static str,
    ) -> Result<Reply, TaskError> {
        let reply: Reply = match serde_json::from_str(line) {
            Ok(r) => r,
            Err(e) => {
                let problem = if e.is_data() {
                    e.to_string()
                } else {
                    format!("not JSON ({e})")
                };
                let failure = ProcessFailure::Garbage {
                    waiting_for: waiting_for.into(),
                    problem,
                    line: shorten(line),
                    expected: expected.into(),
                };
                return Err(self.fail(failure));
            }
        };
        let n = self.obs_space.len();
        if reply.observation.len() != n {
            let failure = ProcessFailure::ObsSize {
                waiting_for: waiting_for.into(),
                got: reply.observation.len(),
                expected: n,
            };
            return Err(self.fail(failure));
        }
        Ok(reply)
    }
}

impl Task for ProcessTask {
    fn obs_space(&self) -> ObsSpace {
        self.obs_space.clone()
    }
    fn action_space(&self) -> ActionSpace {
        self.actions.clone()
    }
    fn reset(&mut self, seed: u64, obs: &mut [f32]) -> Result<(), TaskError> {
        check_obs_len(&self.name, obs, self.obs_space.len())?;
        let message = format!("{{\"type\":\"reset\",\"seed\":{seed}}}");
        let line = self.exchange("reset", &message)?;
        let reply = self.parse_reply("reset", &line, RESET_EXPECTED)?;
        obs.copy_from_slice(&reply.observation);
        self.running = true;
        Ok(())
    }
    fn step(&mut self, action: usize, obs: &mut [f32]) -> Result<Outcome, TaskError> {
        if !self.running {
            return Err(TaskError::NotRunning {
                kind: format!("process {}", self.name),
            });
        }
        if action >= self.actions.count() {
            return Err(crate::registry::bad_action(
                &self.name,
                action,
                self.actions.count(),
            ));
        }
        check_obs_len(&self.name, obs, self.obs_space.len())?;
        match self.sent.take() {
            Some(sent) if sent == action => {}
            Some(sent) => {
                return Err(TaskError::Lanes(format!(
                    "{}: step({action}) after send_action({sent})",
                    self.name
                )))
            }
            None => self.send_step(action)?,
        }
        let line = self.receive("step")?;
        let reply = self.parse_reply("step", &line, STEP_EXPECTED)?;
        let ending = match reply.ending.as_deref() {
            None | Some("running") => Ending::Running,
            Some("terminal") => Ending::Terminal,
            Some("truncated") => Ending::Truncated,
            Some(other) => {
                let failure = ProcessFailure::Garbage {
                    waiting_for: "step".into(),
                    problem: format!("unknown ending {other:?}"),
                    line: shorten(&line),
                    expected: STEP_EXPECTED.into(),
                };
                return Err(self.fail(failure));
            }
        };
        obs.copy_from_slice(&reply.observation);
        self.running = ending == Ending::Running;
        let success = if ending.is_done() && self.success {
            Some(reply.success.unwrap_or(false))
        } else {
            None
        };
        Ok(Outcome {
            reward: reply.reward,
            ending,
            success,
        })
    }
    fn has_success(&self) -> bool {
        self.success
    }
    fn send_action(&mut self, action: usize) -> Result<(), TaskError> {
        if self.running && action < self.actions.count() && self.sent.is_none() {
            self.send_step(action)?;
            self.sent = Some(action);
        }
        Ok(())
    }
    fn drain_messages(&mut self, out: &mut Vec<String>) {
        let mut s = self.stderr.lock().unwrap_or_else(|p| p.into_inner());
        if s.dropped > 0 {
            out.push(format!(
                "[{}] ({} earlier stderr lines dropped)",
                self.name, s.dropped
            ));
            s.dropped = 0;
        }
        out.append(&mut s.lines);
    }
}

impl Drop for ProcessTask {
    fn drop(&mut self) {
        if self.stopped {
            return;
        }
        if let Some(stdin) = self.stdin.as_mut() {
            let _ = stdin
                .write_all(b"{\"type\":\"bye\"}\n")
                .and_then(|_| stdin.flush());
        }
        drop(self.stdin.take());
        let deadline = Instant::now() + BYE_GRACE;
        while Instant::now() < deadline {
            if let Ok(Some(_)) = self.child.try_wait() {
                self.stopped = true;
                return;
            }
            std::thread::sleep(Duration::from_millis(5));
        }
        self.stop();
    }
}
