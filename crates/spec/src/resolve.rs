//! From raw tree to resolved [`Spec`]: every key checked against the registry
//! (unknown keys with suggestions, types, ranges), defaults filled in, cross-field
//! rules checked with the location of the value to blame, and each value's origin
//! recorded. All problems are collected, not just the first.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use crate::error::nearest;
use crate::model::*;
use crate::registry::{self, describe, Bound, Key, KeyDefault, Kind, Ty, KEYS};
use crate::tasks::{self, Has};
use crate::tree::{Ctx, Loc, Node, NodeV, SrcKind, Table};
use crate::values::{parse_budget, parse_count, parse_schedule, TextError};
use crate::Origin;

/// A checked value of some key.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Typed {
    V(Value),
    Budget(Budget),
    Schedule(Schedule),
    Stop(Option<StopWhen>),
}

#[derive(Debug, Clone)]
struct Got {
    v: Typed,
    at: Loc,
}

/// What a successful check gives back.
pub(crate) struct Checked {
    pub spec: Spec,
    pub origins: BTreeMap<String, Origin>,
}

struct Checker<'a> {
    cx: &'a mut Ctx,
    vals: BTreeMap<String, Got>,
    files: bool,
}

/// Check `tree` and build the spec. Problems go to `cx.diags`; `None` if any.
pub(crate) fn check(
    cx: &mut Ctx,
    tree: &Table,
    default_name: &str,
    files: bool,
) -> Option<Checked> {
    let before = cx.diags.len();
    let mut c = Checker {
        cx,
        vals: BTreeMap::new(),
        files,
    };
    c.walk(tree, "");
    c.fill_defaults(tree);
    let spec = c.build(default_name);
    if c.cx.diags.len() > before {
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
        self.cx.error(at, key, msg, expected, help);
    }

    fn walk(&mut self, table: &Table, prefix: &str) {
        for (k, node) in table {
            let path = join(prefix, k);
            if prefix.is_empty() && k == "vary" {
                continue; // checked by `vary.rs`
            }
            if prefix.is_empty() && k == "extends" {
                self.err(
                    &node.key_at,
                    "extends",
                    "`extends` can only be used in a spec file, not in a stored spec or a --set"
                        .into(),
                    None,
                    None,
                );
                continue;
            }
            if let Some(key) = registry::find(&path) {
                self.key(key, &path, node);
            } else if registry::is_section(&path) {
                match &node.v {
                    NodeV::Table(t) => self.walk(t, &path),
                    other => self.err(
                        &node.at,
                        &path,
                        format!(
                            "`{path}` is a section, so it must be a table, got {}",
                            other.type_name()
                        ),
                        Some(format!("a table like [{path}]")),
                        None,
                    ),
                }
            } else {
                self.unknown(prefix, k, node);
            }
        }
    }

    fn unknown(&mut self, prefix: &str, k: &str, node: &Node) {
        let path = join(prefix, k);
        let cands = registry::children(prefix);
        let help = nearest(k, cands.iter().copied())
            .map(|c| format!("did you mean \"{c}\"?"))
            .or_else(|| {
                let elsewhere = registry::paths_ending_in(k);
                elsewhere
                    .first()
                    .map(|p| format!("`{k}` is a key of another section: write it as {p}"))
            });
        let place = if prefix.is_empty() {
            "at the top level".to_string()
        } else {
            format!("in [{prefix}]")
        };
        self.err(
            &node.key_at,
            &path,
            format!("unknown key `{k}` {place}"),
            Some(format!("one of: {}", cands.join(", "))),
            help,
        );
    }

    fn key(&mut self, key: &Key, path: &str, node: &Node) {
        if let Ty::Part(kinds) = key.ty {
            self.part(key, path, node, kinds);
            return;
        }
        if let Some(v) = self.convert(&key.ty, path, node) {
            self.vals.insert(
                path.to_string(),
                Got {
                    v,
                    at: node.at.clone(),
                },
            );
        }
    }

    /// A default value as a node in its own `<default>` source.
    fn default_node(&mut self, text: &str) -> Node {
        let src = self
            .cx
            .add_source("<default>".into(), text.to_string(), SrcKind::Default);
        let loc = Loc {
            src,
            span: 0..text.len(),
        };
        self.cx.parse_value(src, 0..text.len(), loc)
    }

    fn part(&mut self, key: &Key, path: &str, node: &Node, kinds: &'static [Kind]) {
        let what = if path == "task" { "task" } else { short(path) };
        let mut table = match &node.v {
            NodeV::Str(_) => {
                // Shorthand: `memory = "none"` means `memory = { kind = "none" }`.
                let mut t = Table::new();
                t.insert("kind".into(), node.clone());
                t
            }
            NodeV::Table(t) => t.clone(),
            other => {
                self.err(
                    &node.at,
                    path,
                    format!(
                        "`{path}` must be a table with a kind, got {}",
                        other.type_name()
                    ),
                    Some(describe(&key.ty)),
                    None,
                );
                return;
            }
        };
        let kind_node = match table.remove("kind") {
            Some(n) => n,
            None => match key.default {
                KeyDefault::Value(text) => {
                    let d = self.default_node(text);
                    match d.v {
                        NodeV::Table(mut t) => match t.remove("kind") {
                            Some(k) => k,
                            None => return,
                        },
                        _ => return,
                    }
                }
                _ => {
                    let names: Vec<&str> = kinds.iter().map(|k| k.name).collect();
                    let at = if path == "task" {
                        &node.key_at
                    } else {
                        &node.at
                    };
                    self.err(
                        at,
                        &format!("{path}.kind"),
                        format!("[{path}] needs a `kind`"),
                        Some(format!("kind = one of {}", names.join(", "))),
                        None,
                    );
                    return;
                }
            },
        };
        let NodeV::Str(kind_name) = &kind_node.v else {
            self.err(
                &kind_node.at,
                &format!("{path}.kind"),
                format!(
                    "{path}.kind must be a string, got {}",
                    kind_node.v.type_name()
                ),
                Some(describe(&key.ty)),
                None,
            );
            return;
        };
        let Some(kind) = kinds.iter().find(|k| k.name == kind_name) else {
            let names: Vec<&str> = kinds.iter().map(|k| k.name).collect();
            let help =
                nearest(kind_name, names.iter().copied()).map(|n| format!("did you mean \"{n}\"?"));
            self.err(
                &kind_node.at,
                &format!("{path}.kind"),
                format!("unknown {what} kind \"{kind_name}\""),
                Some(format!("one of {}", names.join(", "))),
                help,
            );
            return;
        };
        self.vals.insert(
            format!("{path}.kind"),
            Got {
                v: Typed::V(Value::Str(kind.name.to_string())),
                at: kind_node.at.clone(),
            },
        );
        for (f, n) in &table {
            let fpath = join(path, f);
            match kind.fields.iter().find(|k| k.path == f) {
                Some(fk) => {
                    if let Some(v) = self.convert(&fk.ty, &fpath, n) {
                        self.vals.insert(
                            fpath,
                            Got {
                                v,
                                at: n.at.clone(),
                            },
                        );
                    }
                }
                None => {
                    let names: Vec<&str> = kind.fields.iter().map(|k| k.path).collect();
                    let help = nearest(f, names.iter().copied())
                        .map(|c| format!("did you mean \"{c}\"?"))
                        .or_else(|| {
                            // A top-level key written after the [task] header.
                            (path == "task" && registry::children("").contains(&f.as_str()))
                                .then(|| format!("`{f}` is a top-level key: put it before [task]"))
                        })
                        .or_else(|| {
                            // A setting of another kind of the same part.
                            kinds
                                .iter()
                                .find(|k| k.fields.iter().any(|x| x.path == f))
                                .map(|k| {
                                    format!("`{f}` is a setting of {what} kind \"{}\"", k.name)
                                })
                        });
                    let known = if names.is_empty() {
                        format!("{what} kind \"{}\" has no settings besides kind", kind.name)
                    } else {
                        format!(
                            "settings of {what} kind \"{}\": {}",
                            kind.name,
                            names.join(", ")
                        )
                    };
                    self.err(
                        &n.key_at,
                        &fpath,
                        format!("unknown setting `{f}` for {what} kind \"{}\"", kind.name),
                        Some(known),
                        help,
                    );
                }
            }
        }
        for fk in kind.fields {
            if table.contains_key(fk.path) {
                continue;
            }
            let fpath = join(path, fk.path);
            match fk.default {
                KeyDefault::Value(text) => {
                    let d = self.default_node(text);
                    if let Some(v) = self.convert(&fk.ty, &fpath, &d) {
                        self.vals.insert(fpath, Got { v, at: d.at });
                    }
                }
                KeyDefault::Required => self.err(
                    &kind_node.at,
                    &fpath,
                    format!(
                        "{what} kind \"{}\" needs `{}`: {}",
                        kind.name, fk.path, fk.doc
                    ),
                    Some(format!("{} = {}", fk.path, describe(&fk.ty))),
                    None,
                ),
                KeyDefault::Computed(_) => {}
            }
        }
    }

    fn fill_defaults(&mut self, tree: &Table) {
        for key in KEYS {
            let present = |path: &str| -> bool {
                let mut t = tree;
                let parts: Vec<&str> = path.split('.').collect();
                for (i, p) in parts.iter().enumerate() {
                    match t.get(*p) {
                        Some(n) if i + 1 == parts.len() => {
                            let _ = n;
                            return true;
                        }
                        Some(Node {
                            v: NodeV::Table(inner),
                            ..
                        }) => t = inner,
                        _ => return false,
                    }
                }
                false
            };
            if present(key.path) {
                continue;
            }
            match key.default {
                KeyDefault::Value(text) => {
                    let d = self.default_node(text);
                    self.key(key, key.path, &d);
                }
                KeyDefault::Required => {
                    // Only the task is required; point at the top of the main file.
                    let at = Loc { src: 0, span: 0..0 };
                    let names: Vec<&str> = tasks::TASK_KINDS.iter().map(|k| k.name).collect();
                    self.err(
                        &at,
                        key.path,
                        format!("the spec has no [{}] section", key.path),
                        Some(format!(
                            "[{}] with kind = one of {}",
                            key.path,
                            names.join(", ")
                        )),
                        None,
                    );
                }
                KeyDefault::Computed(_) => {}
            }
        }
    }

    // ---- conversion of one value ------------------------------------------------

    fn bad_type(&mut self, path: &str, ty: &Ty, node: &Node) {
        let hint = match (&node.v, ty) {
            (NodeV::Str(s), Ty::Float { .. } | Ty::Int { .. })
                if s.trim().parse::<f64>().is_ok() =>
            {
                Some("write numbers without quotes".to_string())
            }
            _ => None,
        };
        self.err(
            &node.at,
            path,
            format!(
                "{path} must be {}, got {}",
                describe(ty),
                node.v.type_name()
            ),
            Some(format!("expected {}", describe(ty))),
            hint,
        );
    }

    fn out_of_range(&mut self, path: &str, ty: &Ty, node: &Node, got: String) {
        self.err(
            &node.at,
            path,
            format!("{path} is out of range: got {got}"),
            Some(format!("expected {}", describe(ty))),
            None,
        );
    }

    /// The location of bytes `r` of a string node's content (inside the quotes).
    fn inner(&self, node: &Node, s: &str, r: std::ops::Range<usize>) -> Loc {
        let raw = self.cx.text(&node.at);
        let start = node.at.span.start;
        if raw.len() >= 2
            && (raw.starts_with('"') || raw.starts_with('\''))
            && &raw[1..raw.len() - 1] == s
        {
            return Loc {
                src: node.at.src,
                span: start + 1 + r.start..start + 1 + r.end,
            };
        }
        if raw == s {
            return Loc {
                src: node.at.src,
                span: start + r.start..start + r.end,
            };
        }
        node.at.clone()
    }

    fn text_err(&mut self, path: &str, ty: &Ty, node: &Node, s: &str, e: TextError) {
        let at = self.inner(node, s, e.at);
        self.err(
            &at,
            path,
            format!("{path}: {}", e.message),
            Some(format!("expected {}", describe(ty))),
            None,
        );
    }

    fn convert(&mut self, ty: &Ty, path: &str, node: &Node) -> Option<Typed> {
        match ty {
            Ty::Int { min, max } => {
                let v = match &node.v {
                    NodeV::Int(i) => *i,
                    NodeV::Float(f) if f.fract() == 0.0 && f.abs() < 9e15 => *f as i64,
                    NodeV::Str(s) => match parse_count(s) {
                        Ok(v) if v <= i64::MAX as u64 => v as i64,
                        Ok(_) => {
                            self.out_of_range(path, ty, node, s.clone());
                            return None;
                        }
                        Err(e) => {
                            self.text_err(path, ty, node, s, e);
                            return None;
                        }
                    },
                    _ => {
                        self.bad_type(path, ty, node);
                        return None;
                    }
                };
                if v < *min || v > *max {
                    self.out_of_range(path, ty, node, v.to_string());
                    return None;
                }
                Some(Typed::V(Value::Int(v)))
            }
            Ty::Float { lo, hi } => {
                let v = match &node.v {
                    NodeV::Int(i) => *i as f64,
                    NodeV::Float(f) => *f,
                    _ => {
                        self.bad_type(path, ty, node);
                        return None;
                    }
                };
                if !in_bounds(v, lo, hi) {
                    self.out_of_range(path, ty, node, crate::values::float_text(v));
                    return None;
                }
                Some(Typed::V(Value::Float(v)))
            }
            Ty::Bool => match &node.v {
                NodeV::Bool(b) => Some(Typed::V(Value::Bool(*b))),
                _ => {
                    self.bad_type(path, ty, node);
                    None
                }
            },
            Ty::Str => match &node.v {
                NodeV::Str(s) if !s.trim().is_empty() => Some(Typed::V(Value::Str(s.clone()))),
                NodeV::Str(_) => {
                    self.err(
                        &node.at,
                        path,
                        format!("{path} must not be empty"),
                        None,
                        None,
                    );
                    None
                }
                _ => {
                    self.bad_type(path, ty, node);
                    None
                }
            },
            Ty::Name => match &node.v {
                NodeV::Str(s)
                    if !s.is_empty()
                        && !s.starts_with('.')
                        && s.chars()
                            .all(|c| c.is_ascii_alphanumeric() || "-_.".contains(c)) =>
                {
                    Some(Typed::V(Value::Str(s.clone())))
                }
                NodeV::Str(s) => {
                    self.err(
                        &node.at,
                        path,
                        format!("{path} {s:?} cannot be used as a folder name"),
                        Some(format!("expected {}", describe(ty))),
                        None,
                    );
                    None
                }
                _ => {
                    self.bad_type(path, ty, node);
                    None
                }
            },
            Ty::Choice(choices) => match &node.v {
                NodeV::Str(s) if choices.contains(&s.as_str()) => {
                    Some(Typed::V(Value::Str(s.clone())))
                }
                NodeV::Str(s) => {
                    let help = nearest(s, choices.iter().copied())
                        .map(|c| format!("did you mean \"{c}\"?"));
                    self.err(
                        &node.at,
                        path,
                        format!("{path}: \"{s}\" is not a choice"),
                        Some(format!("expected {}", describe(ty))),
                        help,
                    );
                    None
                }
                _ => {
                    self.bad_type(path, ty, node);
                    None
                }
            },
            Ty::IntList { min, max, min_len } => {
                let NodeV::Array(items) = &node.v else {
                    self.bad_type(path, ty, node);
                    return None;
                };
                if items.len() < *min_len {
                    self.err(
                        &node.at,
                        path,
                        format!("{path} needs at least {min_len} entries"),
                        Some(format!("expected {}", describe(ty))),
                        None,
                    );
                    return None;
                }
                let mut out = Vec::new();
                let mut ok = true;
                for item in items {
                    match &item.v {
                        NodeV::Int(i) if i >= min && i <= max => out.push(Value::Int(*i)),
                        NodeV::Int(i) => {
                            self.err(
                                &item.at,
                                path,
                                format!("{path}: entry {i} is out of range"),
                                Some(format!("expected integers in {min}..={max}")),
                                None,
                            );
                            ok = false;
                        }
                        other => {
                            self.err(
                                &item.at,
                                path,
                                format!(
                                    "{path}: entries must be integers, got {}",
                                    other.type_name()
                                ),
                                Some(format!("expected {}", describe(ty))),
                                None,
                            );
                            ok = false;
                        }
                    }
                }
                ok.then_some(Typed::V(Value::List(out)))
            }
            Ty::StrList => {
                let NodeV::Array(items) = &node.v else {
                    self.bad_type(path, ty, node);
                    return None;
                };
                if items.is_empty() {
                    self.err(
                        &node.at,
                        path,
                        format!("{path} must not be empty"),
                        Some(format!("expected {}", describe(ty))),
                        None,
                    );
                    return None;
                }
                let mut out = Vec::new();
                for item in items {
                    match &item.v {
                        NodeV::Str(s) => out.push(Value::Str(s.clone())),
                        other => {
                            self.err(
                                &item.at,
                                path,
                                format!(
                                    "{path}: entries must be strings, got {}",
                                    other.type_name()
                                ),
                                Some(format!("expected {}", describe(ty))),
                                None,
                            );
                            return None;
                        }
                    }
                }
                Some(Typed::V(Value::List(out)))
            }
            Ty::AnyTable => match &node.v {
                NodeV::Table(_) => Some(Typed::V(any_value(node))),
                _ => {
                    self.bad_type(path, ty, node);
                    None
                }
            },
            Ty::Budget => {
                let b = match &node.v {
                    NodeV::Int(i) if *i > 0 => Budget::Steps(*i as u64),
                    NodeV::Str(s) => match parse_budget(s) {
                        Ok(b) => b,
                        Err(e) => {
                            self.text_err(path, ty, node, s, e);
                            return None;
                        }
                    },
                    NodeV::Int(i) => {
                        self.out_of_range(path, ty, node, i.to_string());
                        return None;
                    }
                    _ => {
                        self.bad_type(path, ty, node);
                        return None;
                    }
                };
                let positive = match b {
                    Budget::Steps(n) => n > 0,
                    Budget::Seconds(s) => s > 0.0 && s.is_finite(),
                };
                if !positive {
                    self.out_of_range(path, ty, node, self.cx.text(&node.at).to_string());
                    return None;
                }
                Some(Typed::Budget(b))
            }
            Ty::Schedule => {
                let s = match &node.v {
                    NodeV::Int(i) => Schedule::Constant(*i as f64),
                    NodeV::Float(f) => Schedule::Constant(*f),
                    NodeV::Str(s) => match parse_schedule(s) {
                        Ok(v) => v,
                        Err(e) => {
                            self.text_err(path, ty, node, s, e);
                            return None;
                        }
                    },
                    _ => {
                        self.bad_type(path, ty, node);
                        return None;
                    }
                };
                let values: Vec<f64> = match &s {
                    Schedule::Constant(v) => vec![*v],
                    Schedule::Ramp { from, to, .. } => vec![*from, *to],
                    Schedule::Points(p) => p.iter().map(|(_, v)| *v).collect(),
                };
                if values.iter().any(|v| !(v.is_finite() && *v > 0.0)) {
                    self.err(
                        &node.at,
                        path,
                        format!("{path}: every value of the schedule must be > 0"),
                        Some(format!("expected {}", describe(ty))),
                        None,
                    );
                    return None;
                }
                Some(Typed::Schedule(s))
            }
            Ty::Stop => {
                let NodeV::Table(t) = &node.v else {
                    self.bad_type(path, ty, node);
                    return None;
                };
                if t.is_empty() {
                    return Some(Typed::Stop(None));
                }
                if t.len() > 1 {
                    self.err(
                        &node.at,
                        path,
                        format!("{path} takes one condition, got {}", t.len()),
                        Some(format!("expected {}", describe(ty))),
                        None,
                    );
                    return None;
                }
                let (k, n) = t.iter().next().expect("one entry");
                let v = match &n.v {
                    NodeV::Int(i) => *i as f64,
                    NodeV::Float(f) if f.is_finite() => *f,
                    _ => {
                        self.err(
                            &n.at,
                            path,
                            format!("{path}.{k} must be a number, got {}", n.v.type_name()),
                            Some("expected a number".into()),
                            None,
                        );
                        return None;
                    }
                };
                match k.as_str() {
                    "success" if (0.0..=1.0).contains(&v) => {
                        Some(Typed::Stop(Some(StopWhen::Success(v))))
                    }
                    "success" => {
                        self.err(
                            &n.at,
                            path,
                            format!("{path}.success is a rate, got {v}"),
                            Some("expected a number in [0, 1]".into()),
                            None,
                        );
                        None
                    }
                    "return" => Some(Typed::Stop(Some(StopWhen::Return(v)))),
                    other => {
                        let help = nearest(other, ["success", "return"])
                            .map(|c| format!("did you mean \"{c}\"?"));
                        self.err(
                            &n.key_at,
                            path,
                            format!("unknown stop condition `{other}`"),
                            Some("expected success or return".into()),
                            help,
                        );
                        None
                    }
                }
            }
            Ty::Part(_) => None,
        }
    }

    // ---- building the spec --------------------------------------------------------

    fn get(&self, p: &str) -> Option<&Typed> {
        self.vals.get(p).map(|g| &g.v)
    }
    fn int(&self, p: &str) -> Option<i64> {
        match self.get(p) {
            Some(Typed::V(Value::Int(v))) => Some(*v),
            _ => None,
        }
    }
    fn float(&self, p: &str) -> Option<f64> {
        match self.get(p) {
            Some(Typed::V(Value::Float(v))) => Some(*v),
            Some(Typed::V(Value::Int(v))) => Some(*v as f64),
            _ => None,
        }
    }
    fn string(&self, p: &str) -> Option<String> {
        match self.get(p) {
            Some(Typed::V(Value::Str(v))) => Some(v.clone()),
            _ => None,
        }
    }
    fn ints(&self, p: &str) -> Option<Vec<usize>> {
        match self.get(p) {
            Some(Typed::V(Value::List(v))) => v
                .iter()
                .map(|x| match x {
                    Value::Int(i) => Some(*i as usize),
                    _ => None,
                })
                .collect(),
            _ => None,
        }
    }

    /// The location to blame for a broken rule among `paths`: the first value the
    /// user wrote, else the first path's.
    fn blame(&self, paths: &[&str]) -> (Loc, String) {
        // The most recent layer wins: --set, then the spec file, then presets.
        let rank = |p: &str| match self.vals.get(p).map(|g| self.cx.kind(&g.at)) {
            Some(SrcKind::Set(_)) => 3,
            Some(SrcKind::Main(_)) => 2,
            Some(SrcKind::Preset(_)) => 1,
            _ => 0,
        };
        let mut best: Option<&str> = None;
        for p in paths {
            if self.vals.contains_key(*p) && best.is_none_or(|b| rank(p) > rank(b)) {
                best = Some(p);
            }
        }
        match best.and_then(|p| self.vals.get(p).map(|g| (g.at.clone(), p.to_string()))) {
            Some(x) => x,
            None => (Loc { src: 0, span: 0..0 }, paths[0].to_string()),
        }
    }

    fn rule(&mut self, paths: &[&str], msg: String, expected: Option<String>) {
        let (at, key) = self.blame(paths);
        self.err(&at, &key, msg, expected, None);
    }

    fn build(&mut self, default_name: &str) -> Option<Spec> {
        // Cross-field rules first, each only when its inputs are valid.
        let task_kind = self.string("task.kind");
        let mut settings = BTreeMap::new();
        if let Some(kind) = &task_kind {
            for (p, g) in &self.vals {
                if let Some(f) = p.strip_prefix("task.") {
                    if f != "kind" {
                        if let Typed::V(v) = &g.v {
                            settings.insert(f.to_string(), v.clone());
                        }
                    }
                }
            }
            for (field, msg) in tasks::rules(kind, &mut settings) {
                let p = format!("task.{field}");
                self.rule(&[p.as_str()], msg, None);
            }
            if kind == "fog-grid" {
                self.fog_grid_map(&mut settings);
            }
        }

        if let (Some(b), Some(n), Some(s)) = (
            self.int("replay.burn_in"),
            self.int("learn.n_step"),
            self.int("replay.sequence"),
        ) {
            if b + 1 + n > s {
                self.rule(
                    &["replay.burn_in", "learn.n_step", "replay.sequence"],
                    format!(
                        "replay.burn_in ({b}) + 1 learned step + learn.n_step ({n}) = {} does not fit in replay.sequence ({s})",
                        b + 1 + n
                    ),
                    Some("burn_in + 1 + n_step <= sequence".into()),
                );
            }
        }
        if let (Some(o), Some(s)) = (self.int("replay.overlap"), self.int("replay.sequence")) {
            if o >= s {
                self.rule(
                    &["replay.overlap", "replay.sequence"],
                    format!("replay.overlap ({o}) must be less than replay.sequence ({s})"),
                    Some("overlap < sequence".into()),
                );
            }
        }
        if let (Some(c), Some(b), Some(s)) = (
            self.int("replay.capacity"),
            self.int("learn.batch"),
            self.int("replay.sequence"),
        ) {
            if c < b * s {
                self.rule(
                    &["replay.capacity", "learn.batch", "replay.sequence"],
                    format!(
                        "replay.capacity ({c}) cannot hold one batch: learn.batch ({b}) * replay.sequence ({s}) = {}",
                        b * s
                    ),
                    Some("capacity >= batch * sequence".into()),
                );
            }
        }
        if let (Some(w), Some(c)) = (self.int("learn.warmup"), self.int("replay.capacity")) {
            if w > c {
                self.rule(
                    &["learn.warmup", "replay.capacity"],
                    format!("learn.warmup ({w}) exceeds replay.capacity ({c}), so learning would never start"),
                    Some("warmup <= capacity".into()),
                );
            }
        }
        if let (Some(t), Some(kind)) = (self.string("agent.torso.kind"), &task_kind) {
            if t == "conv" && tasks::image(kind) == Has::No {
                self.rule(
                    &["agent.torso.kind"],
                    format!(
                        "a conv torso needs image observations, and task \"{kind}\" gives a vector"
                    ),
                    Some("kind = \"mlp\", or an image task (fog-grid, process)".into()),
                );
            }
        }
        if t_is(&self.string("agent.torso.kind"), "conv") {
            if let (Some(c), Some(k), Some(s)) = (
                self.ints("agent.torso.channels"),
                self.ints("agent.torso.kernels"),
                self.ints("agent.torso.strides"),
            ) {
                if k.len() != c.len() {
                    self.rule(
                        &["agent.torso.kernels", "agent.torso.channels"],
                        format!(
                            "agent.torso.kernels has {} entries but channels has {}",
                            k.len(),
                            c.len()
                        ),
                        Some("one kernel size per conv layer".into()),
                    );
                }
                if s.len() != c.len() {
                    self.rule(
                        &["agent.torso.strides", "agent.torso.channels"],
                        format!(
                            "agent.torso.strides has {} entries but channels has {}",
                            s.len(),
                            c.len()
                        ),
                        Some("one stride per conv layer".into()),
                    );
                }
            }
        }
        let every = self.int("run.eval.every");
        if let (Some(e), Some(n)) = (every, self.int("run.eval.episodes")) {
            if e > 0 && n < 1 {
                self.rule(
                    &["run.eval.episodes"],
                    "run.eval.episodes must be at least 1 when run.eval.every > 0".into(),
                    Some("episodes >= 1".into()),
                );
            }
        }
        let stop = match self.get("run.stop") {
            Some(Typed::Stop(s)) => Some(*s),
            _ => None,
        };
        if let (Some(Some(s)), Some(e)) = (stop, every) {
            if e == 0 {
                self.rule(
                    &["run.stop", "run.eval.every"],
                    "run.stop needs evaluations to watch, but run.eval.every is 0".into(),
                    Some("run.eval.every > 0".into()),
                );
            }
            if let (StopWhen::Success(_), Some(kind)) = (s, &task_kind) {
                if tasks::success(kind) == Has::No {
                    self.rule(
                        &["run.stop"],
                        format!("task \"{kind}\" has no success flag, so `stop = {{ success = .. }}` can never fire"),
                        Some("stop = { return = X } for this task".into()),
                    );
                }
            }
        }

        // Assemble. Any missing value means an error was already recorded.
        let name = self
            .string("name")
            .unwrap_or_else(|| default_name.to_string());
        let memory = match self.string("agent.memory.kind")?.as_str() {
            "lstm" => Memory::Lstm {
                size: self.int("agent.memory.size")? as usize,
            },
            _ => Memory::None,
        };
        let torso = match self.string("agent.torso.kind")?.as_str() {
            "conv" => Torso::Conv {
                channels: self.ints("agent.torso.channels")?,
                kernels: self.ints("agent.torso.kernels")?,
                strides: self.ints("agent.torso.strides")?,
                out: self.int("agent.torso.out")? as usize,
            },
            _ => Torso::Mlp {
                layers: self.ints("agent.torso.layers")?,
                activation: match self.string("agent.torso.activation")?.as_str() {
                    "tanh" => Activation::Tanh,
                    _ => Activation::Relu,
                },
            },
        };
        let head = match self.string("agent.head.kind")?.as_str() {
            "dueling" => Head::Dueling,
            "quantile" => Head::Quantile {
                quantiles: self.int("agent.head.quantiles")? as usize,
                kappa: self.float("agent.head.kappa")?,
            },
            _ => Head::Value,
        };
        let previous_action_reward = match self.get("agent.previous_action_reward") {
            Some(Typed::V(Value::Bool(b))) => *b,
            _ => matches!(memory, Memory::Lstm { .. }),
        };
        let rate = match self.get("learn.rate")? {
            Typed::Schedule(s) => s.clone(),
            _ => return None,
        };
        let budget = match self.get("run.budget")? {
            Typed::Budget(b) => *b,
            _ => return None,
        };
        Some(Spec {
            name,
            task: TaskSpec {
                kind: task_kind?,
                settings,
            },
            agent: AgentSpec {
                torso,
                memory,
                head,
                previous_action_reward,
            },
            acting: ActingSpec {
                actors: self.int("acting.actors")? as usize,
                lanes: self.int("acting.lanes")? as usize,
                epsilon_base: self.float("acting.epsilon.base")?,
                epsilon_spread: self.float("acting.epsilon.spread")?,
                refresh: self.int("acting.refresh")? as u64,
            },
            replay: ReplaySpec {
                capacity: self.int("replay.capacity")? as u64,
                sequence: self.int("replay.sequence")? as usize,
                overlap: self.int("replay.overlap")? as usize,
                burn_in: self.int("replay.burn_in")? as usize,
                start_state: match self.string("replay.start_state")?.as_str() {
                    "zero" => StartState::Zero,
                    _ => StartState::Stored,
                },
                priority_exponent: self.float("replay.priority.exponent")?,
                priority_correction: self.float("replay.priority.correction")?,
                priority_mix: self.float("replay.priority.mix")?,
            },
            learn: LearnSpec {
                discount: self.float("learn.discount")?,
                n_step: self.int("learn.n_step")? as usize,
                batch: self.int("learn.batch")? as usize,
                rate,
                adam_epsilon: self.float("learn.adam_epsilon")?,
                clip: self.float("learn.clip")?,
                target_every: self.int("learn.target_every")? as u64,
                rescale: self.float("learn.rescale")?,
                warmup: self.int("learn.warmup")? as u64,
                replay_ratio: self.float("learn.replay_ratio")?,
                loss: match self.string("learn.loss")?.as_str() {
                    "huber" => TdLoss::Huber,
                    _ => TdLoss::Squared,
                },
            },
            run: RunSpec {
                budget,
                seed: self.int("run.seed")? as u64,
                checkpoint_every: self.int("run.checkpoint_every")? as u64,
                eval_every: self.int("run.eval.every")? as u64,
                eval_episodes: self.int("run.eval.episodes")? as usize,
                stop: stop?,
                out: self.string("run.out")?,
            },
        })
    }

    /// A fog-grid map given as a path is read relative to the spec that names it.
    fn fog_grid_map(&mut self, settings: &mut BTreeMap<String, Value>) {
        let Some(Value::Str(map)) = settings.get("map").cloned() else {
            return;
        };
        if tasks::FOG_GRID_MAPS.contains(&map.as_str()) || !self.files {
            return;
        }
        let Some(g) = self.vals.get("task.map").cloned() else {
            return;
        };
        let base: Option<PathBuf> = match self.cx.kind(&g.at) {
            SrcKind::Main(p) | SrcKind::Preset(p) => p.parent().map(Path::to_path_buf),
            _ => None,
        };
        let full = match base {
            Some(b) if Path::new(&map).is_relative() => b.join(&map),
            _ => PathBuf::from(&map),
        };
        if !full.is_file() {
            self.err(
                &g.at,
                "task.map",
                format!("fog-grid map file {} does not exist", full.display()),
                Some("a built-in map name or a path relative to this spec".into()),
                None,
            );
            return;
        }
        settings.insert("map".into(), Value::Str(full.display().to_string()));
    }
}

fn t_is(v: &Option<String>, s: &str) -> bool {
    v.as_deref() == Some(s)
}

fn in_bounds(v: f64, lo: &Option<Bound>, hi: &Option<Bound>) -> bool {
    if !v.is_finite() {
        return false;
    }
    let lo_ok = match lo {
        Some(b) if b.inclusive => v >= b.value,
        Some(b) => v > b.value,
        None => true,
    };
    let hi_ok = match hi {
        Some(b) if b.inclusive => v <= b.value,
        Some(b) => v < b.value,
        None => true,
    };
    lo_ok && hi_ok
}

/// Any raw value as a task setting value (free-form tables of process tasks).
fn any_value(n: &Node) -> Value {
    match &n.v {
        NodeV::Str(s) => Value::Str(s.clone()),
        NodeV::Int(i) => Value::Int(*i),
        NodeV::Float(f) => Value::Float(*f),
        NodeV::Bool(b) => Value::Bool(*b),
        NodeV::Datetime(d) => Value::Str(d.clone()),
        NodeV::Array(items) => Value::List(items.iter().map(any_value).collect()),
        NodeV::Table(t) => Value::Table(t.iter().map(|(k, v)| (k.clone(), any_value(v))).collect()),
    }
}
