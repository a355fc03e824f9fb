//! Building tasks: [`make`] turns a `[task]` section into a running task. Which
//! kinds exist and what settings each takes (types, ranges, defaults, the rules
//! between them) is the one table in `mnemon_spec::tasks`; [`make`] checks a
//! `TaskSpec` against it and fills defaults first, so a `TaskSpec` built by hand
//! or from `mnemon tasks try --set` is safe too, and the task constructors read
//! settings that are known to be present and in range.

use mnemon_spec::tasks::{self, SettingError};
use mnemon_spec::{TaskSpec, Value};

use crate::{cartpole, fog_grid, process, recall, tiger, tmaze, Task, TaskError};

/// Build one instance of the task `spec` describes, after checking its settings
/// against the task table and filling defaults. For `kind = "process"` this starts
/// the outside program and completes its handshake.
pub fn make(spec: &TaskSpec) -> Result<Box<dyn Task>, TaskError> {
    let spec = tasks::complete(spec)?;
    Ok(match spec.kind.as_str() {
        "tmaze" => Box::new(tmaze::TMaze::from_spec(&spec)?),
        "cartpole" => Box::new(cartpole::CartPole::from_spec(&spec, false)?),
        "cartpole-positions" => Box::new(cartpole::CartPole::from_spec(&spec, true)?),
        "tiger" => Box::new(tiger::Tiger::from_spec(&spec)?),
        "recall" => Box::new(recall::Recall::from_spec(&spec)?),
        "fog-grid" => Box::new(fog_grid::FogGrid::from_spec(&spec)?),
        "process" => Box::new(process::ProcessTask::from_spec(&spec)?),
        other => {
            return Err(SettingError::Setting {
                kind: other.to_string(),
                key: "kind".into(),
                problem: "internal error: the task table lists this kind but envs cannot build it"
                    .into(),
            }
            .into())
        }
    })
}

/// A setting that `tasks::complete` guarantees; its absence is an internal error.
fn missing(spec: &TaskSpec, key: &str, what: &str) -> TaskError {
    SettingError::Setting {
        kind: spec.kind.clone(),
        key: key.into(),
        problem: format!("internal error: missing or not {what} after the task table's check"),
    }
    .into()
}

/// An integer setting (range already checked against the task table).
pub(crate) fn int(spec: &TaskSpec, key: &str) -> Result<i64, TaskError> {
    spec.int(key)
        .ok_or_else(|| missing(spec, key, "an integer"))
}

/// A count setting (an integer the table keeps at 0 or more).
pub(crate) fn count(spec: &TaskSpec, key: &str) -> Result<usize, TaskError> {
    let v = int(spec, key)?;
    usize::try_from(v).map_err(|_| missing(spec, key, "a count"))
}

/// A real setting (range already checked).
pub(crate) fn real(spec: &TaskSpec, key: &str) -> Result<f64, TaskError> {
    spec.float(key)
        .ok_or_else(|| missing(spec, key, "a number"))
}

/// A true/false setting.
pub(crate) fn switch(spec: &TaskSpec, key: &str) -> Result<bool, TaskError> {
    spec.bool(key)
        .ok_or_else(|| missing(spec, key, "true or false"))
}

/// A list-of-text setting.
pub(crate) fn strings(spec: &TaskSpec, key: &str) -> Result<Vec<String>, TaskError> {
    spec.strings(key)
        .ok_or_else(|| missing(spec, key, "a list of text"))
}

/// A table setting.
pub(crate) fn table<'a>(spec: &'a TaskSpec, key: &str) -> Result<&'a Value, TaskError> {
    match spec.settings.get(key) {
        Some(v @ Value::Table(_)) => Ok(v),
        _ => Err(missing(spec, key, "a table")),
    }
}

/// A text setting.
pub(crate) fn text<'a>(spec: &'a TaskSpec, key: &str) -> Result<&'a str, TaskError> {
    spec.str(key).ok_or_else(|| missing(spec, key, "text"))
}

/// Shared error for a bad action index.
pub(crate) fn bad_action(kind: &str, action: usize, count: usize) -> TaskError {
    TaskError::Action {
        kind: kind.into(),
        action,
        count,
    }
}

#[cfg(test)]
mod tests {
    use std::collections::BTreeMap;

    use mnemon_spec::registry::{Bound, Key, Ty};
    use mnemon_spec::tasks::{default_value, Has, FOG_GRID_MAPS, TASK_KINDS};

    use super::*;

    fn spec_with(kind: &str, settings: &[(&str, Value)]) -> TaskSpec {
        TaskSpec {
            kind: kind.into(),
            settings: settings
                .iter()
                .map(|(k, v)| (k.to_string(), v.clone()))
                .collect::<BTreeMap<_, _>>(),
        }
    }

    #[test]
    fn unknown_kind_and_setting_are_named() {
        let e = make(&spec_with("tmaz", &[])).err().unwrap().to_string();
        assert!(e.contains("tmaz") && e.contains("tmaze"), "{e}");
        let e = make(&spec_with("tmaze", &[("lenght", Value::Int(3))]))
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("lenght") && e.contains("length"), "{e}");
    }

    #[test]
    fn wrong_type_and_range_are_errors() {
        let e = make(&spec_with("tmaze", &[("length", Value::Str("ten".into()))]))
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("expected an integer"), "{e}");
        let e = make(&spec_with("tmaze", &[("length", Value::Int(0))]))
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("out of range"), "{e}");
    }

    /// A spec file with just a `[task]` of these settings.
    fn toml_of(kind: &str, settings: &[(&str, Value)]) -> String {
        let mut text = format!("[task]\nkind = \"{kind}\"\n");
        for (k, v) in settings {
            let v = match v {
                Value::Int(i) => i.to_string(),
                Value::Float(f) => format!("{f:?}"),
                Value::Bool(b) => b.to_string(),
                Value::Str(s) => format!("{s:?}"),
                other => panic!("no TOML form written for {other:?}"),
            };
            text.push_str(&format!("{k} = {v}\n"));
        }
        text
    }

    /// The values of a setting worth building with: its default and the ends of
    /// its range (the largest time limits and horizons are built, not run).
    fn boundary_values(key: &Key) -> Vec<Value> {
        let mut out: Vec<Value> = default_value(key).into_iter().collect();
        match key.ty {
            Ty::Int { min, max } => out.extend([Value::Int(min), Value::Int(max)]),
            Ty::Float { lo, hi } => {
                let end = |b: Option<Bound>, inward: f64| {
                    b.map(|b| {
                        if b.inclusive {
                            b.value
                        } else {
                            b.value + inward
                        }
                    })
                };
                out.extend(end(lo, 1e-3).map(Value::Float));
                out.extend(end(hi, -1e-3).map(Value::Float));
            }
            Ty::Bool => out.extend([Value::Bool(true), Value::Bool(false)]),
            _ => {}
        }
        out
    }

    /// Every setting the task table accepts builds a task in envs, at its default
    /// and at the ends of its range (fog-grid maps: every built-in one), and what
    /// the task says of itself (success flag, images) matches the table.
    #[test]
    fn every_setting_the_table_accepts_builds_a_task() {
        for kind in TASK_KINDS {
            let facts = kind.task.as_ref().unwrap();
            if kind.name == "process" {
                let e = make(&spec_with("process", &[])).err().unwrap().to_string();
                assert!(e.contains("command") && e.contains("required"), "{e}");
                continue;
            }
            let t = make(&spec_with(kind.name, &[])).unwrap();
            assert!(!t.obs_space().is_empty());
            assert!(t.action_space().count() >= 2);
            assert_eq!(
                t.has_success(),
                facts.success == Has::Yes,
                "{}: the table's success flag disagrees with the task",
                kind.name
            );
            let image = matches!(t.obs_space(), crate::ObsSpace::Image { .. });
            assert_eq!(image, facts.image == Has::Yes, "{}: image", kind.name);
            for f in kind.fields {
                let mut values = boundary_values(f);
                if kind.name == "fog-grid" && f.path == "map" {
                    values.extend(FOG_GRID_MAPS.iter().map(|m| Value::Str(m.to_string())));
                }
                assert!(
                    !values.is_empty(),
                    "{}.{}: nothing tried",
                    kind.name,
                    f.path
                );
                for v in values {
                    // Settings computed from others get a partner that allows them.
                    let mut s = vec![(f.path, v.clone())];
                    if kind.name == "tmaze" && f.path == "time_limit" {
                        s.push(("length", Value::Int(1)));
                    }
                    if kind.name == "tmaze" && f.path == "length" {
                        s.push(("time_limit", Value::Int(0)));
                    }
                    if kind.name == "fog-grid" && f.path == "view" {
                        if let Value::Int(n) = v {
                            s[0].1 = Value::Int(n | 1);
                        }
                    }
                    if let Err(e) = make(&spec_with(kind.name, &s)) {
                        panic!(
                            "{} {:?}: the table accepts it, envs does not: {e}",
                            kind.name, s
                        )
                    }
                    // And a spec file with these settings passes `mnemon check`,
                    // resolving to the settings envs built the task from.
                    let text = toml_of(kind.name, &s);
                    let loaded = mnemon_spec::load_str(&text, "t.toml", &[]).unwrap_or_else(|e| {
                        panic!("{text}\nenvs builds it, the spec refuses:\n{e}")
                    });
                    assert_eq!(
                        loaded.spec.task,
                        tasks::complete(&spec_with(kind.name, &s)).unwrap(),
                        "{text}"
                    );
                }
            }
        }
    }

    /// The other direction: a setting outside the table is refused by envs.
    #[test]
    fn every_setting_the_table_refuses_is_refused() {
        for kind in TASK_KINDS.iter().filter(|k| k.name != "process") {
            let e = make(&spec_with(kind.name, &[("no_such_setting", Value::Int(1))]));
            assert!(e.is_err(), "{}", kind.name);
            for f in kind.fields {
                let beyond = match f.ty {
                    Ty::Int { min, max } => vec![Value::Int(min - 1), Value::Int(max + 1)],
                    Ty::Float { lo, hi } => lo
                        .map(|b| b.value - 1e-3)
                        .into_iter()
                        .chain(hi.map(|b| b.value + 1e-3))
                        .map(Value::Float)
                        .collect(),
                    _ => vec![Value::List(vec![])],
                };
                for v in beyond {
                    assert!(
                        make(&spec_with(kind.name, &[(f.path, v.clone())])).is_err(),
                        "{}.{} = {v:?} accepted",
                        kind.name,
                        f.path
                    );
                }
            }
        }
    }

    #[test]
    fn the_built_in_maps_are_the_ones_the_table_lists() {
        let shipped: Vec<&str> = fog_grid::BUILTIN_MAPS.iter().map(|(n, _)| *n).collect();
        assert_eq!(shipped, FOG_GRID_MAPS);
    }
}
