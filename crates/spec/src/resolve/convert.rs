//! Converting one raw value to a checked value of its key's type: integers with
//! k/M/G suffixes, bounded reals, choices, lists, budgets, schedules and stop
//! conditions, each problem reported at the value (or inside its text).

use super::{CheckedValue, Checker};
use crate::error::nearest;
use crate::model::*;
use crate::registry::{self, describe, Ty};
use crate::tree::{Loc, Node, NodeV};
use crate::values::{parse_budget, parse_count, parse_schedule, TextError};

impl Checker<'_> {
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

    pub(super) fn convert(&mut self, ty: &Ty, path: &str, node: &Node) -> Option<CheckedValue> {
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
                Some(CheckedValue::Plain(Value::Int(v)))
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
                if !registry::in_bounds(v, lo, hi) {
                    self.out_of_range(path, ty, node, crate::values::float_text(v));
                    return None;
                }
                Some(CheckedValue::Plain(Value::Float(v)))
            }
            Ty::Bool => match &node.v {
                NodeV::Bool(b) => Some(CheckedValue::Plain(Value::Bool(*b))),
                _ => {
                    self.bad_type(path, ty, node);
                    None
                }
            },
            Ty::Str => match &node.v {
                NodeV::Str(s) if !s.trim().is_empty() => {
                    Some(CheckedValue::Plain(Value::Str(s.clone())))
                }
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
                    Some(CheckedValue::Plain(Value::Str(s.clone())))
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
                    Some(CheckedValue::Plain(Value::Str(s.clone())))
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
                ok.then_some(CheckedValue::Plain(Value::List(out)))
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
                Some(CheckedValue::Plain(Value::List(out)))
            }
            Ty::AnyTable => match &node.v {
                NodeV::Table(_) => Some(CheckedValue::Plain(any_value(node))),
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
                Some(CheckedValue::Budget(b))
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
                Some(CheckedValue::Schedule(s))
            }
            Ty::Stop => {
                let NodeV::Table(t) = &node.v else {
                    self.bad_type(path, ty, node);
                    return None;
                };
                if t.is_empty() {
                    return Some(CheckedValue::Stop(None));
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
                        Some(CheckedValue::Stop(Some(StopWhen::Success(v))))
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
                    "return" => Some(CheckedValue::Stop(Some(StopWhen::Return(v)))),
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
            Ty::Part(_) => {
                self.internal(
                    path,
                    "a part table reached the conversion of single values".into(),
                );
                None
            }
        }
    }
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
