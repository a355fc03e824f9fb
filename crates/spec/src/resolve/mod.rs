//! From raw tree to resolved [`Spec`], in four jobs, one module each:
//! - `walk.rs`: every key of the tree checked against the registry (unknown keys
//!   with suggestions, renamed keys with a warning), kinds of parts and the task
//!   picked, defaults filled in;
//! - `convert.rs`: one raw value turned into a checked value of its key's type and
//!   range;
//! - `rules.rs`: the rules between keys (and between one task's settings), each
//!   blamed on the location of the value the user wrote;
//! - `assemble.rs`: the checked values put together into the typed [`Spec`];
//! - `maps.rs`: a fog-grid map file found relative to the spec that names it.
//!
//! All problems are collected, not just the first. A value the checks let through
//! that the assembly cannot place is an internal error with a message, never a
//! silently chosen default.

mod assemble;
mod convert;
mod maps;
mod rules;
mod walk;

use std::collections::BTreeMap;

use crate::model::*;
use crate::tree::{Ctx, Loc, SrcKind};
use crate::Origin;

/// A value that passed its key's check: a plain value, or one of the richer types
/// some keys have.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum CheckedValue {
    /// Numbers, switches, text, lists and tables.
    Plain(Value),
    /// `run.budget`.
    Budget(Budget),
    /// `learn.rate`.
    Schedule(Schedule),
    /// `run.stop` (`None`: run the whole budget).
    Stop(Option<StopWhen>),
}

/// A checked value and where it was written (or the `<default>` it came from).
#[derive(Debug, Clone)]
struct Located {
    value: CheckedValue,
    at: Loc,
}

/// What a successful check gives back.
pub(crate) struct Checked {
    pub spec: Spec,
    pub origins: BTreeMap<String, Origin>,
}

struct Checker<'a> {
    cx: &'a mut Ctx,
    /// Checked values by dotted path (`replay.burn_in`, `task.length`).
    vals: BTreeMap<String, Located>,
    /// Whether the spec came from files (so map paths can be looked up).
    files: bool,
    /// Whether any problem was found (counted here: `Ctx` drops repeats of one
    /// problem, which a `[vary]` variant checked again would be).
    failed: bool,
}

/// Check `tree` and build the spec. Problems go to `cx.diags`; `None` if any.
pub(crate) fn check(
    cx: &mut Ctx,
    tree: &crate::tree::Table,
    default_name: &str,
    files: bool,
) -> Option<Checked> {
    let mut c = Checker {
        cx,
        vals: BTreeMap::new(),
        files,
        failed: false,
    };
    c.walk(tree, "");
    c.fill_defaults(tree);
    let settings = c.rules();
    if c.failed {
        return None;
    }
    let spec = c.assemble(default_name, settings);
    if c.failed {
        return None;
    }
    let spec = spec?;
    let mut origins = BTreeMap::new();
    for (path, got) in &c.vals {
        origins.insert(path.clone(), c.origin(&got.at));
    }
    origins.entry("name".into()).or_insert(Origin::Default);
    origins
        .entry("agent.previous_action_reward".into())
        .or_insert(Origin::Default);
    Some(Checked { spec, origins })
}

fn join(prefix: &str, k: &str) -> String {
    if prefix.is_empty() {
        k.to_string()
    } else {
        format!("{prefix}.{k}")
    }
}

fn short(path: &str) -> &str {
    path.rsplit('.').next().unwrap_or(path)
}

impl Checker<'_> {
    fn origin(&self, at: &Loc) -> Origin {
        match self.cx.kind(at) {
            SrcKind::Main(p) => Origin::File {
                path: p.clone(),
                line: self.cx.line(at),
            },
            SrcKind::Preset(p) => Origin::Preset {
                path: p.clone(),
                line: self.cx.line(at),
            },
            SrcKind::Set(a) => Origin::Set(a.clone()),
            SrcKind::Default => Origin::Default,
        }
    }

    fn err(
        &mut self,
        at: &Loc,
        key: &str,
        msg: String,
        expected: Option<String>,
        help: Option<String>,
    ) {
        self.failed = true;
        self.cx.error(at, key, msg, expected, help);
    }

    /// A value the checks should have made impossible: reported as mnemon's own
    /// fault, at the value's location, instead of being replaced by a default.
    fn internal(&mut self, path: &str, msg: String) {
        let at = match self.vals.get(path) {
            Some(g) => g.at.clone(),
            None => Loc { src: 0, span: 0..0 },
        };
        self.err(
            &at,
            path,
            format!("internal error (a bug in mnemon, please report it): {msg}"),
            None,
            None,
        );
    }

    /// A warning with the file:line:col of `at`.
    fn warn(&mut self, at: &Loc, msg: String) {
        let place = self.cx.place(at);
        self.cx.warnings.push(format!("{place}: warning: {msg}"));
    }

    // ---- reading checked values (`None`: absent or of another type) ----

    fn get(&self, p: &str) -> Option<&CheckedValue> {
        self.vals.get(p).map(|g| &g.value)
    }
    fn int(&self, p: &str) -> Option<i64> {
        match self.get(p) {
            Some(CheckedValue::Plain(Value::Int(v))) => Some(*v),
            _ => None,
        }
    }
    fn float(&self, p: &str) -> Option<f64> {
        match self.get(p) {
            Some(CheckedValue::Plain(Value::Float(v))) => Some(*v),
            Some(CheckedValue::Plain(Value::Int(v))) => Some(*v as f64),
            _ => None,
        }
    }
    fn string(&self, p: &str) -> Option<String> {
        match self.get(p) {
            Some(CheckedValue::Plain(Value::Str(v))) => Some(v.clone()),
            _ => None,
        }
    }
    fn ints(&self, p: &str) -> Option<Vec<usize>> {
        match self.get(p) {
            Some(CheckedValue::Plain(Value::List(v))) => v
                .iter()
                .map(|x| match x {
                    Value::Int(i) => Some(*i as usize),
                    _ => None,
                })
                .collect(),
            _ => None,
        }
    }
}
