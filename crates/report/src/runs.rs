//! Run records: what the report knows about one training run. [`read_metrics`] reads a
//! run's `metrics.jsonl` (the typed records of `mnemon-runs`, written by training) into
//! the learning curve and the end record; [`RunRecord`] joins that with the final
//! scores, which the caller gets by evaluating the run's final checkpoint. Nothing here
//! trains or evaluates.

use std::path::{Path, PathBuf};

use mnemon_runs::{Record, StopReason};
use serde::Serialize;

use crate::error::{Error, Result};

/// One greedy evaluation during training (a `"kind": "eval"` record).
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct CurvePoint {
    /// Environment steps taken when the evaluation ran.
    pub env_steps: u64,
    /// Training wall-clock seconds at that point (including time before any resume).
    pub wall_seconds: f64,
    /// Mean return of the evaluation episodes.
    pub eval_return: f64,
    /// Fraction of evaluation episodes that succeeded; `None` when the task has no notion
    /// of success.
    pub eval_success: Option<f64>,
}

/// How a run ended (the `"kind": "end"` record).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct RunEnd {
    /// Environment steps at the end.
    pub env_steps: u64,
    /// Training wall-clock seconds at the end.
    pub wall_seconds: f64,
    /// Why training stopped.
    pub stopped_by: StopReason,
}

/// What [`read_metrics`] found in a `metrics.jsonl`.
#[derive(Clone, Debug, Default, PartialEq, Serialize)]
pub struct MetricsFile {
    /// Evaluations, in increasing `env_steps`, one per step count.
    pub curve: Vec<CurvePoint>,
    /// The end record, if the run finished (a run killed mid-way has none).
    pub end: Option<RunEnd>,
    /// 1-based numbers of lines that were not valid records (a last line cut off by a
    /// killed run, or garbage), so the caller can warn naming the file.
    pub skipped_lines: Vec<usize>,
}

/// One finished run as the report sees it.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct RunRecord {
    /// The variant (spec or configuration) this run belongs to; runs are grouped by it.
    pub variant: String,
    /// The run's seed.
    pub seed: u64,
    /// The task name; a report covers one task.
    pub task: String,
    /// The run's folder.
    pub run_dir: PathBuf,
    /// Mean return of the caller's evaluation of the final checkpoint.
    pub final_return: f64,
    /// Success rate of that evaluation, `None` when the task has no success.
    pub final_success: Option<f64>,
    /// The learning curve from `metrics.jsonl`.
    pub curve: Vec<CurvePoint>,
    /// Environment steps the run took in all.
    pub env_steps: u64,
    /// Training wall-clock seconds in all.
    pub wall_seconds: f64,
}

/// Reads a run's `metrics.jsonl`.
///
/// Lines that are not JSON objects, or `eval` / `end` records missing a field, are
/// skipped and listed in [`MetricsFile::skipped_lines`]; blank lines and records of other
/// kinds (`train`) are ignored. Evaluations are returned in increasing `env_steps`. A
/// resumed run restarts from a checkpoint and evaluates steps it had evaluated before:
/// an evaluation at or below the last kept step replaces every kept evaluation from that
/// step on, so the curve is the history of the run that survived (in particular, of two
/// records at the same `env_steps` the later one wins). Likewise an `end` record counts
/// only if no other record follows it.
///
/// # Errors
/// [`Error::Io`] naming `path` when the file cannot be read.
pub fn read_metrics(path: &Path) -> Result<MetricsFile> {
    let metrics = mnemon_runs::read_metrics(path).map_err(|e| match e {
        mnemon_runs::Error::Io { path, source } => Error::Io { path, source },
        other => Error::io(path, std::io::Error::other(other.to_string())),
    })?;
    let mut out = MetricsFile {
        skipped_lines: metrics.skipped_lines,
        ..Default::default()
    };
    for record in metrics.records {
        match record {
            Record::Eval(e) => {
                while out.curve.last().is_some_and(|q| q.env_steps >= e.env_steps) {
                    out.curve.pop();
                }
                out.curve.push(CurvePoint {
                    env_steps: e.env_steps,
                    wall_seconds: e.wall_seconds,
                    eval_return: e.eval_return,
                    eval_success: e.eval_success_rate,
                });
                out.end = None;
            }
            Record::End(e) => {
                out.end = Some(RunEnd {
                    env_steps: e.env_steps,
                    wall_seconds: e.wall_seconds,
                    stopped_by: e.stopped_by,
                })
            }
            // Training went on after an end record: the run was resumed.
            Record::Train(_) | Record::Unknown => out.end = None,
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn eval_line(steps: u64, ret: f64, success: Option<f64>) -> String {
        serde_json::json!({
            "kind": "eval", "env_steps": steps, "learner_steps": steps / 4,
            "wall_seconds": steps as f64 / 1000.0, "eval_return": ret,
            "eval_discounted_return": ret * 0.9, "eval_success_rate": success,
            "eval_length": 50.0, "eval_episodes": 10,
        })
        .to_string()
    }

    fn write(dir: &Path, text: &str) -> PathBuf {
        let path = dir.join("metrics.jsonl");
        std::fs::write(&path, text).unwrap();
        path
    }

    #[test]
    fn truncated_last_line_and_garbage_are_skipped_by_line_number() {
        let dir = tempfile::tempdir().unwrap();
        let train = r#"{"kind":"train","env_steps":500,"loss":0.3}"#;
        let full = eval_line(2000, 7.5, Some(0.5));
        let text = format!(
            "{train}\n{}\nnot json at all\n\n{}\n{}",
            eval_line(1000, 5.0, Some(0.25)),
            full,
            &eval_line(3000, 9.0, Some(1.0))[..40], // killed mid-write
        );
        let m = read_metrics(&write(dir.path(), &text)).unwrap();
        assert_eq!(m.skipped_lines, vec![3, 6]);
        assert_eq!(m.curve.len(), 2);
        assert_eq!(m.curve[0].env_steps, 1000);
        assert_eq!(m.curve[1].eval_return, 7.5);
        assert_eq!(m.curve[1].eval_success, Some(0.5));
        assert_eq!(m.curve[1].wall_seconds, 2.0);
        assert!(m.end.is_none(), "a killed run has no end record");
    }

    #[test]
    fn eval_record_missing_a_field_is_skipped() {
        let dir = tempfile::tempdir().unwrap();
        let text = format!(
            "{}\n{}\n[1, 2]\n",
            r#"{"kind":"eval","env_steps":10,"wall_seconds":1.0}"#,
            eval_line(20, 1.0, None),
        );
        let m = read_metrics(&write(dir.path(), &text)).unwrap();
        assert_eq!(m.skipped_lines, vec![1, 3]);
        assert_eq!(m.curve.len(), 1);
        assert_eq!(m.curve[0].eval_success, None, "null success is None");
    }

    #[test]
    fn resumed_run_keeps_the_last_record_per_step() {
        // Evaluated 1000, 2000, 3000; killed; resumed from the 2000 checkpoint and
        // re-evaluated 2000 (different value) and 3000, then finished.
        let dir = tempfile::tempdir().unwrap();
        let end = r#"{"kind":"end","env_steps":3000,"wall_seconds":9.5,"stopped_by":"budget","target_reached_at":null}"#;
        let text = [
            eval_line(1000, 1.0, None),
            eval_line(2000, 2.0, None),
            eval_line(3000, 3.0, None),
            eval_line(2000, 20.0, None),
            eval_line(3000, 30.0, None),
            end.to_string(),
        ]
        .join("\n");
        let m = read_metrics(&write(dir.path(), &text)).unwrap();
        let got: Vec<(u64, f64)> = m
            .curve
            .iter()
            .map(|p| (p.env_steps, p.eval_return))
            .collect();
        assert_eq!(got, vec![(1000, 1.0), (2000, 20.0), (3000, 30.0)]);
        let end = m.end.unwrap();
        assert_eq!((end.env_steps, end.stopped_by), (3000, StopReason::Budget));
        assert_eq!(end.wall_seconds, 9.5);
        assert!(m.skipped_lines.is_empty());
    }

    #[test]
    fn end_followed_by_more_training_does_not_count() {
        // Interrupted (end written), then resumed and killed before a new end.
        let dir = tempfile::tempdir().unwrap();
        let end = r#"{"kind":"end","env_steps":1000,"wall_seconds":1.0,"stopped_by":"interrupt"}"#;
        let train = r#"{"kind":"train","env_steps":1500}"#;
        let text = format!(
            "{}\n{end}\n{}\n",
            eval_line(1000, 1.0, None),
            eval_line(2000, 2.0, None)
        );
        let m = read_metrics(&write(dir.path(), &text)).unwrap();
        assert!(m.end.is_none());
        assert_eq!(m.curve.len(), 2);
        let text = format!("{}\n{end}\n{train}\n", eval_line(1000, 1.0, None));
        assert!(read_metrics(&write(dir.path(), &text))
            .unwrap()
            .end
            .is_none());
    }

    #[test]
    fn missing_file_is_an_error_naming_the_path() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("no-such-run").join("metrics.jsonl");
        let err = read_metrics(&path).unwrap_err();
        assert!(matches!(err, Error::Io { .. }));
        let msg = err.to_string();
        assert!(msg.contains(&path.display().to_string()), "{msg}");
    }

    #[test]
    fn invalid_utf8_line_is_skipped_not_fatal() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("metrics.jsonl");
        let mut bytes = eval_line(10, 1.0, None).into_bytes();
        bytes.extend_from_slice(b"\n\xff\xfe\x00garbage\n");
        std::fs::write(&path, bytes).unwrap();
        let m = read_metrics(&path).unwrap();
        assert_eq!(m.skipped_lines, vec![2]);
        assert_eq!(m.curve.len(), 1);
    }
}
