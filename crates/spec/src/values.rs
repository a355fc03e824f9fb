//! The small text grammars inside spec values: counts with suffixes (`"200k"`),
//! durations (`"20m"`), budgets (either), and schedules (`"ramp(1e-3, 1e-4, 1M)"`).
//!
//! Every parser returns either the value or a [`TextError`]: a message plus the byte
//! range inside the string it is about, so the loader can point at the exact spot.

use std::ops::Range;

use crate::model::{Budget, Schedule};

/// A problem inside a value's text: what is wrong and where (bytes of the string).
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct TextError {
    pub message: String,
    pub at: Range<usize>,
}

fn err<T>(message: impl Into<String>, at: Range<usize>) -> Result<T, TextError> {
    Err(TextError {
        message: message.into(),
        at,
    })
}

/// `"200k"` -> 200_000. Suffixes: k (10^3), M (10^6), G (10^9); a decimal mantissa is
/// allowed when the product is whole (`"1.5M"`). Underscores are ignored.
pub(crate) fn parse_count(text: &str) -> Result<u64, TextError> {
    let whole = 0..text.len();
    let t = text.trim();
    if t.is_empty() {
        return err(
            "expected a count like 5000 or \"5k\", got an empty string",
            whole,
        );
    }
    let (mantissa, mult) = match t.chars().last() {
        Some('k') | Some('K') => (&t[..t.len() - 1], 1e3),
        Some('M') => (&t[..t.len() - 1], 1e6),
        Some('G') => (&t[..t.len() - 1], 1e9),
        Some('m') => {
            return err(
                "`m` means minutes; for millions write `M` (like \"2M\")",
                whole,
            )
        }
        _ => (t, 1.0),
    };
    let mantissa = mantissa.replace('_', "");
    if let Ok(v) = mantissa.parse::<u64>() {
        let v = v as f64 * mult;
        if v <= u64::MAX as f64 / 2.0 {
            return Ok(v as u64);
        }
        return err("number too large", whole);
    }
    match mantissa.parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 && !mantissa.contains(['i', 'n', 'I', 'N']) => {
            let v = v * mult;
            if v.fract() != 0.0 {
                err(format!("{t:?} is not a whole number"), whole)
            } else if v > u64::MAX as f64 / 2.0 {
                err("number too large", whole)
            } else {
                Ok(v as u64)
            }
        }
        _ => err(
            format!("expected a count like 5000, \"200k\" or \"2M\", got {t:?}"),
            whole,
        ),
    }
}

/// `"90s"`, `"20m"`, `"1h"`, `"1h30m"`, `"2.5h"` -> seconds.
pub(crate) fn parse_duration(text: &str) -> Result<f64, TextError> {
    let whole = 0..text.len();
    let t = text.trim();
    let mut total = 0.0;
    let mut num = String::new();
    let mut any = false;
    for c in t.chars() {
        match c {
            '0'..='9' | '.' | '_' => num.push(c),
            's' | 'm' | 'h' => {
                let n = num.replace('_', "");
                let Ok(v) = n.parse::<f64>() else {
                    return err(
                        format!(
                            "expected a duration like \"90s\", \"20m\" or \"1h30m\", got {t:?}"
                        ),
                        whole,
                    );
                };
                total += v * match c {
                    's' => 1.0,
                    'm' => 60.0,
                    _ => 3600.0,
                };
                num.clear();
                any = true;
            }
            _ => {
                return err(
                    format!("expected a duration like \"90s\", \"20m\" or \"1h30m\", got {t:?}"),
                    whole,
                )
            }
        }
    }
    if !any || !num.is_empty() {
        return err(
            format!("expected a duration like \"90s\", \"20m\" or \"1h30m\", got {t:?}"),
            whole,
        );
    }
    Ok(total)
}

/// A budget in text: a duration if it ends in `s`, `m` or `h`, else env steps.
pub(crate) fn parse_budget(text: &str) -> Result<Budget, TextError> {
    let t = text.trim();
    if t.ends_with(['s', 'm', 'h']) {
        parse_duration(text).map(Budget::Seconds)
    } else {
        parse_count(text).map(Budget::Steps)
    }
}

/// Our schedule grammar:
/// ```text
/// schedule := number | "ramp(" number "," number "," count ")"
///           | "points(" count ":" number { "," count ":" number } ")"
/// ```
/// `count` accepts suffixes (`100k`). Steps of `points` must increase.
pub(crate) fn parse_schedule(text: &str) -> Result<Schedule, TextError> {
    let t = text.trim_end();
    let lead = text.len() - text.trim_start().len();
    let body = &t[lead..];
    if let Some(rest) = body.strip_prefix("ramp") {
        let args = call_args(text, lead + 4, rest, "ramp(from, to, over)")?;
        if args.len() != 3 {
            return err(
                format!(
                    "ramp takes 3 arguments (from, to, over), got {}",
                    args.len()
                ),
                lead..t.len(),
            );
        }
        let from = number(text, &args[0])?;
        let to = number(text, &args[1])?;
        let over = count(text, &args[2])?;
        if over == 0 {
            return err(
                "the ramp length `over` must be at least 1 step",
                args[2].clone(),
            );
        }
        Ok(Schedule::Ramp { from, to, over })
    } else if let Some(rest) = body.strip_prefix("points") {
        let args = call_args(text, lead + 6, rest, "points(step:value, ...)")?;
        let mut points: Vec<(u64, f64)> = Vec::new();
        for a in &args {
            let piece = &text[a.clone()];
            let Some(colon) = piece.find(':') else {
                return err(
                    format!(
                        "expected step:value, like 100k:1e-4, got {:?}",
                        piece.trim()
                    ),
                    a.clone(),
                );
            };
            let step_at = trimmed(text, &(a.start..a.start + colon));
            let value_at = a.start + colon + 1..a.end;
            let step = count(text, &step_at)?;
            let value = number(text, &value_at)?;
            if let Some(&(prev, _)) = points.last() {
                if step <= prev {
                    return err(
                        format!("steps must increase: {step} comes after {prev}"),
                        step_at,
                    );
                }
            }
            points.push((step, value));
        }
        Ok(Schedule::Points(points))
    } else {
        match body.parse::<f64>() {
            Ok(v) if !body.is_empty() => Ok(Schedule::Constant(v)),
            _ => err(
                format!(
                    "expected a schedule: a number, \"ramp(from, to, over)\" or \"points(step:value, ...)\", got {:?}",
                    body
                ),
                lead..t.len(),
            ),
        }
    }
}

/// Split `(a, b, c)` after a function name into argument byte ranges of `full`.
fn call_args(
    full: &str,
    offset: usize,
    rest: &str,
    shape: &str,
) -> Result<Vec<Range<usize>>, TextError> {
    let open = rest.len() - rest.trim_start().len();
    let rest_t = rest.trim_start();
    if !rest_t.starts_with('(') || !rest_t.ends_with(')') || rest_t.len() < 2 {
        return err(
            format!("expected {shape}"),
            offset..(offset + rest.len()).min(full.len()),
        );
    }
    let inner_start = offset + open + 1;
    let inner_end = offset + rest.len() - 1;
    if inner_end < inner_start {
        return err(format!("expected {shape}"), offset..full.len());
    }
    let inner = &full[inner_start..inner_end];
    if inner.trim().is_empty() {
        return err(
            format!("expected {shape}, got no arguments"),
            offset..inner_end + 1,
        );
    }
    let mut out = Vec::new();
    let mut start = inner_start;
    for (i, c) in inner.char_indices() {
        if c == ',' {
            out.push(start..inner_start + i);
            start = inner_start + i + 1;
        }
    }
    out.push(start..inner_end);
    Ok(out)
}

fn trimmed(full: &str, at: &Range<usize>) -> Range<usize> {
    let s = &full[at.clone()];
    let lead = s.len() - s.trim_start().len();
    let trail = s.len() - s.trim_end().len();
    (at.start + lead)..(at.end - trail).max(at.start + lead)
}

fn number(full: &str, at: &Range<usize>) -> Result<f64, TextError> {
    let at = trimmed(full, at);
    let s = &full[at.clone()];
    match s.replace('_', "").parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        _ => err(format!("expected a number, got {s:?}"), at),
    }
}

fn count(full: &str, at: &Range<usize>) -> Result<u64, TextError> {
    let at = trimmed(full, at);
    parse_count(&full[at.clone()]).map_err(|e| TextError {
        message: e.message,
        at,
    })
}

/// A float as TOML text that reads back as a float (`1.0`, not `1`).
pub(crate) fn float_text(v: f64) -> String {
    let s = format!("{v}");
    if s.contains(['.', 'e', 'E', 'n', 'N', 'i']) {
        s
    } else {
        format!("{s}.0")
    }
}

/// A schedule in our grammar (a plain float for a constant).
pub(crate) fn schedule_text(s: &Schedule) -> String {
    match s {
        Schedule::Constant(v) => float_text(*v),
        Schedule::Ramp { from, to, over } => format!(
            "\"ramp({}, {}, {over})\"",
            float_text(*from),
            float_text(*to)
        ),
        Schedule::Points(points) => {
            let parts: Vec<String> = points
                .iter()
                .map(|(s, v)| format!("{s}:{}", float_text(*v)))
                .collect();
            format!("\"points({})\"", parts.join(", "))
        }
    }
}

/// A budget as TOML: env steps as an integer, time as `"<seconds>s"`.
pub(crate) fn budget_text(b: &Budget) -> String {
    match b {
        Budget::Steps(n) => n.to_string(),
        Budget::Seconds(s) => format!("\"{s}s\""),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_with_suffixes() {
        assert_eq!(parse_count("200k").unwrap(), 200_000);
        assert_eq!(parse_count("2M").unwrap(), 2_000_000);
        assert_eq!(parse_count("1.5M").unwrap(), 1_500_000);
        assert_eq!(parse_count("1G").unwrap(), 1_000_000_000);
        assert_eq!(parse_count("1_000").unwrap(), 1000);
        assert_eq!(parse_count("40").unwrap(), 40);
        assert!(parse_count("2m").unwrap_err().message.contains("minutes"));
        assert!(parse_count("1.5").is_err());
        assert!(parse_count("-3k").is_err());
        assert!(parse_count("5x").is_err());
        assert!(parse_count("").is_err());
    }

    #[test]
    fn durations() {
        assert_eq!(parse_duration("90s").unwrap(), 90.0);
        assert_eq!(parse_duration("20m").unwrap(), 1200.0);
        assert_eq!(parse_duration("1h30m").unwrap(), 5400.0);
        assert_eq!(parse_duration("2.5h").unwrap(), 9000.0);
        assert!(parse_duration("20").is_err());
        assert!(parse_duration("m").is_err());
        assert!(parse_duration("5d").is_err());
        assert_eq!(parse_budget("2M").unwrap(), Budget::Steps(2_000_000));
        assert_eq!(parse_budget("20m").unwrap(), Budget::Seconds(1200.0));
    }

    #[test]
    fn schedules_parse_and_evaluate() {
        assert_eq!(parse_schedule("1e-3").unwrap(), Schedule::Constant(1e-3));
        let r = parse_schedule("ramp(1e-3, 1e-4, 1M)").unwrap();
        assert_eq!(
            r,
            Schedule::Ramp {
                from: 1e-3,
                to: 1e-4,
                over: 1_000_000
            }
        );
        // Halfway along a linear ramp: (1e-3 + 1e-4) / 2 = 5.5e-4.
        assert!((r.at(500_000) - 5.5e-4).abs() < 1e-12);
        assert_eq!(r.at(2_000_000), 1e-4);
        let p = parse_schedule("points(0:1, 100:3, 200:2)").unwrap();
        assert_eq!(p.at(0), 1.0);
        assert_eq!(p.at(50), 2.0);
        assert_eq!(p.at(150), 2.5);
        assert_eq!(p.at(1000), 2.0);
    }

    #[test]
    fn schedule_errors_point_inside_the_string() {
        let text = "ramp(1e-3, x, 1M)";
        let e = parse_schedule(text).unwrap_err();
        assert_eq!(&text[e.at.clone()], "x");
        let text = "points(0:1, 0:2)";
        let e = parse_schedule(text).unwrap_err();
        assert!(e.message.contains("increase"));
        assert_eq!(&text[e.at.clone()], "0");
        assert_eq!(e.at.start, 12);
        assert!(parse_schedule("ramp(1, 2)").is_err());
        assert!(parse_schedule("ramp").is_err());
        assert!(parse_schedule("ramp()").is_err());
        assert!(parse_schedule("points(5)").is_err());
        assert!(parse_schedule("cosine(1, 2, 3)").is_err());
    }

    #[test]
    fn text_forms_read_back() {
        for s in [
            Schedule::Constant(0.001),
            Schedule::Ramp {
                from: 1.0,
                to: 2.5,
                over: 7,
            },
            Schedule::Points(vec![(0, 1.0), (10, 1e-4)]),
        ] {
            let t = schedule_text(&s);
            let inner = t.trim_matches('"');
            assert_eq!(parse_schedule(inner).unwrap(), s, "{t}");
        }
        assert_eq!(float_text(1.0), "1.0");
        assert_eq!(float_text(1e-4), "0.0001");
    }
}
