//! Walking the tree: every key checked against the registry, parts and the task
//! picked by their `kind`, renamed keys read under their new name (with a
//! warning), and defaults filled in for what the spec leaves out.

use super::{join, short, CheckedValue, Checker, Located};
use crate::error::nearest;
use crate::model::Value;
use crate::registry::{self, describe, Key, KeyDefault, Kind, Ty, KEYS};
use crate::tasks;
use crate::tree::{Loc, Node, NodeV, SrcKind, Table};

impl Checker<'_> {
    pub(super) fn walk(&mut self, table: &Table, prefix: &str) {
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
            } else if let Some(new) = registry::renamed(&path) {
                self.renamed(table, prefix, k, new, node);
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

    /// A key under its old name: checked as the new one, with a warning; an error
    /// when the new name is given too.
    fn renamed(&mut self, table: &Table, prefix: &str, old: &str, new: &'static str, node: &Node) {
        let new_short = short(new);
        let old_path = join(prefix, old);
        if table.contains_key(new_short) {
            self.err(
                &node.key_at,
                &old_path,
                format!("`{old_path}` is the old name of `{new}`, and both are given"),
                Some(format!("only {new_short} in [{prefix}]")),
                Some(format!("delete `{old}`")),
            );
            return;
        }
        self.warn(
            &node.key_at,
            format!(
                "`{old_path}` is the old name of `{new}`; it still works, but write `{new_short} = ...` in [{prefix}]"
            ),
        );
        match registry::find(new) {
            Some(key) => self.key(key, new, node),
            None => self.internal(
                new,
                format!("renamed key `{old_path}` points to `{new}`, which is not in the registry"),
            ),
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
                Located {
                    value: v,
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
                        NodeV::Table(mut t) if t.contains_key("kind") => {
                            t.remove("kind").expect("checked just above")
                        }
                        _ => {
                            self.internal(
                                path,
                                format!("the default of `{path}`, {text}, names no kind"),
                            );
                            return;
                        }
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
            Located {
                value: CheckedValue::Plain(Value::Str(kind.name.to_string())),
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
                            Located {
                                value: v,
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
                        self.vals.insert(fpath, Located { value: v, at: d.at });
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
                // Filled in by `assemble.rs` from other keys.
                KeyDefault::Computed(_) => {}
            }
        }
    }

    pub(super) fn fill_defaults(&mut self, tree: &Table) {
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
            let under_old_name = registry::RENAMED
                .iter()
                .any(|(old, new)| *new == key.path && present(old));
            if present(key.path) || under_old_name {
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
}
