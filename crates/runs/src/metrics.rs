//! `metrics.jsonl` on disk: appended one whole line per record and flushed, so a run
//! killed at any moment leaves at most a partial last line, which the reader skips and
//! the writer cuts off before appending again.

use std::fs::{File, OpenOptions};
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::error::{Error, Result};
use crate::record::Record;

/// An open `metrics.jsonl`, appending.
pub struct MetricsLog {
    path: PathBuf,
    file: File,
    line: Vec<u8>,
}

impl MetricsLog {
    /// Opens (or creates) `path` for appending. A partial last line (a run killed
    /// mid-write) is cut off first, so the file stays whole JSON lines.
    ///
    /// # Errors
    /// [`Error::Io`] naming `path`.
    pub fn open(path: &Path) -> Result<Self> {
        if let Ok(text) = std::fs::read(path) {
            if !text.is_empty() && text.last() != Some(&b'\n') {
                let keep = text.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
                let f = OpenOptions::new()
                    .write(true)
                    .open(path)
                    .map_err(|e| Error::io(path, e))?;
                f.set_len(keep as u64).map_err(|e| Error::io(path, e))?;
            }
        }
        let file = OpenOptions::new()
            .create(true)
            .append(true)
            .open(path)
            .map_err(|e| Error::io(path, e))?;
        Ok(MetricsLog {
            path: path.to_path_buf(),
            file,
            line: Vec::new(),
        })
    }

    /// Appends `record` as one line, written in one call and flushed.
    ///
    /// # Errors
    /// [`Error::Io`] naming the file.
    pub fn append(&mut self, record: &Record) -> Result<()> {
        self.line.clear();
        serde_json::to_writer(&mut self.line, record)?;
        self.line.push(b'\n');
        self.file
            .write_all(&self.line)
            .and_then(|_| self.file.flush())
            .map_err(|e| Error::io(&self.path, e))
    }

    /// The file.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

/// What [`read_metrics`] found.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Metrics {
    /// The records in file order.
    pub records: Vec<Record>,
    /// 1-based numbers of lines that were not records (a last line cut off by a killed
    /// run, garbage, an eval or end record missing a field), so the caller can warn
    /// naming the file.
    pub skipped_lines: Vec<usize>,
}

impl Metrics {
    /// Why the run stopped, if its last record is an end record (an end record followed
    /// by other records belongs to a run that was resumed afterwards).
    pub fn stopped_by(&self) -> Option<crate::StopReason> {
        match self.records.last() {
            Some(Record::End(end)) => Some(end.stopped_by),
            _ => None,
        }
    }
}

/// Reads a `metrics.jsonl`. Blank lines are ignored; lines that are not records are
/// listed in [`Metrics::skipped_lines`] (invalid UTF-8 included) rather than failing.
///
/// # Errors
/// [`Error::Io`] naming `path` when the file cannot be read.
pub fn read_metrics(path: &Path) -> Result<Metrics> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    let mut out = Metrics::default();
    for (i, line) in bytes.split(|&b| b == b'\n').enumerate() {
        if line.iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        match serde_json::from_slice::<Record>(line) {
            Ok(r) => out.records.push(r),
            Err(_) => out.skipped_lines.push(i + 1),
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::record::{EndRecord, EvalRecord, Phases, StopReason, TrainRecord};

    /// Lines of a `metrics.jsonl` written by mnemon before the records were typed
    /// (`mnemon train specs/tmaze-lstm.toml`, seed 1, keys in the order serde_json wrote
    /// them then): its first six records (train and eval), its end record, and a train
    /// line cut off mid-write as a killed run leaves it.
    const OLD: &str = include_str!("../tests/data/old-metrics.jsonl");

    #[test]
    fn reads_a_file_in_the_old_format() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("metrics.jsonl");
        std::fs::write(&path, OLD).unwrap();
        let m = read_metrics(&path).unwrap();
        let lines = OLD.lines().count();
        assert_eq!(m.skipped_lines, vec![lines], "only the cut-off last line");
        assert_eq!(m.records.len(), lines - 1);
        let Record::Train(first) = &m.records[0] else {
            panic!("first record {:?}", m.records[0]);
        };
        // The values of the fixture's first line.
        let want: serde_json::Value = serde_json::from_str(OLD.lines().next().unwrap()).unwrap();
        assert_eq!(first.env_steps, want["env_steps"].as_u64().unwrap());
        assert_eq!(first.episode_return, want["episode_return"].as_f64());
        assert_eq!(first.loss, want["loss"].as_f64());
        assert_eq!(
            first.phases.acting,
            want["phases"]["acting"].as_f64().unwrap()
        );
        let evals: Vec<&EvalRecord> = m
            .records
            .iter()
            .filter_map(|r| match r {
                Record::Eval(e) => Some(e),
                _ => None,
            })
            .collect();
        assert!(!evals.is_empty(), "the fixture holds evaluations");
        assert!(evals.iter().all(|e| e.eval_episodes == 100));
        let end = m.records.iter().find_map(|r| match r {
            Record::End(e) => Some(e),
            _ => None,
        });
        assert_eq!(end.map(|e| e.stopped_by), Some(StopReason::Target));
        // Written again, each record reads back equal.
        for r in &m.records {
            let text = serde_json::to_string(r).unwrap();
            assert_eq!(&serde_json::from_str::<Record>(&text).unwrap(), r);
        }
    }

    #[test]
    fn written_lines_keep_the_documented_keys() {
        let rec = Record::Train(TrainRecord {
            env_steps: 3,
            ..Default::default()
        });
        let v: serde_json::Value = serde_json::to_value(&rec).unwrap();
        let mut keys: Vec<&str> = v.as_object().unwrap().keys().map(|k| k.as_str()).collect();
        keys.sort();
        // README "Runs on disk": the train record's fields.
        let mut want = vec![
            "kind",
            "env_steps",
            "learner_steps",
            "episodes",
            "wall_seconds",
            "episode_return",
            "success_rate",
            "loss",
            "mean_q",
            "q_discrepancy_first",
            "q_discrepancy_last",
            "steps_per_second",
            "updates_per_second",
            "replay_fill",
            "phases",
        ];
        want.sort();
        assert_eq!(keys, want);
        assert_eq!(v["kind"], "train");
        assert!(
            v["episode_return"].is_null(),
            "no episode yet is null, not absent"
        );
        let end = serde_json::to_value(Record::End(EndRecord {
            env_steps: 9,
            learner_steps: 2,
            wall_seconds: 1.5,
            stopped_by: StopReason::Interrupt,
            target_reached_at: None,
            phases: Phases::default(),
        }))
        .unwrap();
        assert_eq!(end["stopped_by"], "interrupt");
        assert!(end["target_reached_at"].is_null());
    }

    #[test]
    fn appending_cuts_a_partial_line_and_unknown_kinds_read() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("metrics.jsonl");
        let mut log = MetricsLog::open(&path).unwrap();
        log.append(&Record::Train(TrainRecord::default())).unwrap();
        drop(log);
        let mut f = OpenOptions::new().append(true).open(&path).unwrap();
        f.write_all(b"{\"kind\":\"future\",\"x\":1}\n{\"kind\":\"train\",\"env_st")
            .unwrap();
        drop(f);
        let m = read_metrics(&path).unwrap();
        assert_eq!(m.skipped_lines, vec![3]);
        assert_eq!(m.records[1], Record::Unknown);
        let mut log = MetricsLog::open(&path).unwrap();
        let end = EndRecord {
            env_steps: 5,
            learner_steps: 1,
            wall_seconds: 0.5,
            stopped_by: StopReason::Budget,
            target_reached_at: Some(4),
            phases: Phases::default(),
        };
        log.append(&Record::End(end.clone())).unwrap();
        let m = read_metrics(&path).unwrap();
        assert!(
            m.skipped_lines.is_empty(),
            "partial line cut before appending"
        );
        assert_eq!(m.records.len(), 3);
        assert_eq!(m.stopped_by(), Some(StopReason::Budget));
        assert_eq!(m.records[2], Record::End(end));
    }

    #[test]
    fn missing_required_fields_and_bad_reasons_are_skipped() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("metrics.jsonl");
        let text = concat!(
            "{\"kind\":\"eval\",\"env_steps\":10,\"wall_seconds\":1.0}\n",
            "{\"kind\":\"end\",\"env_steps\":10,\"wall_seconds\":1.0,\"stopped_by\":\"bored\"}\n",
            "[1, 2]\n",
            "\n",
            "{\"kind\":\"end\",\"env_steps\":10,\"wall_seconds\":1.0,\"stopped_by\":\"interrupt\"}\n",
        );
        std::fs::write(&path, text).unwrap();
        let m = read_metrics(&path).unwrap();
        assert_eq!(m.skipped_lines, vec![1, 2, 3]);
        assert_eq!(m.stopped_by(), Some(StopReason::Interrupt));
        assert!(matches!(
            read_metrics(&dir.path().join("none")),
            Err(Error::Io { .. })
        ));
    }
}
