//! `[vary]`: axes of a comparison and the seeds to repeat it over, and their
//! expansion into concrete, validated specs.
//!
//! ```toml
//! [vary]
//! "agent.memory" = [{ kind = "lstm", size = 128 }, { kind = "none" }]
//! seeds = [1, 2, 3]
//! ```
//! expands to 2 x 3 specs labelled `agent.memory=lstm/seed=1` ... `agent.memory=none/seed=3`.
//! Each axis value is put onto the spec like a `--set` (tables with another `kind`
//! replace, others merge), then the whole spec is checked again.

use std::collections::BTreeSet;

use crate::error::Errors;
use crate::model::Spec;
use crate::resolve;
use crate::tree::{self, insert_path, node_text, Ctx, Loc, Node, NodeV, SrcKind, Table};
use crate::Resolved;

/// One axis: a dotted key and the values it takes.
#[derive(Debug, Clone, PartialEq)]
pub struct Axis {
    /// Dotted key (`agent.memory`, `replay.burn_in`).
    pub path: String,
    /// Each value as TOML text.
    pub values: Vec<String>,
    pub(crate) nodes: Vec<Node>,
    pub(crate) key_at: Loc,
}

/// The `[vary]` section: axes in file order and seeds.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Vary {
    /// Axes; their cartesian product is expanded.
    pub axes: Vec<Axis>,
    /// Seeds each combination is run with (empty: just `run.seed`).
    pub seeds: Vec<u64>,
}

/// Read and check the shape of `[vary]` (values are checked by [`check_axes`]).
pub(crate) fn read(cx: &mut Ctx, t: &Table) -> Option<Vary> {
    let Some(node) = t.get("vary") else {
        return Some(Vary::default());
    };
    let NodeV::Table(table) = &node.v else {
        cx.error(
            &node.at,
            "vary",
            format!("`vary` must be a table, got {}", node.v.type_name()),
            Some("[vary] with \"key\" = [values] and seeds = [..]".into()),
            None,
        );
        return None;
    };
    let before = cx.diags.len();
    let mut vary = Vary::default();
    for (k, n) in table {
        let NodeV::Array(items) = &n.v else {
            cx.error(
                &n.at,
                &format!("vary.{k}"),
                format!(
                    "vary \"{k}\" must be a list of values, got {}",
                    n.v.type_name()
                ),
                Some("a list like [1, 2, 3]".into()),
                None,
            );
            continue;
        };
        if items.is_empty() {
            cx.error(
                &n.at,
                &format!("vary.{k}"),
                format!("vary \"{k}\" has no values"),
                Some("at least one value".into()),
                None,
            );
            continue;
        }
        if k == "seeds" {
            let mut seen = BTreeSet::new();
            for item in items {
                match &item.v {
                    NodeV::Int(s) if *s >= 0 => {
                        if !seen.insert(*s) {
                            cx.error(
                                &item.at,
                                "vary.seeds",
                                format!("seed {s} is listed twice"),
                                Some("distinct seeds".into()),
                                None,
                            );
                        }
                        vary.seeds.push(*s as u64);
                    }
                    _ => cx.error(
                        &item.at,
                        "vary.seeds",
                        "seeds must be integers >= 0".to_string(),
                        Some("like seeds = [1, 2, 3]".into()),
                        None,
                    ),
                }
            }
            continue;
        }
        if k.split('.').any(|p| p.trim().is_empty()) {
            cx.error(
                &n.key_at,
                &format!("vary.{k}"),
                format!("vary key \"{k}\" is not a dotted key path"),
                Some("like \"agent.memory\" or \"replay.burn_in\"".into()),
                None,
            );
            continue;
        }
        vary.axes.push(Axis {
            path: k.clone(),
            values: items.iter().map(node_text).collect(),
            nodes: items.clone(),
            key_at: n.key_at.clone(),
        });
    }
    (cx.diags.len() == before).then_some(vary)
}

/// Check each axis value on its own against the base spec.
pub(crate) fn check_axes(r: &Resolved) -> Result<(), Errors> {
    let mut cx = r.cx.clone();
    for axis in &r.vary.axes {
        for node in &axis.nodes {
            let _ = variant(r, &mut cx, &[(axis, node)], None);
        }
    }
    if cx.diags.is_empty() {
        Ok(())
    } else {
        Err(cx.errors())
    }
}

fn variant(
    r: &Resolved,
    cx: &mut Ctx,
    picks: &[(&Axis, &Node)],
    seed: Option<u64>,
) -> Option<Spec> {
    let mut t = r.tree.clone();
    t.remove("vary");
    for (axis, node) in picks {
        // A renamed key is varied under its new name.
        let path = crate::registry::renamed(&axis.path).unwrap_or(&axis.path);
        let parts = path
            .split('.')
            .map(|p| (p.trim().to_string(), axis.key_at.clone()))
            .collect();
        let mut value = (*node).clone();
        value.key_at = axis.key_at.clone();
        insert_path(cx, &mut t, parts, value, path);
    }
    if let Some(s) = seed {
        let text = format!("run.seed={s}");
        let src = cx.add_source(
            "vary seeds".into(),
            text.clone(),
            SrcKind::Set(text.clone()),
        );
        tree::apply_set(cx, &mut t, src);
    }
    resolve::check(cx, &t, &r.default_name, r.files).map(|c| c.spec)
}

/// Expand `[vary]` into labelled specs: the cartesian product of the axes, each
/// combination once per seed. Without axes or seeds, the spec itself (label `base`).
pub fn expand(resolved: &Resolved) -> Result<Vec<(String, Spec)>, Errors> {
    expand_with(resolved, &[], None)
}

/// Like [`expand`], with axes from the command line (values written as for
/// `--set`; an axis on the same key as one in `[vary]` replaces it) and seeds that
/// replace `[vary]`'s.
pub fn expand_with(
    resolved: &Resolved,
    extra_axes: &[(String, Vec<String>)],
    seeds: Option<Vec<u64>>,
) -> Result<Vec<(String, Spec)>, Errors> {
    let mut cx = resolved.cx.clone();
    let mut axes = resolved.vary.axes.clone();
    for (path, values) in extra_axes {
        let head = format!("{path}=");
        let mut nodes = Vec::new();
        let mut key_at = None;
        for v in values {
            let text = format!("{head}{v}");
            let src = cx.add_source("--vary".into(), text.clone(), SrcKind::Set(text.clone()));
            let k = Loc {
                src,
                span: 0..path.len(),
            };
            key_at.get_or_insert(k.clone());
            nodes.push(cx.parse_value(src, head.len()..text.len(), k));
        }
        let Some(key_at) = key_at else {
            let src = cx.add_source("--vary".into(), head.clone(), SrcKind::Set(head.clone()));
            cx.error(
                &Loc {
                    src,
                    span: 0..path.len(),
                },
                path,
                format!("axis {path} has no values"),
                Some("at least one value".into()),
                None,
            );
            continue;
        };
        let axis = Axis {
            path: path.clone(),
            values: nodes.iter().map(node_text).collect(),
            nodes,
            key_at,
        };
        match axes.iter_mut().find(|a| a.path == *path) {
            Some(a) => *a = axis,
            None => axes.push(axis),
        }
    }
    let seeds = seeds.unwrap_or_else(|| resolved.vary.seeds.clone());
    let labels: Vec<Vec<String>> = axes.iter().map(value_labels).collect();
    let mut out = Vec::new();
    let mut idx = vec![0usize; axes.len()];
    'outer: loop {
        let picks: Vec<(&Axis, &Node)> = axes
            .iter()
            .zip(&idx)
            .map(|(a, &i)| (a, &a.nodes[i]))
            .collect();
        let base: Vec<String> = axes
            .iter()
            .zip(&idx)
            .enumerate()
            .map(|(ai, (a, &i))| format!("{}={}", a.path, labels[ai][i]))
            .collect();
        let seed_list: Vec<Option<u64>> = if seeds.is_empty() {
            vec![None]
        } else {
            seeds.iter().map(|s| Some(*s)).collect()
        };
        for s in seed_list {
            let mut parts = base.clone();
            if let Some(s) = s {
                parts.push(format!("seed={s}"));
            }
            let label = if parts.is_empty() {
                "base".to_string()
            } else {
                parts.join("/")
            };
            if let Some(spec) = variant(resolved, &mut cx, &picks, s) {
                out.push((label, spec));
            }
        }
        // Next combination (last axis fastest).
        let mut k = axes.len();
        loop {
            if k == 0 {
                break 'outer;
            }
            k -= 1;
            idx[k] += 1;
            if idx[k] < axes[k].nodes.len() {
                break;
            }
            idx[k] = 0;
        }
    }
    if cx.diags.is_empty() {
        Ok(out)
    } else {
        Err(cx.errors())
    }
}

/// Short labels for an axis's values: the `kind` of part tables when that tells
/// them apart, else the value's TOML text (strings unquoted).
fn value_labels(axis: &Axis) -> Vec<String> {
    let kinds: Vec<Option<String>> = axis
        .nodes
        .iter()
        .map(|n| match &n.v {
            NodeV::Table(t) => tree::kind_of(t).map(str::to_string),
            _ => None,
        })
        .collect();
    let distinct: BTreeSet<&Option<String>> = kinds.iter().collect();
    let by_kind = kinds.iter().all(Option::is_some) && distinct.len() == kinds.len();
    axis.nodes
        .iter()
        .zip(kinds)
        .map(|(n, k)| match (&n.v, k) {
            (_, Some(k)) if by_kind => k,
            (NodeV::Str(s), _) => s.clone(),
            _ => node_text(n),
        })
        .collect()
}
