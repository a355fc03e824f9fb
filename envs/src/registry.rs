//! The task registry: which kinds exist, their settings with defaults
//! ([`catalogue`]), and [`make`], which builds one instance from a `[task]` section.
//!
//! The spec crate validates settings when it loads a spec file; [`resolve_settings`]
//! repeats the check (unknown names, types) and fills defaults, so that a `TaskSpec`
//! built by hand or from command-line `--set` values is safe too. Range checks live
//! in each task's constructor.

use std::collections::BTreeMap;

use mnemon_spec::{TaskSpec, Value};

use crate::{cartpole, fog_grid, process, recall, tiger, tmaze, Task, TaskError};

/// Type of a task setting.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SettingType {
    /// Whole number.
    Int,
    /// Real number (integers accepted).
    Float,
    /// true / false.
    Bool,
    /// Text.
    Str,
    /// List of text (a command line).
    StrList,
    /// Free-form table.
    Table,
}

impl SettingType {
    /// Name used in messages.
    pub fn name(self) -> &'static str {
        match self {
            SettingType::Int => "integer",
            SettingType::Float => "number",
            SettingType::Bool => "true or false",
            SettingType::Str => "text",
            SettingType::StrList => "list of text",
            SettingType::Table => "table",
        }
    }
    fn accepts(self, v: &Value) -> bool {
        match (self, v) {
            (SettingType::Int, Value::Int(_)) => true,
            (SettingType::Float, Value::Float(_) | Value::Int(_)) => true,
            (SettingType::Bool, Value::Bool(_)) => true,
            (SettingType::Str, Value::Str(_)) => true,
            (SettingType::StrList, Value::List(items)) => {
                items.iter().all(|i| matches!(i, Value::Str(_)))
            }
            (SettingType::Table, Value::Table(_)) => true,
            _ => false,
        }
    }
}

/// One setting of a task kind.
#[derive(Debug, Clone, PartialEq)]
pub struct SettingInfo {
    /// Name in the `[task]` section.
    pub name: &'static str,
    /// Type.
    pub kind: SettingType,
    /// Default (`None`: required).
    pub default: Option<Value>,
    /// One line of help.
    pub doc: &'static str,
}

/// A registered task kind, as `mnemon tasks` lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct TaskInfo {
    /// `kind = "..."`.
    pub kind: &'static str,
    /// What the task is, in one line.
    pub summary: &'static str,
    /// What makes it partially observable, in one line.
    pub hidden: &'static str,
    /// Time limit or horizon, in words.
    pub time_limit: &'static str,
    /// Published source.
    pub source: &'static str,
    /// Settings with defaults.
    pub settings: Vec<SettingInfo>,
}

impl TaskInfo {
    /// A `TaskSpec` of this kind with every setting at its default (required
    /// settings left out).
    pub fn default_spec(&self) -> TaskSpec {
        TaskSpec {
            kind: self.kind.to_string(),
            settings: self
                .settings
                .iter()
                .filter_map(|s| s.default.clone().map(|d| (s.name.to_string(), d)))
                .collect(),
        }
    }
}

fn setting(
    name: &'static str,
    kind: SettingType,
    default: Option<Value>,
    doc: &'static str,
) -> SettingInfo {
    SettingInfo {
        name,
        kind,
        default,
        doc,
    }
}

/// Every registered task kind, in display order.
pub fn catalogue() -> Vec<TaskInfo> {
    use SettingType::*;
    let limit = |d: i64| {
        setting(
            "time_limit",
            Int,
            Some(Value::Int(d)),
            "steps before truncation",
        )
    };
    vec![
        TaskInfo {
            kind: "tmaze",
            summary: "corridor with a junction at its end; go up or down at the junction as the cue said",
            hidden: "the cue (which arm holds the goal) is visible only on the first step",
            time_limit: "3 x (length + 2) steps unless set (truncation)",
            source: "Bakker 2002, Reinforcement learning with long short-term memory",
            settings: vec![
                setting("length", Int, Some(Value::Int(10)), "corridor length L (>= 1)"),
                setting("time_limit", Int, Some(Value::Int(0)), "steps before truncation; 0 = 3 x (length + 2)"),
            ],
        },
        TaskInfo {
            kind: "cartpole",
            summary: "balance a pole on a cart by pushing left or right; reward 1 per balanced step",
            hidden: "nothing hidden: fully observed control baseline",
            time_limit: "500 steps unless set (truncation)",
            source: "Barto, Sutton & Anderson 1983; sign of g corrected per Florian 2007",
            settings: vec![limit(500)],
        },
        TaskInfo {
            kind: "cartpole-positions",
            summary: "cart-pole observing cart position and pole angle only",
            hidden: "both velocities are hidden; they must be inferred from successive positions",
            time_limit: "500 steps unless set (truncation)",
            source: "Barto, Sutton & Anderson 1983 with velocities removed",
            settings: vec![
                limit(500),
                setting("noise", Float, Some(Value::Float(0.0)), "std of Gaussian sensor noise (>= 0)"),
            ],
        },
        TaskInfo {
            kind: "tiger",
            summary: "listen for the tiger (-1) or open a door (tiger -100, treasure +10)",
            hidden: "the tiger's side is never seen; listening hears it correctly with probability listen_accuracy",
            time_limit: "horizon steps (the end of the finite-horizon problem: terminal)",
            source: "Kaelbling, Littman & Cassandra 1998",
            settings: vec![
                setting("horizon", Int, Some(Value::Int(10)), "steps per episode (>= 1)"),
                setting("listen_accuracy", Float, Some(Value::Float(0.85)), "probability a listen is heard right, in [0.5, 1]"),
                setting("end_on_open", Bool, Some(Value::Bool(false)), "end the episode when a door is opened"),
            ],
        },
        TaskInfo {
            kind: "recall",
            summary: "see one of S symbols, sit through D distractor steps, then name the symbol",
            hidden: "the symbol is shown only on the first step; a memoryless policy scores 1/S",
            time_limit: "distractors + 2 steps (fixed length, terminal)",
            source: "delayed recall, an analytic memory test",
            settings: vec![
                setting("symbols", Int, Some(Value::Int(4)), "number of symbols S (>= 2)"),
                setting("distractors", Int, Some(Value::Int(8)), "steps between the symbol and the question (>= 0)"),
            ],
        },
        TaskInfo {
            kind: "fog-grid",
            summary: "warehouse robot reads the bay sign at the entrance, then drives to the right loading bay",
            hidden: "egocentric view window only; the sign (which bay) is shown only on the first step",
            time_limit: "100 steps unless set (truncation)",
            source: "mnemon's own scenario",
            settings: vec![
                setting("map", Str, Some(Value::Str("depot".into())), "built-in map (depot, aisles) or path to an ASCII map file"),
                setting("view", Int, Some(Value::Int(5)), "side of the square view window (odd, >= 3)"),
                limit(100),
            ],
        },
        TaskInfo {
            kind: "process",
            summary: "a task served by an outside program over mnemon's line protocol (envs/PROTOCOL.md)",
            hidden: "whatever the program hides",
            time_limit: "decided by the program",
            source: "your own simulator",
            settings: vec![
                setting("command", StrList, None, "program and arguments, e.g. [\"python3\", \"examples/tasks/beacon.py\"]"),
                setting("settings", Table, Some(Value::Table(BTreeMap::new())), "table passed to the program in the hello message"),
                setting("timeout", Float, Some(Value::Float(5.0)), "seconds to wait for each answer (> 0)"),
            ],
        },
    ]
}

/// Check `spec`'s settings against its kind's schema and fill in defaults.
pub fn resolve_settings(spec: &TaskSpec) -> Result<TaskSpec, TaskError> {
    let all = catalogue();
    let Some(info) = all.iter().find(|i| i.kind == spec.kind) else {
        let known: Vec<&str> = all.iter().map(|i| i.kind).collect();
        return Err(TaskError::UnknownKind {
            kind: spec.kind.clone(),
            known: known.join(", "),
        });
    };
    for (key, value) in &spec.settings {
        let Some(s) = info.settings.iter().find(|s| s.name == key) else {
            let names: Vec<&str> = info.settings.iter().map(|s| s.name).collect();
            return Err(TaskError::Setting {
                kind: spec.kind.clone(),
                key: key.clone(),
                problem: format!("unknown setting; {} has: {}", spec.kind, names.join(", ")),
            });
        };
        if !s.kind.accepts(value) {
            return Err(TaskError::Setting {
                kind: spec.kind.clone(),
                key: key.clone(),
                problem: format!("expected {}, got {value:?}", s.kind.name()),
            });
        }
    }
    let mut settings = spec.settings.clone();
    for s in &info.settings {
        if !settings.contains_key(s.name) {
            match &s.default {
                Some(d) => {
                    settings.insert(s.name.to_string(), d.clone());
                }
                None => {
                    return Err(TaskError::Setting {
                        kind: spec.kind.clone(),
                        key: s.name.to_string(),
                        problem: format!("required ({}: {})", s.kind.name(), s.doc),
                    })
                }
            }
        }
    }
    Ok(TaskSpec {
        kind: spec.kind.clone(),
        settings,
    })
}

/// Build one instance of the task `spec` describes. For `kind = "process"` this
/// starts the outside program and completes its handshake.
pub fn make(spec: &TaskSpec) -> Result<Box<dyn Task>, TaskError> {
    let spec = resolve_settings(spec)?;
    Ok(match spec.kind.as_str() {
        "tmaze" => Box::new(tmaze::TMaze::from_spec(&spec)?),
        "cartpole" => Box::new(cartpole::CartPole::from_spec(&spec, false)?),
        "cartpole-positions" => Box::new(cartpole::CartPole::from_spec(&spec, true)?),
        "tiger" => Box::new(tiger::Tiger::from_spec(&spec)?),
        "recall" => Box::new(recall::Recall::from_spec(&spec)?),
        "fog-grid" => Box::new(fog_grid::FogGrid::from_spec(&spec)?),
        "process" => Box::new(process::ProcessTask::from_spec(&spec)?),
        other => unreachable!("resolve_settings accepted unknown kind {other}"),
    })
}

/// Integer setting with a range check (used by the task constructors).
pub(crate) fn int_in(spec: &TaskSpec, key: &str, lo: i64, hi: i64) -> Result<i64, TaskError> {
    let v = spec.int(key).ok_or_else(|| TaskError::Setting {
        kind: spec.kind.clone(),
        key: key.into(),
        problem: "missing or not an integer".into(),
    })?;
    if v < lo || v > hi {
        return Err(TaskError::Setting {
            kind: spec.kind.clone(),
            key: key.into(),
            problem: format!("{v} is out of range, expected {lo} ..= {hi}"),
        });
    }
    Ok(v)
}

/// Real setting with a range check.
pub(crate) fn float_in(spec: &TaskSpec, key: &str, lo: f64, hi: f64) -> Result<f64, TaskError> {
    let v = spec.float(key).ok_or_else(|| TaskError::Setting {
        kind: spec.kind.clone(),
        key: key.into(),
        problem: "missing or not a number".into(),
    })?;
    if !(v >= lo && v <= hi) {
        return Err(TaskError::Setting {
            kind: spec.kind.clone(),
            key: key.into(),
            problem: format!("{v} is out of range, expected {lo} ..= {hi}"),
        });
    }
    Ok(v)
}

/// Shared error for a bad action index.
pub(crate) fn bad_action(kind: &str, action: usize, count: usize) -> TaskError {
    TaskError::Action {
        kind: kind.into(),
        action,
        count,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unknown_kind_and_setting_are_named() {
        let spec = TaskSpec {
            kind: "tmaz".into(),
            settings: BTreeMap::new(),
        };
        let e = make(&spec).err().unwrap().to_string();
        assert!(e.contains("tmaz") && e.contains("tmaze"), "{e}");
        let mut settings = BTreeMap::new();
        settings.insert("lenght".to_string(), Value::Int(3));
        let spec = TaskSpec {
            kind: "tmaze".into(),
            settings,
        };
        let e = make(&spec).err().unwrap().to_string();
        assert!(e.contains("lenght") && e.contains("length"), "{e}");
    }

    #[test]
    fn wrong_type_and_range_are_errors() {
        let mut settings = BTreeMap::new();
        settings.insert("length".to_string(), Value::Str("ten".into()));
        let e = make(&TaskSpec {
            kind: "tmaze".into(),
            settings: settings.clone(),
        })
        .err()
        .unwrap()
        .to_string();
        assert!(e.contains("expected integer"), "{e}");
        settings.insert("length".to_string(), Value::Int(0));
        let e = make(&TaskSpec {
            kind: "tmaze".into(),
            settings,
        })
        .err()
        .unwrap()
        .to_string();
        assert!(e.contains("out of range"), "{e}");
    }

    #[test]
    fn every_builtin_builds_with_defaults() {
        for info in catalogue() {
            if info.kind == "process" {
                let e = make(&info.default_spec()).err().unwrap().to_string();
                assert!(e.contains("command") && e.contains("required"), "{e}");
                continue;
            }
            let t = make(&info.default_spec()).unwrap();
            assert!(!t.obs_space().is_empty());
            assert!(t.action_space().count() >= 2);
        }
    }
}
