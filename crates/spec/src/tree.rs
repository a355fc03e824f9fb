//! The raw layer (habit 4 of STYLE.md): spec text parsed into a tree of values that
//! remember where each came from (source and byte span), `extends` chains merged,
//! and `--set` overrides inserted. Nothing here knows what a key means; `resolve/`
//! checks the tree against the registry.

use std::collections::BTreeMap;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use toml::de::{DeTable, DeValue};

use crate::error::{line_col, Diagnostic, Errors, SourceText};

/// What kind of input a source is; decides a value's [`crate::Origin`].
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum SrcKind {
    /// The spec file named on the command line (or a stored spec).
    Main(PathBuf),
    /// A file reached through `extends`.
    Preset(PathBuf),
    /// One `--set` argument (or a command-line axis value).
    Set(String),
    /// A built-in default.
    Default,
}

/// Location of a value or key: source index and byte span.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Loc {
    pub src: usize,
    pub span: Range<usize>,
}

/// One value of the raw tree.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Node {
    pub v: NodeV,
    /// Where the value is.
    pub at: Loc,
    /// Where its key is (same as `at` for array items and roots).
    pub key_at: Loc,
}

/// The value itself.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum NodeV {
    Str(String),
    Int(i64),
    Float(f64),
    Bool(bool),
    Datetime(String),
    Array(Vec<Node>),
    Table(Table),
}

pub(crate) type Table = BTreeMap<String, Node>;

impl NodeV {
    /// The word used in "expected X, got Y".
    pub fn type_name(&self) -> &'static str {
        match self {
            NodeV::Str(_) => "a string",
            NodeV::Int(_) => "an integer",
            NodeV::Float(_) => "a float",
            NodeV::Bool(_) => "a boolean",
            NodeV::Datetime(_) => "a date-time",
            NodeV::Array(_) => "a list",
            NodeV::Table(_) => "a table",
        }
    }
}

/// Loader state: every source seen and every diagnostic raised so far.
#[derive(Debug, Clone, Default)]
pub(crate) struct Ctx {
    pub sources: Vec<(Arc<SourceText>, SrcKind)>,
    pub diags: Vec<Diagnostic>,
    /// Problems that do not stop loading (a key under its old name), each starting
    /// with file:line:col.
    pub warnings: Vec<String>,
}

impl Ctx {
    pub fn add_source(&mut self, name: String, text: String, kind: SrcKind) -> usize {
        self.sources
            .push((Arc::new(SourceText { name, text }), kind));
        self.sources.len() - 1
    }

    /// Record a problem at `loc`.
    pub fn error(
        &mut self,
        loc: &Loc,
        key: &str,
        message: impl Into<String>,
        expected: Option<String>,
        help: Option<String>,
    ) {
        let (src, _) = &self.sources[loc.src];
        let (line, col) = line_col(&src.text, loc.span.start);
        let d = Diagnostic {
            file: src.name.clone(),
            line,
            col,
            key: key.to_string(),
            message: message.into(),
            expected,
            help,
            span: loc.span.clone(),
            source: Some(loc.src),
        };
        if !self.diags.contains(&d) {
            self.diags.push(d);
        }
    }

    /// A problem with no source text (an unreadable file).
    pub fn error_no_text(&mut self, file: &str, message: String) {
        self.diags.push(Diagnostic {
            file: file.to_string(),
            line: 1,
            col: 1,
            key: String::new(),
            message,
            expected: None,
            help: None,
            span: 0..0,
            source: None,
        });
    }

    pub fn kind(&self, loc: &Loc) -> &SrcKind {
        &self.sources[loc.src].1
    }

    pub fn text(&self, loc: &Loc) -> &str {
        let t = &self.sources[loc.src].0.text;
        let s = loc.span.start.min(t.len());
        let e = loc.span.end.clamp(s, t.len());
        t.get(s..e).unwrap_or("")
    }

    pub fn line(&self, loc: &Loc) -> usize {
        line_col(&self.sources[loc.src].0.text, loc.span.start).0
    }

    /// `name:line:col` of a location (`--set` and defaults have one line).
    pub fn place(&self, loc: &Loc) -> String {
        let src = &self.sources[loc.src].0;
        let (line, col) = line_col(&src.text, loc.span.start);
        format!("{}:{line}:{col}", src.name)
    }

    /// The errors so far, with the sources needed to render them.
    pub fn errors(&self) -> Errors {
        // In reading order: files first (as loaded), then --set arguments.
        let mut diagnostics = self.diags.clone();
        diagnostics.sort_by_key(|d| (d.source.unwrap_or(0), d.span.start));
        Errors {
            diagnostics,
            sources: self.sources.iter().map(|(s, _)| s.clone()).collect(),
        }
    }

    /// Parse a whole document held in source `src`; syntax errors are recorded.
    pub fn parse_document(&mut self, src: usize) -> Option<Table> {
        let text = self.sources[src].0.text.clone();
        let (doc, errs) = DeTable::parse_recoverable(&text);
        if !errs.is_empty() {
            for e in errs {
                let span = e.span().unwrap_or(0..0);
                self.error(
                    &Loc { src, span },
                    "",
                    format!("TOML syntax error: {}", e.message().trim()),
                    None,
                    None,
                );
            }
            return None;
        }
        let span = doc.span();
        let root = Loc { src, span };
        let mut table = Table::new();
        for (k, v) in doc.get_ref().iter() {
            let key_at = Loc {
                src,
                span: k.span(),
            };
            if let Some(n) = self.convert(v.get_ref(), v.span(), key_at, src, 0) {
                table.insert(k.get_ref().to_string(), n);
            }
        }
        let _ = root;
        Some(table)
    }

    /// Parse one value written on the command line (`--set a.b=VALUE`): TOML if it
    /// reads as TOML, else the bare text as a string.
    pub fn parse_value(&mut self, src: usize, at: Range<usize>, key_at: Loc) -> Node {
        let text = self.sources[src].0.text.clone();
        let raw = &text[at.clone()];
        if let Ok(v) = DeValue::parse(raw) {
            let span = v.span();
            let shifted = at.start + span.start..at.start + span.end;
            let mut n = self
                .convert(v.get_ref(), shifted, key_at.clone(), src, at.start)
                .unwrap_or_else(|| Node {
                    v: NodeV::Str(raw.to_string()),
                    at: Loc {
                        src,
                        span: at.clone(),
                    },
                    key_at: key_at.clone(),
                });
            n.key_at = key_at;
            return n;
        }
        Node {
            v: NodeV::Str(raw.trim().to_string()),
            at: Loc { src, span: at },
            key_at,
        }
    }

    fn convert(
        &mut self,
        v: &DeValue<'_>,
        span: Range<usize>,
        key_at: Loc,
        src: usize,
        shift: usize,
    ) -> Option<Node> {
        let at = Loc {
            src,
            span: span.clone(),
        };
        let v = match v {
            DeValue::String(s) => NodeV::Str(s.to_string()),
            DeValue::Integer(i) => {
                match i64::from_str_radix(&i.as_str().replace('_', ""), i.radix()) {
                    Ok(n) => NodeV::Int(n),
                    Err(_) => {
                        self.error(&at, "", "integer out of range", None, None);
                        return None;
                    }
                }
            }
            DeValue::Float(f) => match f.as_str().replace('_', "").parse::<f64>() {
                Ok(x) => NodeV::Float(x),
                Err(_) => {
                    self.error(&at, "", "unreadable number", None, None);
                    return None;
                }
            },
            DeValue::Boolean(b) => NodeV::Bool(*b),
            DeValue::Datetime(d) => NodeV::Datetime(d.to_string()),
            DeValue::Array(items) => {
                let mut out = Vec::new();
                for item in items.iter() {
                    let s = item.span();
                    let s = s.start + shift..s.end + shift;
                    let item_at = Loc {
                        src,
                        span: s.clone(),
                    };
                    out.push(self.convert(item.get_ref(), s, item_at, src, shift)?);
                }
                NodeV::Array(out)
            }
            DeValue::Table(t) => {
                let mut out = Table::new();
                for (k, item) in t.iter() {
                    let ks = k.span();
                    let k_at = Loc {
                        src,
                        span: ks.start + shift..ks.end + shift,
                    };
                    let s = item.span();
                    let s = s.start + shift..s.end + shift;
                    out.insert(
                        k.get_ref().to_string(),
                        self.convert(item.get_ref(), s, k_at, src, shift)?,
                    );
                }
                NodeV::Table(out)
            }
        };
        Some(Node { v, at, key_at })
    }
}

/// The `kind` of a table node, if it has a string one.
pub(crate) fn kind_of(t: &Table) -> Option<&str> {
    match t.get("kind").map(|n| &n.v) {
        Some(NodeV::Str(s)) => Some(s),
        _ => None,
    }
}

/// Deep merge: values of `over` win; tables merge key by key, except that a table
/// whose `kind` changes is replaced whole (a `{ kind = "none" }` memory must not
/// inherit an LSTM's `size`).
pub(crate) fn merge(base: &mut Table, over: Table) {
    for (k, v) in over {
        match base.get_mut(&k) {
            Some(b) => merge_node(b, v),
            None => {
                base.insert(k, v);
            }
        }
    }
}

/// Put `over` onto `base` with the rules of [`merge`].
pub(crate) fn merge_node(base: &mut Node, over: Node) {
    if let (NodeV::Table(bt), NodeV::Table(ot)) = (&mut base.v, &over.v) {
        let changes_kind = match (kind_of(bt), kind_of(ot)) {
            (Some(a), Some(b)) => a != b,
            _ => false,
        };
        if !changes_kind {
            let NodeV::Table(ot) = over.v else {
                return;
            };
            merge(bt, ot);
            base.key_at = over.key_at;
            return;
        }
    }
    *base = over;
}

/// Read and parse `path`, follow its `extends` chain, and return the merged tree.
/// `via` is the location of the `extends` string that led here (None for the root).
pub(crate) fn load_chain(
    cx: &mut Ctx,
    path: &Path,
    via: Option<Loc>,
    chain: &mut Vec<(PathBuf, String)>,
) -> Option<Table> {
    let name = path.display().to_string();
    let text = match std::fs::read(path) {
        Ok(bytes) => match String::from_utf8(bytes) {
            Ok(t) => t,
            Err(_) => {
                match &via {
                    Some(l) => cx.error(
                        l,
                        "extends",
                        format!("{name} is not UTF-8 text"),
                        None,
                        None,
                    ),
                    None => cx.error_no_text(&name, format!("{name} is not UTF-8 text")),
                }
                return None;
            }
        },
        Err(e) => {
            match &via {
                Some(l) => cx.error(
                    l,
                    "extends",
                    format!("cannot read the extended spec {name}: {e}"),
                    Some("a path relative to this file".into()),
                    None,
                ),
                None => cx.error_no_text(&name, format!("cannot read spec {name}: {e}")),
            }
            return None;
        }
    };
    let kind = if via.is_none() {
        SrcKind::Main(path.to_path_buf())
    } else {
        SrcKind::Preset(path.to_path_buf())
    };
    let src = cx.add_source(name.clone(), text, kind);
    let mut table = cx.parse_document(src)?;
    let Some(ext) = table.remove("extends") else {
        return Some(table);
    };
    let NodeV::Str(rel) = &ext.v else {
        cx.error(
            &ext.at,
            "extends",
            format!("`extends` must be a string, got {}", ext.v.type_name()),
            Some("a path like \"presets/small.toml\"".into()),
            None,
        );
        return Some(table);
    };
    let target = path.parent().unwrap_or(Path::new("")).join(rel);
    let canon = std::fs::canonicalize(&target).unwrap_or_else(|_| target.clone());
    let me = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf());
    chain.push((me, name));
    if let Some(pos) = chain.iter().position(|(p, _)| *p == canon) {
        let mut names: Vec<String> = chain[pos..].iter().map(|(_, n)| n.clone()).collect();
        names.push(chain[pos].1.clone());
        cx.error(
            &ext.at,
            "extends",
            format!("extends cycle: {}", names.join(" -> ")),
            Some("this file is already in the chain".into()),
            None,
        );
        chain.pop();
        return Some(table);
    }
    let base = load_chain(cx, &target, Some(ext.at.clone()), chain);
    chain.pop();
    match base {
        Some(mut b) => {
            merge(&mut b, table);
            Some(b)
        }
        None => Some(table),
    }
}

/// Insert one `--set PATH=VALUE` argument (already added as source `src`).
pub(crate) fn apply_set(cx: &mut Ctx, tree: &mut Table, src: usize) {
    let arg = cx.sources[src].0.text.clone();
    let whole = Loc {
        src,
        span: 0..arg.len(),
    };
    let Some(eq) = arg.find('=') else {
        cx.error(
            &whole,
            "",
            format!("--set needs KEY=VALUE, got {arg:?}"),
            Some("like replay.burn_in=20".into()),
            None,
        );
        return;
    };
    // Split the dotted path, keeping each part's byte range.
    let mut parts: Vec<(String, Loc)> = Vec::new();
    let mut start = 0;
    for piece in arg[..eq].split('.') {
        let lead = piece.len() - piece.trim_start().len();
        let name = piece.trim();
        let loc = Loc {
            src,
            span: start + lead..start + lead + name.len(),
        };
        if name.is_empty()
            || !name
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-')
        {
            let span = if name.is_empty() {
                start..(start + piece.len()).max(start + 1).min(arg.len())
            } else {
                loc.span.clone()
            };
            cx.error(
                &Loc { src, span },
                "",
                format!("--set: {:?} is not a key path", &arg[..eq]),
                Some("dotted keys like replay.burn_in".into()),
                None,
            );
            return;
        }
        parts.push((name.to_string(), loc));
        start += piece.len() + 1;
    }
    let key_path: Vec<&str> = parts.iter().map(|(n, _)| n.as_str()).collect();
    let mut dotted = key_path.join(".");
    // A renamed key is set under its new name, so that it overrides what a file
    // wrote under either name.
    if let Some(new) = crate::registry::renamed(&dotted) {
        let place = cx.place(&parts[0].1);
        cx.warnings.push(format!(
            "{place}: warning: `{dotted}` is the old name of `{new}`; it still works, but write --set {new}=..."
        ));
        parts = new
            .split('.')
            .enumerate()
            .map(|(i, p)| (p.to_string(), parts.get(i).unwrap_or(&parts[0]).1.clone()))
            .collect();
        dotted = new.to_string();
    }
    let last_at = parts
        .last()
        .expect("split yields one part at least")
        .1
        .clone();
    let value = cx.parse_value(src, eq + 1..arg.len(), last_at);
    insert_path(cx, tree, parts, value, &dotted);
}

/// Put `value` at the dotted path `parts` of `tree` (tables made as needed), merged
/// with what is there by the rules of [`merge`].
pub(crate) fn insert_path(
    cx: &mut Ctx,
    tree: &mut Table,
    mut parts: Vec<(String, Loc)>,
    value: Node,
    dotted: &str,
) {
    let Some((last, _)) = parts.pop() else {
        return;
    };
    let mut table = tree;
    for (name, at) in parts {
        let entry = table.entry(name.clone()).or_insert_with(|| Node {
            v: NodeV::Table(Table::new()),
            at: at.clone(),
            key_at: at.clone(),
        });
        let type_name = entry.v.type_name();
        match &mut entry.v {
            NodeV::Table(t) => table = t,
            _ => {
                cx.error(
                    &at,
                    dotted,
                    format!("cannot set {dotted}: `{name}` holds {type_name}, not a table"),
                    None,
                    None,
                );
                return;
            }
        }
    }
    // `--set agent.memory.kind=none` starts the part afresh, as a whole table with a
    // new kind would: the old kind's settings do not carry over.
    if last == "kind" {
        let changes = matches!((kind_of(table), &value.v), (Some(a), NodeV::Str(b)) if a != b);
        if changes {
            table.clear();
        }
    }
    match table.get_mut(&last) {
        Some(b) => merge_node(b, value),
        None => {
            table.insert(last, value);
        }
    }
}

/// Render a raw value as TOML text (for labels and `explain`'s `[vary]`).
pub(crate) fn node_text(n: &Node) -> String {
    match &n.v {
        NodeV::Str(s) => crate::emit::quote(s),
        NodeV::Int(i) => i.to_string(),
        NodeV::Float(f) => crate::values::float_text(*f),
        NodeV::Bool(b) => b.to_string(),
        NodeV::Datetime(d) => d.clone(),
        NodeV::Array(items) => {
            let parts: Vec<String> = items.iter().map(node_text).collect();
            format!("[{}]", parts.join(", "))
        }
        NodeV::Table(t) => {
            if t.is_empty() {
                return "{}".into();
            }
            // `kind` first: it is what a reader looks for.
            let mut parts: Vec<String> = Vec::new();
            if let Some(k) = t.get("kind") {
                parts.push(format!("kind = {}", node_text(k)));
            }
            for (k, v) in t.iter().filter(|(k, _)| k.as_str() != "kind") {
                parts.push(format!("{} = {}", crate::emit::key_text(k), node_text(v)));
            }
            format!("{{ {} }}", parts.join(", "))
        }
    }
}
