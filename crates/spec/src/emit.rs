//! Writing specs back out: [`to_toml`] (the resolved spec in the spec language, read
//! back by `load_str` to the same [`Spec`]), [`explain`] (the same with each value's
//! origin and doc), and [`reference_markdown`] (the key reference generated from the
//! registry, committed as `docs/spec-reference.md`).

use std::collections::BTreeMap;

use crate::model::*;
use crate::registry::{self, describe, Key, KeyDefault, Kind, Ty, KEYS};
use crate::values::{budget_text, float_text, schedule_text};
use crate::{Origin, Resolved};

/// A TOML basic string.
pub(crate) fn quote(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    out.push('"');
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\t' => out.push_str("\\t"),
            '\r' => out.push_str("\\r"),
            c if (c as u32) < 0x20 || c as u32 == 0x7f => {
                out.push_str(&format!("\\u{:04X}", c as u32))
            }
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// A key, bare when TOML allows.
pub(crate) fn key_text(k: &str) -> String {
    if !k.is_empty()
        && k.chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-')
    {
        k.to_string()
    } else {
        quote(k)
    }
}

fn value_text(v: &Value) -> String {
    match v {
        Value::Int(i) => i.to_string(),
        Value::Float(f) => float_text(*f),
        Value::Bool(b) => b.to_string(),
        Value::Str(s) => quote(s),
        Value::List(items) => format!(
            "[{}]",
            items.iter().map(value_text).collect::<Vec<_>>().join(", ")
        ),
        Value::Table(t) => {
            if t.is_empty() {
                "{}".into()
            } else {
                let parts: Vec<String> = t
                    .iter()
                    .map(|(k, v)| format!("{} = {}", key_text(k), value_text(v)))
                    .collect();
                format!("{{ {} }}", parts.join(", "))
            }
        }
    }
}

fn usizes(v: &[usize]) -> String {
    format!(
        "[{}]",
        v.iter()
            .map(|x| x.to_string())
            .collect::<Vec<_>>()
            .join(", ")
    )
}

/// (dotted path, TOML value text, doc) of every value of `spec`, in registry order.
fn entries(spec: &Spec) -> Vec<(String, String, &'static str)> {
    let mut out: Vec<(String, String, &'static str)> = Vec::new();
    let mut push = |path: &str, text: String| {
        let doc = doc_for(path, spec);
        out.push((path.to_string(), text, doc));
    };
    push("name", quote(&spec.name));
    push("task.kind", quote(&spec.task.kind));
    let task_fields: Vec<&str> = crate::tasks::TASK_KINDS
        .iter()
        .find(|k| k.name == spec.task.kind)
        .map(|k| k.fields.iter().map(|f| f.path).collect())
        .unwrap_or_default();
    for f in &task_fields {
        if let Some(v) = spec.task.settings.get(*f) {
            push(&format!("task.{f}"), value_text(v));
        }
    }
    for (f, v) in &spec.task.settings {
        if !task_fields.contains(&f.as_str()) {
            push(&format!("task.{f}"), value_text(v));
        }
    }
    let a = &spec.agent;
    push(
        "agent.previous_action_reward",
        a.previous_action_reward.to_string(),
    );
    match &a.torso {
        Torso::Mlp { layers, activation } => {
            push("agent.torso.kind", quote("mlp"));
            push("agent.torso.layers", usizes(layers));
            push(
                "agent.torso.activation",
                quote(match activation {
                    Activation::Relu => "relu",
                    Activation::Tanh => "tanh",
                }),
            );
        }
        Torso::Conv {
            channels,
            kernels,
            strides,
            out,
        } => {
            push("agent.torso.kind", quote("conv"));
            push("agent.torso.channels", usizes(channels));
            push("agent.torso.kernels", usizes(kernels));
            push("agent.torso.strides", usizes(strides));
            push("agent.torso.out", out.to_string());
        }
    }
    match &a.memory {
        Memory::Lstm { size } => {
            push("agent.memory.kind", quote("lstm"));
            push("agent.memory.size", size.to_string());
        }
        Memory::None => push("agent.memory.kind", quote("none")),
    }
    match &a.head {
        Head::Value => push("agent.head.kind", quote("value")),
        Head::Dueling => push("agent.head.kind", quote("dueling")),
        Head::Quantile { quantiles, kappa } => {
            push("agent.head.kind", quote("quantile"));
            push("agent.head.quantiles", quantiles.to_string());
            push("agent.head.kappa", float_text(*kappa));
        }
    }
    let c = &spec.acting;
    push("acting.actors", c.actors.to_string());
    push("acting.lanes", c.lanes.to_string());
    push("acting.round", c.round.to_string());
    push("acting.epsilon.base", float_text(c.epsilon_base));
    push("acting.epsilon.spread", float_text(c.epsilon_spread));
    let r = &spec.replay;
    push("replay.capacity", r.capacity.to_string());
    push("replay.sequence", r.sequence.to_string());
    push("replay.overlap", r.overlap.to_string());
    push("replay.burn_in", r.burn_in.to_string());
    push(
        "replay.start_state",
        quote(match r.start_state {
            StartState::Stored => "stored",
            StartState::Zero => "zero",
        }),
    );
    push("replay.priority.exponent", float_text(r.priority_exponent));
    push(
        "replay.priority.correction",
        float_text(r.priority_correction),
    );
    push("replay.priority.mix", float_text(r.priority_mix));
    let l = &spec.learn;
    push("learn.discount", float_text(l.discount));
    push("learn.n_step", l.n_step.to_string());
    push("learn.batch", l.batch.to_string());
    push("learn.rate", schedule_text(&l.rate));
    push("learn.adam_epsilon", float_text(l.adam_epsilon));
    push("learn.clip", float_text(l.clip));
    push("learn.target_every", l.target_every.to_string());
    push("learn.rescale", float_text(l.rescale));
    push("learn.warmup", l.warmup.to_string());
    push("learn.replay_ratio", float_text(l.replay_ratio));
    push(
        "learn.loss",
        quote(match l.loss {
            TdLoss::Squared => "squared",
            TdLoss::Huber => "huber",
        }),
    );
    let u = &spec.run;
    push("run.budget", budget_text(&u.budget));
    push("run.seed", u.seed.to_string());
    push("run.checkpoint_every", u.checkpoint_every.to_string());
    push(
        "run.stop",
        match u.stop {
            None => "{}".into(),
            Some(StopWhen::Success(v)) => format!("{{ success = {} }}", float_text(v)),
            Some(StopWhen::Return(v)) => format!("{{ return = {} }}", float_text(v)),
        },
    );
    push("run.out", quote(&u.out));
    push("run.eval.every", u.eval_every.to_string());
    push("run.eval.episodes", u.eval_episodes.to_string());
    out
}

/// The doc line of a dotted path, given the kinds `spec` uses.
fn doc_for(path: &str, spec: &Spec) -> &'static str {
    if let Some(k) = registry::find(path) {
        return k.doc;
    }
    for k in KEYS {
        let Ty::Part(kinds) = k.ty else { continue };
        let Some(field) = path.strip_prefix(k.path).and_then(|r| r.strip_prefix('.')) else {
            continue;
        };
        let current = match k.path {
            "task" => spec.task.kind.as_str(),
            "agent.torso" => match spec.agent.torso {
                Torso::Mlp { .. } => "mlp",
                Torso::Conv { .. } => "conv",
            },
            "agent.memory" => match spec.agent.memory {
                Memory::Lstm { .. } => "lstm",
                Memory::None => "none",
            },
            _ => match spec.agent.head {
                Head::Value => "value",
                Head::Dueling => "dueling",
                Head::Quantile { .. } => "quantile",
            },
        };
        let Some(kind) = kinds.iter().find(|x| x.name == current) else {
            return k.doc;
        };
        if field == "kind" {
            return kind.doc;
        }
        return kind
            .fields
            .iter()
            .find(|f| f.path == field)
            .map(|f| f.doc)
            .unwrap_or("");
    }
    ""
}

/// Group entries into TOML sections, each section once, parents first.
fn sections<T: Clone>(items: &[(String, T)]) -> Vec<(String, Vec<(String, T)>)> {
    let mut order: Vec<String> = Vec::new();
    let mut by: BTreeMap<String, Vec<(String, T)>> = BTreeMap::new();
    for (path, item) in items {
        let (section, key) = match path.rsplit_once('.') {
            Some((s, k)) => (s.to_string(), k.to_string()),
            None => (String::new(), path.clone()),
        };
        if !by.contains_key(&section) {
            order.push(section.clone());
        }
        by.entry(section).or_default().push((key, item.clone()));
    }
    order
        .into_iter()
        .map(|s| {
            let v = by.remove(&s).unwrap_or_default();
            (s, v)
        })
        .collect()
}

/// The resolved spec as TOML in the spec language. `load_str` of this text gives
/// back the same [`Spec`].
pub fn to_toml(spec: &Spec) -> String {
    let items: Vec<(String, String)> = entries(spec).into_iter().map(|(p, t, _)| (p, t)).collect();
    let mut out = String::new();
    for (section, keys) in sections(&items) {
        if !section.is_empty() {
            out.push_str(&format!("\n[{section}]\n"));
        }
        for (k, v) in keys {
            out.push_str(&format!("{} = {v}\n", key_text(&k)));
        }
    }
    out
}

/// The resolved spec as TOML, each value followed by a comment giving its origin
/// (default, file:line, preset file:line, or the `--set`) and its one-line doc.
/// It reads back (with `load_str`) to the same [`Spec`].
pub fn explain(resolved: &Resolved) -> String {
    let spec = &resolved.spec;
    let items: Vec<(String, (String, &'static str))> = entries(spec)
        .into_iter()
        .map(|(p, t, d)| (p, (t, d)))
        .collect();
    let mut out = String::from(
        "# The resolved spec: every value with [where it came from] and what it does.\n",
    );
    for (section, keys) in sections(&items) {
        if !section.is_empty() {
            out.push_str(&format!("\n[{section}]\n"));
        }
        let width = keys
            .iter()
            .map(|(k, (v, _))| key_text(k).len() + 3 + v.len())
            .filter(|w| *w <= 44)
            .max()
            .unwrap_or(0);
        for (k, (v, doc)) in keys {
            let path = if section.is_empty() {
                k.clone()
            } else {
                format!("{section}.{k}")
            };
            let origin = resolved
                .origins
                .get(&path)
                .cloned()
                .unwrap_or(Origin::Default);
            let line = format!("{} = {v}", key_text(&k));
            out.push_str(&format!("{line:<width$}  # [{origin}] {doc}\n"));
        }
    }
    let v = &resolved.vary;
    if !v.axes.is_empty() || !v.seeds.is_empty() {
        out.push_str("\n[vary]\n");
        for a in &v.axes {
            out.push_str(&format!("{} = [{}]\n", quote(&a.path), a.values.join(", ")));
        }
        if !v.seeds.is_empty() {
            let s: Vec<String> = v.seeds.iter().map(|s| s.to_string()).collect();
            out.push_str(&format!("seeds = [{}]\n", s.join(", ")));
        }
    }
    out
}

fn default_text(k: &Key) -> String {
    match k.default {
        KeyDefault::Value(t) => format!("`{t}`"),
        KeyDefault::Computed(t) => t.to_string(),
        KeyDefault::Required => "required".into(),
    }
}

fn cell(s: &str) -> String {
    s.replace('|', "\\|")
}

fn kind_tables(out: &mut String, path: &str, kinds: &[Kind]) {
    for kind in kinds {
        out.push_str(&format!(
            "\n#### `{path}` kind = \"{}\"\n\n{}.\n",
            kind.name, kind.doc
        ));
        if kind.fields.is_empty() {
            out.push_str("\nNo settings besides `kind`.\n");
            continue;
        }
        out.push_str("\n| key | type | default | what it does |\n|---|---|---|---|\n");
        for f in kind.fields {
            out.push_str(&format!(
                "| `{path}.{}` | {} | {} | {} |\n",
                f.path,
                cell(&describe(&f.ty)),
                cell(&default_text(f)),
                cell(f.doc)
            ));
        }
    }
}

/// The spec key reference as Markdown, generated from the registry. The committed
/// `docs/spec-reference.md` must equal this (a test checks it).
pub fn reference_markdown() -> String {
    let mut out = String::from(
        "# mnemon spec reference\n\n\
         Generated from the key registry (`crates/spec/src/registry.rs`, `crates/spec/src/tasks.rs`)\n\
         by `mnemon explain --reference`; do not edit by hand.\n\n\
         A spec is a TOML file. Counts accept suffixes k, M, G (`\"200k\"`, `\"2M\"`); `run.budget`\n\
         also takes a duration (`\"90s\"`, `\"20m\"`, `\"1h30m\"`). Schedules are a number,\n\
         `\"ramp(from, to, over)\"` (linear, then constant) or `\"points(step:value, ...)\"` (piecewise\n\
         linear). `extends = \"other.toml\"` starts from another spec (relative to this file) and merges\n\
         tables key by key; a part table whose `kind` changes replaces the inherited one whole.\n\
         `--set key.path=value` overrides any key from the command line (the value is read as TOML,\n\
         else as a bare string); setting a part's `kind` to another kind (`--set agent.memory.kind=none`)\n\
         starts that part afresh. A part may be written as just its kind: `memory = \"none\"`.\n",
    );
    // Top-level keys, then each section in registry order.
    let mut order: Vec<&str> = Vec::new();
    for k in KEYS {
        let s = if k.path == "task" {
            "task"
        } else {
            k.path
                .rsplit_once('.')
                .map(|(a, _)| a.split('.').next().unwrap_or(a))
                .unwrap_or("")
        };
        if !order.contains(&s) {
            order.push(s);
        }
    }
    for s in order {
        if s.is_empty() {
            out.push_str("\n## Top level\n");
        } else {
            out.push_str(&format!("\n## [{s}]\n"));
        }
        out.push_str("\n| key | type | default | what it does |\n|---|---|---|---|\n");
        let mut parts: Vec<&Key> = Vec::new();
        for k in KEYS {
            let ks = if k.path == "task" {
                "task"
            } else {
                k.path
                    .rsplit_once('.')
                    .map(|(a, _)| a.split('.').next().unwrap_or(a))
                    .unwrap_or("")
            };
            if ks != s {
                continue;
            }
            let shown = if matches!(k.ty, Ty::Part(_)) {
                format!("{}.kind", k.path)
            } else {
                k.path.to_string()
            };
            let default = match (k.ty, k.default) {
                (Ty::Part(_), KeyDefault::Value(t)) => format!("`{t}`"),
                _ => default_text(k),
            };
            out.push_str(&format!(
                "| `{shown}` | {} | {} | {} |\n",
                cell(&describe(&k.ty)),
                cell(&default),
                cell(k.doc)
            ));
            if matches!(k.ty, Ty::Part(_)) {
                parts.push(k);
            }
        }
        for k in parts {
            if let Ty::Part(kinds) = k.ty {
                kind_tables(&mut out, k.path, kinds);
            }
        }
    }
    out.push_str(
        "\n## [vary]\n\n\
         Axes of a comparison. Each key is a quoted dotted key path and takes a list of values,\n\
         each written as it would be after `--set`; `seeds` lists the seeds every combination runs\n\
         with. The cartesian product of the axes times the seeds is expanded, and each result is\n\
         checked like a spec of its own.\n\n\
         ```toml\n[vary]\n\"agent.memory\" = [{ kind = \"lstm\", size = 128 }, { kind = \"none\" }]\nseeds = [1, 2, 3]\n```\n",
    );
    out
}
