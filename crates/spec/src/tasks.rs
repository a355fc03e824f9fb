//! The settings schema of every task kind: names, types, defaults, docs (as
//! registry [`Kind`]s), what each task offers (image observations, a success flag),
//! and the rules that tie a task's settings together. The tasks themselves live in
//! `envs/`; this file only says what a spec may ask of them.

use std::collections::BTreeMap;

use crate::model::Value;
use crate::registry::{Key, KeyDefault, Kind, Ty};

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

/// Built-in maps of `fog-grid`; any other value of `map` must be a path to an ASCII
/// map file.
pub const FOG_GRID_MAPS: &[&str] = &["depot"];

const fn int(min: i64, max: i64) -> Ty {
    Ty::Int { min, max }
}

const fn key(path: &'static str, ty: Ty, default: &'static str, doc: &'static str) -> Key {
    Key {
        path,
        ty,
        default: KeyDefault::Value(default),
        doc,
    }
}

const NONNEG: Option<crate::registry::Bound> = crate::registry::at(0.0);

const TIME_LIMIT: Key = key(
    "time_limit",
    int(1, 1_000_000),
    "500",
    "steps before the episode is cut off (truncated, not failed)",
);

/// Every task kind with its settings.
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
    },
    Kind {
        name: "cartpole",
        doc: "cart-pole balancing (Barto, Sutton & Anderson 1983), fully observed",
        fields: &[TIME_LIMIT],
    },
    Kind {
        name: "cartpole-positions",
        doc: "cart-pole with both velocities hidden; memory must infer them",
        fields: &[
            TIME_LIMIT,
            key(
                "noise",
                Ty::Float { lo: NONNEG, hi: None },
                "0.0",
                "standard deviation of Gaussian noise added to each observed position",
            ),
        ],
    },
    Kind {
        name: "tiger",
        doc: "the Tiger problem (Kaelbling, Littman & Cassandra 1998) over a finite horizon",
        fields: &[
            key("horizon", int(1, 10_000), "10", "steps per episode"),
            key(
                "listen_accuracy",
                Ty::Float {
                    lo: crate::registry::at(0.5),
                    hi: crate::registry::at(1.0),
                },
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
    },
    Kind {
        name: "fog-grid",
        doc: "grid navigation seen through a small egocentric image window; the goal is shown only at the start",
        fields: &[
            key(
                "map",
                Ty::Str,
                "\"depot\"",
                "a built-in map name (depot) or a path to an ASCII map file, relative to the spec",
            ),
            key(
                "view",
                int(3, 99),
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
                Ty::Float {
                    lo: crate::registry::above(0.0),
                    hi: None,
                },
                "5.0",
                "seconds to wait for each reply before calling the program stuck",
            ),
        ],
    },
];

/// Whether observations of `kind` are images (a conv torso can read them).
pub fn image(kind: &str) -> Has {
    match kind {
        "fog-grid" => Has::Yes,
        "process" => Has::AtRuntime,
        _ => Has::No,
    }
}

/// Whether episodes of `kind` report success or failure (for `stop = { success = X }`).
pub fn success(kind: &str) -> Has {
    match kind {
        "cartpole" | "cartpole-positions" => Has::No,
        "process" => Has::AtRuntime,
        _ => Has::Yes,
    }
}

/// Rules between one task's settings, and settings filled in from others. Returns
/// `(setting, message)` for each broken rule.
pub(crate) fn rules(kind: &str, s: &mut BTreeMap<String, Value>) -> Vec<(&'static str, String)> {
    let mut out = Vec::new();
    let int = |s: &BTreeMap<String, Value>, k: &str| match s.get(k) {
        Some(Value::Int(v)) => *v,
        _ => 0,
    };
    match kind {
        "tmaze" => {
            let length = int(s, "length");
            let limit = int(s, "time_limit");
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
        "fog-grid" => {
            let view = int(s, "view");
            if view % 2 == 0 {
                out.push((
                    "view",
                    format!("view must be odd so the agent sits in the middle, got {view}"),
                ));
            }
            if let Some(Value::Str(map)) = s.get("map") {
                let looks_like_path = map.contains(['/', '\\', '.']);
                if !FOG_GRID_MAPS.contains(&map.as_str()) && !looks_like_path {
                    let hint = crate::error::nearest(map, FOG_GRID_MAPS.iter().copied())
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
        _ => {}
    }
    out
}
