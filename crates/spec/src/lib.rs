//! mnemon's agent spec language: TOML in mnemon's own vocabulary, read into a
//! resolved, validated [`Spec`].
//!
//! Loading goes through layers (habit 4 of STYLE.md):
//! 1. `tree.rs` parses the text into a tree that remembers where every value came
//!    from, follows `extends` chains and inserts `--set` overrides;
//! 2. `resolve/` checks the tree against the key registry (`registry.rs`, and
//!    `tasks.rs` for task settings), fills defaults, checks rules between keys, and
//!    assembles the [`Spec`];
//! 3. `vary.rs` expands `[vary]` axes and seeds into concrete specs;
//! 4. `emit.rs` writes specs back as TOML ([`to_toml`], [`explain`]) and the key
//!    reference ([`reference_markdown`]).
//!
//! Every problem is collected into [`Errors`], each with file, line and column.
//! Nothing here builds a network or starts a thread, so checking a spec is instant.
//!
//! ```
//! let text = "[task]\nkind = \"tmaze\"\nlength = 6\n";
//! let r = mnemon_spec::load_str(text, "corridor.toml", &["replay.burn_in=5".into()]).unwrap();
//! assert_eq!(r.spec.task.int("length"), Some(6));
//! assert_eq!(r.spec.replay.burn_in, 5);
//! assert_eq!(r.spec.name, "corridor");
//!
//! let bad = mnemon_spec::load_str("[replay]\nburnin = 5\n", "bad.toml", &[]).unwrap_err();
//! assert!(bad.to_string().contains("did you mean \"burn_in\"?"));
//! ```
#![deny(missing_docs)]

mod emit;
mod error;
pub mod model;
pub mod registry;
mod resolve;
pub mod tasks;
mod tree;
mod values;
mod vary;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

pub use emit::{explain, reference_markdown, to_toml};
pub use error::{Diagnostic, Errors};
pub use model::*;
pub use vary::{expand, expand_with, Axis, Vary};

/// Where a resolved value came from.
#[derive(Debug, Clone, PartialEq)]
pub enum Origin {
    /// mnemon's built-in default.
    Default,
    /// The spec file itself.
    File {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
    },
    /// A file reached through `extends`.
    Preset {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
    },
    /// A `--set` argument (the whole `key=value` text).
    Set(String),
}

impl std::fmt::Display for Origin {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Origin::Default => write!(f, "default"),
            Origin::File { path, line } => write!(f, "{}:{line}", path.display()),
            Origin::Preset { path, line } => write!(f, "preset {}:{line}", path.display()),
            Origin::Set(arg) => write!(f, "--set {arg}"),
        }
    }
}

/// A loaded spec: the resolved values, where each came from, and its `[vary]` axes.
#[derive(Debug, Clone)]
pub struct Resolved {
    /// The resolved, validated spec.
    pub spec: Spec,
    /// Origin of every value, by dotted key (`replay.burn_in`, `agent.memory.size`).
    pub origins: BTreeMap<String, Origin>,
    /// The `[vary]` axes and seeds (empty if none).
    pub vary: Vary,
    /// Problems that did not stop the spec from loading, like a key written under
    /// its old name; each starts with file:line:col.
    pub warnings: Vec<String>,
    /// The merged raw tree, kept so `[vary]` variants can be re-checked.
    pub(crate) tree: tree::Table,
    pub(crate) cx: tree::Ctx,
    pub(crate) default_name: String,
    pub(crate) files: bool,
}

/// Load the spec file at `path`, following `extends`, applying `--set` overrides
/// (`"replay.burn_in=20"`), and validating everything. All problems found are
/// returned together.
pub fn load(path: &Path, sets: &[String]) -> Result<Resolved, Errors> {
    let mut cx = tree::Ctx::default();
    let t = tree::load_chain(&mut cx, path, None, &mut Vec::new());
    let name = default_name(&path.display().to_string());
    finish(cx, t, sets, name, true)
}

/// Load a spec held in memory (one stored in a run folder or checkpoint); `name` is
/// what errors call it. `extends` is not allowed: stored specs are already resolved.
pub fn load_str(text: &str, name: &str, sets: &[String]) -> Result<Resolved, Errors> {
    let mut cx = tree::Ctx::default();
    let src = cx.add_source(
        name.to_string(),
        text.to_string(),
        tree::SrcKind::Main(PathBuf::from(name)),
    );
    let t = cx.parse_document(src);
    finish(cx, t, sets, default_name(name), false)
}

fn default_name(file: &str) -> String {
    let stem = Path::new(file)
        .file_stem()
        .map(|s| s.to_string_lossy().to_string())
        .unwrap_or_default();
    let clean: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || "-_.".contains(c) {
                c
            } else {
                '-'
            }
        })
        .collect();
    let clean = clean.trim_start_matches('.').to_string();
    if clean.is_empty() {
        "spec".into()
    } else {
        clean
    }
}

fn finish(
    mut cx: tree::Ctx,
    t: Option<tree::Table>,
    sets: &[String],
    default_name: String,
    files: bool,
) -> Result<Resolved, Errors> {
    let Some(mut t) = t else {
        return Err(cx.errors());
    };
    for s in sets {
        let src = cx.add_source("--set".into(), s.clone(), tree::SrcKind::Set(s.clone()));
        tree::apply_set(&mut cx, &mut t, src);
    }
    let checked = resolve::check(&mut cx, &t, &default_name, files);
    let vary = vary::read(&mut cx, &t);
    let (Some(checked), Some(vary)) = (checked, vary) else {
        return Err(cx.errors());
    };
    if !cx.diags.is_empty() {
        return Err(cx.errors());
    }
    let warnings = std::mem::take(&mut cx.warnings);
    let r = Resolved {
        spec: checked.spec,
        origins: checked.origins,
        vary,
        warnings,
        tree: t,
        cx,
        default_name,
        files,
    };
    // Each axis value must make a valid spec on its own.
    vary::check_axes(&r)?;
    Ok(r)
}
