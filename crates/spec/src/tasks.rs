//! The one table of task kinds ([`TASK_KINDS`]): for each kind its settings (name,
//! type with range or choices, default, doc, as registry [`Key`]s), what it offers
//! (image observations, a success flag) and how `mnemon tasks` describes it, plus
//! the rules that tie one task's settings together.
//!
//! Everything that reads task settings goes through this file: spec validation
//! (`resolve/`), the task builder in `envs` ([`complete`]), and `mnemon tasks try
//! --set` ([`parse_setting`]). The tasks themselves live in `envs/`.

use std::collections::BTreeMap;

use crate::error::nearest;
use crate::model::{TaskSpec, Value};
use crate::registry::{above, at, describe, in_bounds, Bound, Key, KeyDefault, Kind, Ty};
use crate::values::parse_count;

/// Whether a task has a capability.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Has {
    /// Always.
    Yes,
    /// Never.
    No,
    /// Declared by the task itself when it starts (outside processes).
    AtRuntime,
}

/// What a task kind offers and how `mnemon tasks` describes it.
#[derive(Debug, Clone, Copy)]
pub struct TaskFacts {
    /// What the task is, in one line.
    pub summary: &'static str,
    /// What makes it partially observable, in one line.
    pub hidden: &'static str,
    /// How an episode ends, in words.
    pub episode_end: &'static str,
    /// Published source.
    pub source: &'static str,
    /// Whether observations are images (a conv torso can read them).
    pub image: Has,
    /// Whether episodes end with a success flag (for `stop = { success = X }`).
    pub success: Has,
}

/// Built-in maps of `fog-grid`; any other value of `map` must be a path to an ASCII
/// map file. `envs` ships exactly these (a test there checks it).
pub const FOG_GRID_MAPS: &[&str] = &["depot", "aisles"];

const fn int(min: i64, max: i64) -> Ty {
    Ty::Int { min, max }
}

const fn float(lo: Option<Bound>, hi: Option<Bound>) -> Ty {
    Ty::Float { lo, hi }
}

const fn key(path: &'static str, ty: Ty, default: &'static str, doc: &'static str) -> Key {
    Key {
        path,
        ty,
        default: KeyDefault::Value(default),
        doc,
    }
}

const TIME_LIMIT: Key = key(
    "time_limit",
    int(1, 1_000_000),
    "500",
    "steps before the episode is cut off (truncated, not failed)",
);

/// Every task kind with its settings and facts, in display order.
pub const TASK_KINDS: &[Kind] = &[
    Kind {
        name: "tmaze",
        doc: "T-maze (Bakker 2002): a cue at the start says which way to turn at the far end",
        fields: &[
            key("length", int(1, 1000), "10", "corridor length"),
            key(
                "time_limit",
                int(0, 1_000_000),
                "0",
                "steps before truncation; 0 = automatic, 3 * (length + 2); else at least length + 2",
            ),
        ],
        task: Some(TaskFacts {
            summary: "corridor with a junction at its end; go up or down at the junction as the cue said",
            hidden: "the cue (which arm holds the goal) is visible only on the first step",
            episode_end: "3 x (length + 2) steps unless set (truncation)",
            source: "Bakker 2002, Reinforcement learning with long short-term memory",
            image: Has::No,
            success: Has::Yes,
        }),
    },
    Kind {
        name: "cartpole",
        doc: "cart-pole balancing (Barto, Sutton & Anderson 1983), fully observed",
        fields: &[TIME_LIMIT],
        task: Some(TaskFacts {
            summary: "balance a pole on a cart by pushing left or right; reward 1 per balanced step",
            hidden: "nothing hidden: fully observed control baseline",
            episode_end: "500 steps unless set (truncation)",
            source: "Barto, Sutton & Anderson 1983; sign of g corrected per Florian 2007",
            image: Has::No,
            success: Has::No,
        }),
    },
    Kind {
        name: "cartpole-positions",
        doc: "cart-pole with both velocities hidden; memory must infer them",
        fields: &[
            TIME_LIMIT,
            key(
                "noise",
                float(at(0.0), at(10.0)),
                "0.0",
                "standard deviation of Gaussian noise added to each observed position",
            ),
        ],
        task: Some(TaskFacts {
            summary: "cart-pole observing cart position and pole angle only",
            hidden: "both velocities are hidden; they must be inferred from successive positions",
            episode_end: "500 steps unless set (truncation)",
            source: "Barto, Sutton & Anderson 1983 with velocities removed",
            image: Has::No,
            success: Has::No,
        }),
    },
    Kind {
        name: "tiger",
        doc: "the Tiger problem (Kaelbling, Littman & Cassandra 1998) over a finite horizon",
        fields: &[
            key("horizon", int(1, 10_000), "10", "steps per episode"),
            key(
                "listen_accuracy",
                float(at(0.5), at(1.0)),
                "0.85",
                "probability that listening hears the tiger on its true side",
            ),
            key(
                "end_on_open",
                Ty::Bool,
                "false",
                "end the episode when a door is opened (else the tiger is reset)",
            ),
        ],
        // No success flag: opening the treasure door is rewarded, but an episode
        // holds several openings (or none), so only its return says how it went.
        task: Some(TaskFacts {
            summary: "listen for the tiger (-1) or open a door (tiger -100, treasure +10)",
            hidden: "the tiger's side is never seen; listening hears it correctly with probability listen_accuracy",
            episode_end: "horizon steps (the end of the finite-horizon problem: terminal)",
            source: "Kaelbling, Littman & Cassandra 1998",
            image: Has::No,
            success: Has::No,
        }),
    },
    Kind {
        name: "recall",
        doc: "see a symbol, then reproduce it after a run of distractor steps",
        fields: &[
            key("symbols", int(2, 1000), "4", "distinct symbols"),
            key(
                "distractors",
                int(0, 100_000),
                "8",
                "distractor steps between seeing and answering",
            ),
        ],
        task: Some(TaskFacts {
            summary: "see one of S symbols, sit through D distractor steps, then name the symbol",
            hidden: "the symbol is shown only on the first step; a memoryless policy scores 1/S",
            episode_end: "distractors + 2 steps (fixed length, terminal)",
            source: "delayed recall, an analytic memory test",
            image: Has::No,
            success: Has::Yes,
        }),
    },
    Kind {
        name: "fog-grid",
        doc: "grid navigation seen through a small egocentric image window; the goal is shown only at the start",
        fields: &[
            key(
                "map",
                Ty::Str,
                "\"depot\"",
                "a built-in map name (depot or aisles) or a path to an ASCII map file, relative to the spec",
            ),
            key(
                "view",
                int(3, 31),
                "5",
                "side of the square egocentric view in cells (odd)",
            ),
            key(
                "time_limit",
                int(1, 1_000_000),
                "100",
                "steps before truncation",
            ),
        ],
        task: Some(TaskFacts {
            summary: "warehouse robot reads the bay sign at the entrance, then drives to the right loading bay",
            hidden: "egocentric view window only; the sign (which bay) is shown only on the first step",
            episode_end: "100 steps unless set (truncation)",
            source: "mnemon's own scenario",
            image: Has::Yes,
            success: Has::Yes,
        }),
    },
    Kind {
        name: "process",
        doc: "a task served by an outside program over mnemon's line protocol",
        fields: &[
            Key {
                path: "command",
                ty: Ty::StrList,
                default: KeyDefault::Required,
                doc: "program and arguments to start, like [\"python3\", \"my_task.py\"]",
            },
            key(
                "settings",
                Ty::AnyTable,
                "{}",
                "table passed to the program in the handshake, as JSON",
            ),
            key(
                "timeout",
                float(above(0.0), at(86_400.0)),
                "5.0",
                "seconds to wait for each reply before calling the program stuck",
            ),
        ],
        task: Some(TaskFacts {
            summary: "a task served by an outside program over mnemon's line protocol (envs/PROTOCOL.md)",
            hidden: "whatever the program hides",
            episode_end: "decided by the program",
            source: "your own simulator",
            image: Has::AtRuntime,
            success: Has::AtRuntime,
        }),
    },
];

/// A problem with a task's settings, outside a spec file (a hand-built [`TaskSpec`],
/// `mnemon tasks try --set`). Inside a spec file the loader reports the same problems
/// with file, line and column.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SettingError {
    /// `kind` names no task.
    #[error("unknown task kind \"{kind}\"; known kinds: {known}")]
    UnknownKind {
        /// What was asked for.
        kind: String,
        /// Comma-separated list of kinds.
        known: String,
    },
    /// A setting is unknown, missing, of the wrong type, out of range, or breaks a
    /// rule between settings.
    #[error("task {kind}: setting \"{key}\": {problem}")]
    Setting {
        /// Task kind.
        kind: String,
        /// Setting name.
        key: String,
        /// What is wrong and what was expected.
        problem: String,
    },
}

fn setting_error(kind: &str, key: &str, problem: String) -> SettingError {
    SettingError::Setting {
        kind: kind.to_string(),
        key: key.to_string(),
        problem,
    }
}

/// The entry of task kind `name`.
pub fn kind(name: &str) -> Result<&'static Kind, SettingError> {
    TASK_KINDS
        .iter()
        .find(|k| k.name == name)
        .ok_or_else(|| SettingError::UnknownKind {
            kind: name.to_string(),
            known: TASK_KINDS
                .iter()
                .map(|k| k.name)
                .collect::<Vec<_>>()
                .join(", "),
        })
}

/// The facts of task kind `name` (`None` for an unknown kind).
pub fn facts(name: &str) -> Option<&'static TaskFacts> {
    TASK_KINDS
        .iter()
        .find(|k| k.name == name)
        .and_then(|k| k.task.as_ref())
}

/// The setting `key` of task kind `kind`.
pub fn setting(kind_name: &str, key: &str) -> Result<&'static Key, SettingError> {
    let k = kind(kind_name)?;
    k.fields.iter().find(|f| f.path == key).ok_or_else(|| {
        let names: Vec<&str> = k.fields.iter().map(|f| f.path).collect();
        let hint = nearest(key, names.iter().copied())
            .map(|n| format!(" (did you mean \"{n}\"?)"))
            .unwrap_or_default();
        setting_error(
            kind_name,
            key,
            format!(
                "unknown setting{hint}; {kind_name} has: {}",
                names.join(", ")
            ),
        )
    })
}

/// The default of a setting as a value (`None` when the setting is required).
pub fn default_value(key: &Key) -> Option<Value> {
    match key.default {
        KeyDefault::Value(text) => Some(toml_value(text).unwrap_or_else(|e| {
            panic!(
                "task setting {}: default {text:?} is not a TOML value: {e}",
                key.path
            )
        })),
        KeyDefault::Computed(_) | KeyDefault::Required => None,
    }
}

fn toml_value(text: &str) -> Result<Value, String> {
    let doc: toml::Table = toml::from_str(&format!("v = {text}")).map_err(|e| e.to_string())?;
    let v = doc.get("v").ok_or("no value")?;
    from_toml(v)
}

fn from_toml(v: &toml::Value) -> Result<Value, String> {
    Ok(match v {
        toml::Value::String(s) => Value::Str(s.clone()),
        toml::Value::Integer(i) => Value::Int(*i),
        toml::Value::Float(f) => Value::Float(*f),
        toml::Value::Boolean(b) => Value::Bool(*b),
        toml::Value::Datetime(d) => Value::Str(d.to_string()),
        toml::Value::Array(items) => {
            Value::List(items.iter().map(from_toml).collect::<Result<_, _>>()?)
        }
        toml::Value::Table(t) => Value::Table(
            t.iter()
                .map(|(k, v)| Ok((k.clone(), from_toml(v)?)))
                .collect::<Result<_, String>>()?,
        ),
    })
}

fn json_value(v: &serde_json::Value) -> Result<Value, String> {
    Ok(match v {
        serde_json::Value::Bool(b) => Value::Bool(*b),
        serde_json::Value::Number(n) => match n.as_i64() {
            Some(i) => Value::Int(i),
            None => Value::Float(n.as_f64().ok_or("a number out of range")?),
        },
        serde_json::Value::String(s) => Value::Str(s.clone()),
        serde_json::Value::Array(a) => {
            Value::List(a.iter().map(json_value).collect::<Result<_, _>>()?)
        }
        serde_json::Value::Object(o) => Value::Table(
            o.iter()
                .map(|(k, v)| Ok((k.clone(), json_value(v)?)))
                .collect::<Result<_, String>>()?,
        ),
        serde_json::Value::Null => return Err("null has no TOML equivalent".into()),
    })
}

fn value_kind(v: &Value) -> &'static str {
    match v {
        Value::Int(_) => "integer",
        Value::Float(_) => "float",
        Value::Bool(_) => "boolean",
        Value::Str(_) => "string",
        Value::List(_) => "array",
        Value::Table(_) => "table",
    }
}

/// Check one value against a setting's type and range; integers given for a real
/// setting become reals. The message says what was expected.
pub fn check_value(key: &Key, v: &Value) -> Result<Value, String> {
    let expected = || format!("expected {}, got {}", describe(&key.ty), value_kind(v));
    let out_of_range =
        |shown: String| format!("{shown} is out of range, expected {}", describe(&key.ty));
    match (&key.ty, v) {
        (Ty::Int { min, max }, Value::Int(i)) => {
            if i < min || i > max {
                Err(out_of_range(i.to_string()))
            } else {
                Ok(v.clone())
            }
        }
        (Ty::Float { lo, hi }, Value::Int(_) | Value::Float(_)) => {
            let f = match v {
                Value::Int(i) => *i as f64,
                Value::Float(f) => *f,
                _ => unreachable!("matched Int or Float above"),
            };
            if in_bounds(f, lo, hi) {
                Ok(Value::Float(f))
            } else {
                Err(out_of_range(crate::values::float_text(f)))
            }
        }
        (Ty::Bool, Value::Bool(_)) => Ok(v.clone()),
        (Ty::Str, Value::Str(s)) => {
            if s.trim().is_empty() {
                Err("must not be empty".into())
            } else {
                Ok(v.clone())
            }
        }
        (Ty::Choice(choices), Value::Str(s)) => {
            if choices.contains(&s.as_str()) {
                Ok(v.clone())
            } else {
                Err(format!("\"{s}\" is not a choice; {}", expected()))
            }
        }
        (Ty::StrList, Value::List(items)) => {
            if items.is_empty() {
                Err(format!("must not be empty; {}", expected()))
            } else if items.iter().all(|i| matches!(i, Value::Str(_))) {
                Ok(v.clone())
            } else {
                Err(format!("entries must be strings; {}", expected()))
            }
        }
        (Ty::AnyTable, Value::Table(_)) => Ok(v.clone()),
        (Ty::Name | Ty::IntList { .. } | Ty::Budget | Ty::Schedule | Ty::Stop | Ty::Part(_), _) => {
            Err(format!(
                "internal error: {} is not a type task settings may have",
                describe(&key.ty)
            ))
        }
        _ => Err(expected()),
    }
}

/// Check a task's settings against its entry, fill in defaults, and check the rules
/// between its settings: what `envs` runs before building a task. A fog-grid map
/// path is taken as given (relative to the working folder).
pub fn complete(spec: &TaskSpec) -> Result<TaskSpec, SettingError> {
    let k = kind(&spec.kind)?;
    let mut settings = BTreeMap::new();
    for (name, value) in &spec.settings {
        let key = setting(&spec.kind, name)?;
        let v = check_value(key, value).map_err(|p| setting_error(&spec.kind, name, p))?;
        settings.insert(name.clone(), v);
    }
    for f in k.fields {
        if settings.contains_key(f.path) {
            continue;
        }
        match default_value(f) {
            Some(d) => {
                settings.insert(f.path.to_string(), d);
            }
            None => {
                return Err(setting_error(
                    &spec.kind,
                    f.path,
                    format!("required ({}: {})", describe(&f.ty), f.doc),
                ))
            }
        }
    }
    if let Some((key, problem)) = rules(&spec.kind, &mut settings).into_iter().next() {
        return Err(setting_error(&spec.kind, key, problem));
    }
    Ok(TaskSpec {
        kind: spec.kind.clone(),
        settings,
    })
}

/// Read the text of one `KEY=VALUE` setting of task kind `kind` (as `mnemon tasks
/// try --set` gives it) as the setting's type: integers accept k, M, G suffixes, a
/// list of strings is a JSON array or words separated by spaces, a table is a JSON
/// object. The value is range-checked.
pub fn parse_setting(kind_name: &str, name: &str, text: &str) -> Result<Value, SettingError> {
    let key = setting(kind_name, name)?;
    let bad = |why: String| setting_error(kind_name, name, format!("{text:?}: {why}"));
    let expected = || format!("expected {}", describe(&key.ty));
    let v = match key.ty {
        Ty::Int { .. } => {
            let n = parse_count(text).map_err(|e| bad(e.message))?;
            Value::Int(i64::try_from(n).map_err(|_| bad(expected()))?)
        }
        Ty::Float { .. } => Value::Float(text.trim().parse().map_err(|_| bad(expected()))?),
        Ty::Bool => Value::Bool(text.trim().parse().map_err(|_| bad(expected()))?),
        Ty::Str | Ty::Choice(_) => Value::Str(text.to_string()),
        Ty::StrList => {
            if text.trim_start().starts_with('[') {
                let items: Vec<String> =
                    serde_json::from_str(text).map_err(|e| bad(format!("{}: {e}", expected())))?;
                Value::List(items.into_iter().map(Value::Str).collect())
            } else {
                Value::List(
                    text.split_whitespace()
                        .map(|w| Value::Str(w.to_string()))
                        .collect(),
                )
            }
        }
        Ty::AnyTable => {
            let json: serde_json::Value = serde_json::from_str(text)
                .map_err(|e| bad(format!("{} (as JSON): {e}", expected())))?;
            json_value(&json).map_err(|e| bad(format!("{} (as JSON): {e}", expected())))?
        }
        Ty::Name | Ty::IntList { .. } | Ty::Budget | Ty::Schedule | Ty::Stop | Ty::Part(_) => {
            return Err(bad(format!(
                "internal error: {} is not a type task settings may have",
                describe(&key.ty)
            )))
        }
    };
    check_value(key, &v).map_err(|p| setting_error(kind_name, name, p))
}

/// Rules between one task's settings, and settings filled in from others. Returns
/// `(setting, message)` for each broken rule. A rule whose inputs are missing (a
/// problem already reported for them) is skipped.
pub(crate) fn rules(kind: &str, s: &mut BTreeMap<String, Value>) -> Vec<(&'static str, String)> {
    let mut out = Vec::new();
    let int = |s: &BTreeMap<String, Value>, k: &str| match s.get(k) {
        Some(Value::Int(v)) => Some(*v),
        _ => None,
    };
    match kind {
        "tmaze" => {
            if let (Some(length), Some(limit)) = (int(s, "length"), int(s, "time_limit")) {
                if limit == 0 {
                    s.insert("time_limit".into(), Value::Int(3 * (length + 2)));
                } else if limit < length + 2 {
                    out.push((
                        "time_limit",
                        format!(
                            "time_limit {limit} is too short for a corridor of length {length}: the junction needs at least length + 2 = {} steps (0 picks 3 * (length + 2))",
                            length + 2
                        ),
                    ));
                }
            }
        }
        "fog-grid" => {
            if let Some(view) = int(s, "view") {
                if view % 2 == 0 {
                    out.push((
                        "view",
                        format!("view must be odd so the agent sits in the middle, got {view}"),
                    ));
                }
            }
            if let Some(Value::Str(map)) = s.get("map") {
                let looks_like_path = map.contains(['/', '\\', '.']);
                if !FOG_GRID_MAPS.contains(&map.as_str()) && !looks_like_path {
                    let hint = nearest(map, FOG_GRID_MAPS.iter().copied())
                        .map(|m| format!(" (did you mean \"{m}\"?)"))
                        .unwrap_or_default();
                    out.push((
                        "map",
                        format!(
                            "unknown built-in map {map:?}{hint}; built-in maps: {}; or give a path to a map file",
                            FOG_GRID_MAPS.join(", ")
                        ),
                    ));
                }
            }
        }
        "process" => {
            if let Some(Value::List(cmd)) = s.get("command") {
                if matches!(cmd.first(), Some(Value::Str(p)) if p.trim().is_empty()) {
                    out.push(("command", "the program name must not be empty".into()));
                }
            }
        }
        "cartpole" | "cartpole-positions" | "tiger" | "recall" => {}
        other => out.push((
            "kind",
            format!("internal error: no rules are written for task kind \"{other}\""),
        )),
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_kind_has_facts_and_every_default_passes_its_own_check() {
        for k in TASK_KINDS {
            assert!(k.task.is_some(), "{} has no facts", k.name);
            for f in k.fields {
                if let Some(d) = default_value(f) {
                    assert_eq!(check_value(f, &d), Ok(d.clone()), "{}.{}", k.name, f.path);
                }
            }
            let mut settings = BTreeMap::new();
            for f in k.fields {
                if let Some(d) = default_value(f) {
                    settings.insert(f.path.to_string(), d);
                }
            }
            assert!(rules(k.name, &mut settings).is_empty(), "{}", k.name);
        }
    }

    #[test]
    fn the_map_doc_names_every_built_in_map() {
        let map = setting("fog-grid", "map").unwrap();
        for m in FOG_GRID_MAPS {
            assert!(map.doc.contains(m), "{m} missing from: {}", map.doc);
        }
    }

    #[test]
    fn complete_fills_defaults_and_checks_types_ranges_and_rules() {
        let s = complete(&TaskSpec {
            kind: "tmaze".into(),
            settings: [("length".to_string(), Value::Int(4))].into(),
        })
        .unwrap();
        // 0 means 3 * (length + 2).
        assert_eq!(s.int("time_limit"), Some(18));
        let bad = |kind: &str, key: &str, v: Value| {
            complete(&TaskSpec {
                kind: kind.into(),
                settings: [(key.to_string(), v)].into(),
            })
            .unwrap_err()
            .to_string()
        };
        let e = bad("tmaze", "length", Value::Int(0));
        assert!(e.contains("out of range") && e.contains("1..=1000"), "{e}");
        let e = bad("tmaze", "length", Value::Str("ten".into()));
        assert!(
            e.contains("expected an integer") && e.contains("string"),
            "{e}"
        );
        let e = bad("tmaze", "lenght", Value::Int(3));
        assert!(e.contains("did you mean \"length\""), "{e}");
        let e = bad("fog-grid", "view", Value::Int(4));
        assert!(e.contains("odd"), "{e}");
        let e = bad("fog-grid", "map", Value::Str("depo".into()));
        assert!(e.contains("did you mean \"depot\""), "{e}");
        let e = bad("tmaz", "length", Value::Int(3));
        assert!(
            e.contains("unknown task kind") && e.contains("tmaze"),
            "{e}"
        );
        let e = complete(&TaskSpec {
            kind: "process".into(),
            settings: BTreeMap::new(),
        })
        .unwrap_err()
        .to_string();
        assert!(e.contains("command") && e.contains("required"), "{e}");
        // An integer for a real setting becomes a real.
        let s = complete(&TaskSpec {
            kind: "tiger".into(),
            settings: [("listen_accuracy".to_string(), Value::Int(1))].into(),
        })
        .unwrap();
        assert_eq!(s.settings["listen_accuracy"], Value::Float(1.0));
    }

    #[test]
    fn parse_setting_reads_text_by_the_settings_type() {
        assert_eq!(parse_setting("tmaze", "length", "4"), Ok(Value::Int(4)));
        assert_eq!(
            parse_setting("recall", "distractors", "1k"),
            Ok(Value::Int(1000))
        );
        assert_eq!(
            parse_setting("tiger", "end_on_open", "true"),
            Ok(Value::Bool(true))
        );
        assert_eq!(
            parse_setting("process", "command", "python3 x.py"),
            Ok(Value::List(vec![
                Value::Str("python3".into()),
                Value::Str("x.py".into())
            ]))
        );
        assert_eq!(
            parse_setting("process", "command", r#"["a b", "c"]"#),
            Ok(Value::List(vec![
                Value::Str("a b".into()),
                Value::Str("c".into())
            ]))
        );
        assert_eq!(
            parse_setting("process", "settings", r#"{"speed": 2}"#),
            Ok(Value::Table([("speed".to_string(), Value::Int(2))].into()))
        );
        for (kind, key, text, want) in [
            ("tmaze", "length", "four", "expected"),
            ("tmaze", "length", "5000", "out of range"),
            ("tiger", "listen_accuracy", "0.2", "out of range"),
            ("tmaze", "lenght", "4", "did you mean \"length\""),
            ("process", "settings", "[1]", "table"),
        ] {
            let e = parse_setting(kind, key, text).unwrap_err().to_string();
            assert!(e.contains(want), "{kind}.{key}={text}: {e}");
        }
    }
}
