//! Rules between keys, each checked only when its inputs are valid and blamed on
//! the value the user wrote last (a `--set` over the spec file over a preset); and
//! the rules between one task's settings (`tasks::rules`), which also fill in
//! settings computed from others.

use std::collections::BTreeMap;

use super::{CheckedValue, Checker};
use crate::model::*;
use crate::tasks::{self, Has};
use crate::tree::{Loc, SrcKind};

impl Checker<'_> {
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

    /// Check every rule. Returns the task's settings, computed ones filled in and a
    /// fog-grid map path resolved against the spec that names it.
    pub(super) fn rules(&mut self) -> BTreeMap<String, Value> {
        let task_kind = self.string("task.kind");
        let mut settings = BTreeMap::new();
        let mut internal = Vec::new();
        if let Some(kind) = &task_kind {
            for (p, g) in &self.vals {
                if let Some(f) = p.strip_prefix("task.") {
                    if f != "kind" {
                        match &g.value {
                            CheckedValue::Plain(v) => {
                                settings.insert(f.to_string(), v.clone());
                            }
                            other => internal.push((
                                p.clone(),
                                format!("task setting `{f}` holds {other:?}, not a plain value"),
                            )),
                        }
                    }
                }
            }
            for (path, msg) in internal {
                self.internal(&path, msg);
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
            let image = tasks::facts(kind).map(|f| f.image);
            if t == "conv" && image == Some(Has::No) {
                self.rule(
                    &["agent.torso.kind"],
                    format!(
                        "a conv torso needs image observations, and task \"{kind}\" gives a vector"
                    ),
                    Some("kind = \"mlp\", or an image task (fog-grid, process)".into()),
                );
            }
        }
        if self.string("agent.torso.kind").as_deref() == Some("conv") {
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
            Some(CheckedValue::Stop(s)) => Some(*s),
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
                if tasks::facts(kind).map(|f| f.success) == Some(Has::No) {
                    self.rule(
                        &["run.stop"],
                        format!("task \"{kind}\" has no success flag, so `stop = {{ success = .. }}` can never fire"),
                        Some("stop = { return = X } for this task".into()),
                    );
                }
            }
        }

        settings
    }
}
